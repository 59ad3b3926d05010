"""Generators, damage, mutations and oracles for fuzzing tracechain's readers.

Shared by the fuzz tests (``tests/fuzz/``) and the longer campaign
(``benchmarks/fuzz_campaign.py``). Everything is invented data drawn from a seeded
:class:`random.Random`; nothing here reads a file outside the directory it is given.

Per format there is a *generator* ``gen(rng) -> Case``: a log of valid records mixed
with damaged ones, and the events an independent reader would take from it. The
expected events are known by construction: each valid record is written from the
(session, event) it stands for, following the format's specification (cited beside
each generator), and each damaged record is one the format's documented acceptance
rules reject. The oracle is therefore the generator itself, not tracechain.

*Mutations* (``mutate(data, rng)``) damage a file's bytes blindly (byte flips,
truncation, junk lines, invalid UTF-8, control characters, huge numbers, deep nesting,
CRLF, a byte order mark, compression and corrupted compressed bytes); for those only
"no exception but tracechain's own" and "the same result for any block size" are
asserted, since no simple oracle knows what a blindly damaged line should give.
"""

from __future__ import annotations

import bz2
import csv
import gzip
import io
import json
import lzma
import os
import random
import traceback
from dataclasses import dataclass, field
from typing import Any, Callable
from xml.sax.saxutils import quoteattr

__all__ = ["Case", "FORMATS", "MUTATIONS", "mutate", "compress", "run_reader", "run_counts", "Outcome",
           "fuzz_one", "Format"]

# ---------------------------------------------------------------------------------
# invented vocabulary
# ---------------------------------------------------------------------------------
_STATES = ("home", "search", "item", "cart", "pay", "done", "help", "Sign in", "état", "商品", "a,b", "x\"y")
_PLAIN_STATES = ("home", "search", "item", "cart", "pay", "done", "help", "login", "etat", "review")


def _sid(rng: random.Random) -> str:
    return rng.choice(("s", "user-", "ü", "k")) + str(rng.randrange(12))


@dataclass
class Case:
    """A generated log: its bytes, the reader settings, and what an independent reader takes from it.

    ``events`` is a sorted list of ``(session, event, line)`` (``line`` None where the
    format's record number is not a line: XES); for edge lists ``edges`` maps
    ``(from, to)`` to its count instead.
    """

    data: bytes
    extra: dict[str, Any] = field(default_factory=dict)
    events: list | None = None
    edges: dict | None = None
    name: str = "log"


# ---------------------------------------------------------------------------------
# generators, one per format
# ---------------------------------------------------------------------------------
def _iso(rng: random.Random, base: int = 1_700_000_000) -> tuple[str, int]:
    import datetime as _dt

    t = base + rng.randrange(0, 86400 * 3)
    return _dt.datetime.fromtimestamp(t, _dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"), t


def gen_jsonl(rng: random.Random) -> Case:
    """JSON Lines (jsonlines.org): one object per line; a line is an event when it is a JSON
    object whose session and event fields are non-empty text and whose time is ISO 8601
    (tracechain's README; the field names are among the detected ones)."""
    out: list[bytes] = []
    events = []
    junk = (b"", b"   ", b"{\"session_id\": \"a\"", b"[1, 2]", b"null", b"\"text\"", b"{\"event\": \"x\", \"ts\": 1}",
            b"{\"session_id\": \"\", \"event\": \"x\"}", b"\xff\xfe{}", b"not json at all", b"{}")
    for _ in range(rng.randrange(1, 40)):
        ln = len(out) + 1
        if rng.random() < 0.25:
            out.append(rng.choice(junk))
            continue
        s, e = _sid(rng), rng.choice(_STATES)
        when, _ = _iso(rng)
        obj = {"session_id": s, "ts": when, "event": e}
        if rng.random() < 0.2:
            obj["extra"] = rng.choice((1, "x", [1, 2], {"k": None}))
        out.append(json.dumps(obj, ensure_ascii=rng.random() < 0.5).encode())
        events.append((s, e, ln))
    if not events:  # the reader needs one good line to find its fields
        out.append(json.dumps({"session_id": "s0", "ts": "2024-01-01T00:00:00Z", "event": "home"}).encode())
        events.append(("s0", "home", len(out)))
    return Case(b"\n".join(out) + b"\n", {}, sorted(events), name="log.jsonl")


def gen_csv(rng: random.Random) -> Case:
    """CSV with a header row (RFC 4180): a row is an event when it has as many fields as
    the header and non-empty session and event fields; quoting per section 2 rules 5-7."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["session_id", "ts", "event"])
    rows = buf.getvalue().encode().splitlines()
    events = []
    junk = (b"", b"only,two", b"a,b,c,d", b",2024-01-01T00:00:00Z,home", b"s1,2024-01-01T00:00:00Z,")
    for _ in range(rng.randrange(1, 40)):
        ln = len(rows) + 1
        if rng.random() < 0.2:
            rows.append(rng.choice(junk))
            continue
        s, e = _sid(rng), rng.choice(_STATES)
        when, _ = _iso(rng)
        b = io.StringIO()
        csv.writer(b, lineterminator="").writerow([s, when, e])
        rows.append(b.getvalue().encode())
        events.append((s, e, ln))
    if not events:
        rows.append(b"s0,2024-01-01T00:00:00Z,home")
        events.append(("s0", "home", len(rows)))
    return Case(b"\n".join(rows) + b"\n", {}, sorted(events), name="log.csv")


def gen_edges(rng: random.Random) -> Case:
    """A ``from,to,count`` edge list: a row counts when both names are non-empty and the
    count is a non-negative integer (tracechain's README); repeated edges add up."""
    rows = [b"from,to,count"]
    edges: dict = {}
    junk = (b"", b"a,b", b"a,b,x", b"a,b,-3", b"a,b,1.5", b",b,2", b"a,b,nan", b"a,b,inf")
    names = _PLAIN_STATES[:6]
    for _ in range(rng.randrange(1, 30)):
        if rng.random() < 0.2:
            rows.append(rng.choice(junk))
            continue
        a = rng.choice(("[start]",) + names)
        b = rng.choice(names + ("[end]",))
        if a == "[start]" and b == "[end]":
            b = names[0]
        c = rng.randrange(0, 50)
        rows.append(f"{a},{b},{c}".encode())
        edges[(a, b)] = edges.get((a, b), 0) + c
    return Case(b"\n".join(rows) + b"\n", {}, edges={k: v for k, v in edges.items() if v}, name="edges.csv")


_MONTHS = ("Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec")
_AGENTS = ("Mozilla/5.0 (X11; Linux x86_64)", "curl/8.0", "Probe/1.0 (+http://example.test/bot)",
           "Tool \\\"quoted\\\" 2", "")
_TARGETS = (("/", "/"), ("/item/12", "/item/12"), ("/search?q=a+b", "/search"), ("/a#frag", "/a"),
            ("http://shop.example/cart?x=1", "/cart"), ("/%7Euser/", "/%7Euser/"), ("/ü/x", "/ü/x"))


def gen_access(rng: random.Random) -> Case:
    """NCSA Combined/Common log lines (Apache httpd log format documentation): session =
    host + " " + user agent (``-`` when absent), event = the request target's path
    without query or fragment; ``\\"`` in a quoted field is a quote."""
    out: list[bytes] = []
    events = []
    junk = (b"", b"garbage line", b"\xff\xfe\xfd", b'1.2.3.4 - - [31/Feb/2024:10:00:00 +0000] "GET / HTTP/1.1" 200 1',
            b'1.2.3.4 - - [01/Foo/2024:10:00:00 +0000] "GET / HTTP/1.1" 200 1',
            b'1.2.3.4 - - [01/Jan/2024:10:00:00 +0000] "-" 400 0',
            b'1.2.3.4 - - [01/Jan/2024:10:00:00 +0000] "GET /',
            b'1.2.3.4 - - [01/Jan/2024:25:00:00 +0000] "GET / HTTP/1.1" 200 1',
            b"\x00\x01\x02 control")
    for _ in range(rng.randrange(1, 40)):
        ln = len(out) + 1
        if rng.random() < 0.25:
            out.append(rng.choice(junk))
            continue
        host = rng.choice(("10.0.0.1", "10.0.0.2", "2001:db8::1", "host.example"))
        d, mon, y = rng.randrange(1, 29), rng.choice(_MONTHS), rng.choice((1999, 2024, 2025))
        hh, mi, ss = rng.randrange(24), rng.randrange(60), rng.randrange(60)
        tz = rng.choice(("+0000", "-0700", "+0530"))
        target, path = rng.choice(_TARGETS)
        method = rng.choice(("GET", "POST", "HEAD"))
        proto = rng.choice((" HTTP/1.1", " HTTP/2.0", ""))
        status = rng.choice(("200", "404", "302", "-"))
        size = rng.choice(("0", "512", "-"))
        line = f'{host} - {rng.choice(("-", "bob"))} [{d:02d}/{mon}/{y}:{hh:02d}:{mi:02d}:{ss:02d} {tz}] ' \
               f'"{method} {target}{proto}" {status} {size}'
        if rng.random() < 0.8:
            agent = rng.choice(_AGENTS)
            line += f' "http://ref.example/" "{agent}"'
            shown = agent.replace('\\"', '"') or "-"
        else:
            shown = "-"
        out.append(line.encode())
        events.append((f"{host} {shown}", path, ln))
    return Case(b"\n".join(out) + b"\n", {}, sorted(events), name="access.log")


def gen_w3c(rng: random.Random) -> Case:
    """W3C Extended Log File Format (WD-logfile-960221): ``#Fields`` names the
    space-separated fields of the lines after it; ``-`` is a missing value; IIS writes
    spaces in the user agent as ``+``. Session = c-ip + " " + agent, event = cs-uri-stem."""
    layouts = (["date", "time", "c-ip", "cs-method", "cs-uri-stem", "sc-status", "cs(User-Agent)"],
               ["time", "cs-uri-stem", "c-ip", "cs(User-Agent)", "date"])
    out = [b"#Software: Invented Server 1.0", b"#Version: 1.0", b"#Date: 2024-03-01 00:00:00"]
    events = []
    fields = layouts[0]
    out.append(("#Fields: " + " ".join(fields)).encode())
    junk = (b"", b"too few", b"\xff\xfe", b"2024-03-01 25:00:00 10.0.0.1 GET /x 200 a", b"2024-02-30 10:00:00 1 GET /x 200 a")
    for _ in range(rng.randrange(1, 40)):
        r = rng.random()
        if r < 0.05:
            fields = rng.choice(layouts)
            out.append(("#Fields: " + " ".join(fields)).encode())
            continue
        if r < 0.1:
            out.append(b"#Remark: restarted")
            continue
        ln = len(out) + 1
        if r < 0.3:
            j = rng.choice(junk)
            if len(fields) == 5 and j.count(b" ") == 6:
                j = b"x"  # a junk line of the other layout's width is no junk here
            out.append(j)
            continue
        vals = {"date": f"2024-03-{rng.randrange(1, 29):02d}",
                "time": f"{rng.randrange(24):02d}:{rng.randrange(60):02d}:{rng.randrange(60):02d}",
                "c-ip": rng.choice(("10.0.0.1", "10.0.0.2", "::1")), "cs-method": rng.choice(("GET", "POST")),
                "cs-uri-stem": rng.choice(("/", "/item", "/cart", "/ü")), "sc-status": rng.choice(("200", "404")),
                "cs(User-Agent)": rng.choice(("Mozilla/5.0+(Windows)", "curl/8.0", "-"))}
        out.append(" ".join(vals[f] for f in fields).encode())
        agent = vals["cs(User-Agent)"]
        events.append((f"{vals['c-ip']} {agent.replace('+', ' ')}", vals["cs-uri-stem"], ln))
    return Case(b"\n".join(out) + b"\n", {}, sorted(events), name="u_ex.log")


def gen_otlp(rng: random.Random) -> Case:
    """OTLP/JSON (opentelemetry-proto, file exporter: one TracesData per line): each span
    with a 32-hex-digit non-zero traceId, a name and a start time is an event of its
    trace (lower-case hex), named ``name [error]`` when its status code is 2."""
    out: list[bytes] = []
    events = []
    junk = (b"{oops", b"[1, 2]", b"{\"resourceSpans\": 5}", b"\"x\"", b"{\"other\": []}")
    for _ in range(rng.randrange(1, 25)):
        ln = len(out) + 1
        if rng.random() < 0.2:
            out.append(rng.choice(junk))
            continue
        spans = []
        for _ in range(rng.randrange(0, 4)):
            tid = rng.choice(("0af7651916cd43dd8448eb211c80319c", "4BF92F3577B34DA6A3CE929D0E0E4736",
                              "5b8aa5a2d2c872e8321cf37308d69df2", "00000000000000000000000000000000", "xyz"))
            name = rng.choice(_STATES + ("",))
            start = rng.choice((str(1_700_000_000_000_000_000 + rng.randrange(10**12)), None, "abc"))
            code = rng.choice((0, 1, 2))
            span: dict[str, Any] = {"traceId": tid, "spanId": "00f067aa0ba902b7", "name": name, "kind": 2,
                                    "status": {"code": code}}
            if start is not None:
                span["startTimeUnixNano"] = start
            spans.append(span)
            ok = tid != "xyz" and set(tid) != {"0"} and name and start not in (None, "abc")
            if ok:
                events.append((tid.lower(), name + (" [error]" if code == 2 else ""), ln))
        obj = {"resourceSpans": [{"resource": {"attributes": []}, "scopeSpans": [{"spans": spans}]}]}
        out.append(json.dumps(obj, ensure_ascii=rng.random() < 0.5).encode())
    return Case(b"\n".join(out) + b"\n", {}, sorted(events), name="traces.json")


def gen_cloudevents(rng: random.Random) -> Case:
    """CloudEvents 1.0 JSON format: an event has non-empty string id, source, specversion
    "1.0" and type; an optional RFC 3339 time; session = subject (text, or a number's JSON
    text); not both data and data_base64."""
    out: list[bytes] = []
    events = []
    for _ in range(rng.randrange(1, 30)):
        ln = len(out) + 1
        s, t = _sid(rng), rng.choice(_STATES)
        when, _ = _iso(rng)
        ev: dict[str, Any] = {"specversion": "1.0", "id": str(rng.randrange(10**6)), "source": "/shop",
                              "type": t, "subject": s, "time": when}
        damage = rng.random()
        good = True
        if damage < 0.05:
            del ev["id"]
            good = False
        elif damage < 0.1:
            ev["specversion"] = "0.3"
            good = False
        elif damage < 0.15:
            ev["time"] = "yesterday"
            good = False
        elif damage < 0.2:
            ev["data"], ev["data_base64"] = {}, ""
            good = False
        elif damage < 0.25:
            del ev["subject"]
            good = False
        elif damage < 0.3:
            out.append(rng.choice((b"{broken", b"[3]", b"42")))
            continue
        elif damage < 0.35:
            ev["subject"] = 42
            s = "42"
        elif damage < 0.4:
            del ev["time"]
        out.append(json.dumps(ev, ensure_ascii=rng.random() < 0.5).encode())
        if good:
            events.append((s, t, ln))
    if rng.random() < 0.3 and all(not ln.startswith((b"{broken", b"[3]", b"42")) for ln in out):
        # the batch layout: one array over the same lines
        data = b"[\n" + b",\n".join(out) + b"\n]\n"
        events = [(s, t, ln + 1) for s, t, ln in events]
        return Case(data, {}, sorted(events), name="events.json")
    return Case(b"\n".join(out) + b"\n", {}, sorted(events), name="events.jsonl")


def gen_xes(rng: random.Random) -> Case:
    """IEEE 1849-2016 XES: a trace's ``concept:name`` is the case, an event's
    ``concept:name`` its activity and ``time:timestamp`` an xs:dateTime; a trace without
    a name loses its events, an event without a name or with a bad time is left out.
    Attribute values are XML-escaped (XML 1.0, section 2.4)."""
    lines = ['<?xml version="1.0" encoding="UTF-8"?>',
             '<log xes.version="1.0" xmlns="http://www.xes-standard.org/">',
             '<string key="concept:name" value="invented log"/>']
    events = []
    for k in range(rng.randrange(1, 12)):
        case = f"case {k} {rng.choice(('&', '<', 'ü', ''))}"
        named = rng.random() > 0.1
        lines.append("<trace>")
        if named:
            lines.append(f'<string key="concept:name" value={quoteattr(case)}/>')
        for _ in range(rng.randrange(0, 6)):
            act = rng.choice(_STATES)
            r = rng.random()
            lines.append("<event>")
            ok = True
            if r < 0.1:
                lines.append('<string key="org:resource" value="nobody"/>')
                ok = False
            else:
                lines.append(f'<string key="concept:name" value={quoteattr(act)}/>')
            if 0.1 <= r < 0.2:
                lines.append('<date key="time:timestamp" value="not a date"/>')
                ok = False
            elif r < 0.8:
                lines.append(f'<date key="time:timestamp" value="2024-01-0{rng.randrange(1, 9)}T10:00:00.000+01:00"/>')
            lines.append("</event>")
            if ok and named:
                events.append((case, act, None))
        lines.append("</trace>")
    lines.append("</log>")
    return Case("\n".join(lines).encode() + b"\n", {}, sorted(events), name="log.xes")


_CALLS = ("open", "read", "write", "close", "mmap", "openat", "brk")


def gen_strace(rng: random.Random) -> Case:
    """``strace -f -tt`` output (strace(1)): ``PID HH:MM:SS.uuuuuu name(args) = ret``; a
    call split as ``<unfinished ...>`` / ``<... name resumed>`` is one event at its first
    half; signal lines are no calls; session = pid, event = call name."""
    out: list[bytes] = []
    events = []
    t = rng.randrange(0, 3600)
    pending: dict[str, tuple[str, int]] = {}
    junk = (b"", b"!!! not a call", b"\xff\xfe\x00", b"12345", b"--- garbage", b"   ")
    for _ in range(rng.randrange(1, 40)):
        ln = len(out) + 1
        t += rng.randrange(0, 3)
        stamp = f"{t // 3600 % 24:02d}:{t // 60 % 60:02d}:{t % 60:02d}.{rng.randrange(10**6):06d}"
        pid = rng.choice(("100", "101", "102"))
        r = rng.random()
        if r < 0.15:
            out.append(rng.choice(junk))
            continue
        if r < 0.2:
            out.append(f"{pid} {stamp} --- SIGCHLD {{si_signo=SIGCHLD, si_code=CLD_EXITED}} ---".encode())
            continue
        if pid in pending:
            name, first = pending.pop(pid)
            out.append(f"{pid} {stamp} <... {name} resumed>\"x = y\", 10) = 1".encode())
            events.append((pid, name, first))
            continue
        name = rng.choice(_CALLS)
        if r < 0.3:
            out.append(f"{pid} {stamp} {name}(3, <unfinished ...>".encode())
            pending[pid] = (name, ln)
            continue
        ret = rng.choice(("0", "3", "-1 ENOENT (No such file or directory)", "0x7f0000000000", "3</etc/x>"))
        out.append(f'{pid} {stamp} {name}("/tmp/a = b", O_RDONLY) = {ret}'.encode())
        events.append((pid, name, ln))
    for pid, (name, first) in pending.items():  # never resumed: still a call
        events.append((pid, name, first))
    return Case(b"\n".join(out) + b"\n", {}, sorted(events), name="trace.out")


_REGEX = r"^(?P<time>\S+) job=(?P<session>\S+) state=(?P<event>\w+)"


def gen_regex(rng: random.Random) -> Case:
    """A line log read with a pattern of named groups declared in a mapping file's
    ``parser:`` section (tracechain's README): a line is an event when the pattern matches
    with non-empty groups and the time reads with the format (here ``%Y-%m-%dT%H:%M:%S``,
    Python's strptime)."""
    out: list[bytes] = []
    events = []
    junk = (b"", b"no match here", b"2024-13-01T00:00:00 job=j1 state=run", b"\xff\xfe job", b"  ",
            b"2024-01-01T00:00:00 job=j1 state=")
    for _ in range(rng.randrange(1, 40)):
        ln = len(out) + 1
        if rng.random() < 0.2:
            out.append(rng.choice(junk))
            continue
        job, st = f"j{rng.randrange(6)}", rng.choice(("queued", "run", "done", "failed", "état"))
        when = f"2024-0{rng.randrange(1, 10)}-1{rng.randrange(10)}T{rng.randrange(24):02d}:00:00"
        tail = rng.choice(("", " extra=1", " msg=\"a b\""))
        out.append(f"{when} job={job} state={st}{tail}".encode())
        events.append((job, st, ln))
    # the settings come from a mapping file's parser section, as on the command line
    from tracechain.shape.mapping import parse_mapping

    mapping = parse_mapping(f"parser:\n  pattern: {_yq(_REGEX)}\n  time_format: '%Y-%m-%dT%H:%M:%S'\n", "mapping.yaml")
    return Case(b"\n".join(out) + b"\n", dict(mapping.parser), sorted(events), name="app.log")


def gen_parquet(rng: random.Random) -> Case:
    """Apache Parquet (written by pyarrow, a general-purpose library): a row is an event
    when its session and event columns are non-null, non-empty text."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    n = rng.randrange(1, 60)
    sess, evs, ts, events = [], [], [], []
    for i in range(n):
        s = rng.choice((_sid(rng), None, ""))
        e = rng.choice(_STATES + (None, ""))
        sess.append(s)
        evs.append(e)
        ts.append(1_700_000_000 + i)
        if s and e:
            events.append((s, e, i + 1))
    table = pa.table({"session_id": pa.array(sess, pa.string()), "ts": pa.array(ts, pa.int64()),
                      "event": pa.array(evs, pa.string())})
    buf = io.BytesIO()
    pq.write_table(table, buf, row_group_size=rng.choice((7, 64, 1000)))
    return Case(buf.getvalue(), {}, sorted(events), name="log.parquet")


# ---------------------------------------------------------------------------------
# mutations of bytes
# ---------------------------------------------------------------------------------
def _flip(d: bytes, rng: random.Random) -> bytes:
    if not d:
        return b"\x00"
    b = bytearray(d)
    for _ in range(rng.randrange(1, 4)):
        i = rng.randrange(len(b))
        b[i] ^= 1 << rng.randrange(8)
    return bytes(b)


def _truncate(d: bytes, rng: random.Random) -> bytes:
    return d[: rng.randrange(len(d) + 1)]


def _line_at(d: bytes, rng: random.Random, piece: bytes) -> bytes:
    lines = d.split(b"\n")
    i = rng.randrange(len(lines) + 1)
    return b"\n".join(lines[:i] + [piece] + lines[i:])


def _junk_line(d: bytes, rng: random.Random) -> bytes:
    piece = bytes(rng.randrange(256) for _ in range(rng.randrange(0, 40)))
    return _line_at(d, rng, piece.replace(b"\n", b" "))


def _invalid_utf8(d: bytes, rng: random.Random) -> bytes:
    seq = rng.choice((b"\xff", b"\xc3", b"\xed\xa0\x80", b"\xf8\x88\x80\x80\x80", b"\xe2\x82", b"\xc0\xaf"))
    if not d:
        return seq
    i = rng.randrange(len(d) + 1)
    return d[:i] + seq + d[i:]


def _control(d: bytes, rng: random.Random) -> bytes:
    c = bytes([rng.choice((0, 1, 7, 8, 11, 12, 13, 27, 127))])
    i = rng.randrange(len(d) + 1)
    return d[:i] + c * rng.randrange(1, 4) + d[i:]


def _huge_number(d: bytes, rng: random.Random) -> bytes:
    big = rng.choice((b"1e999", b"-1e999", b"9" * 5000, b"18446744073709551616", b"NaN", b"Infinity",
                      b"1" + b"0" * 400, b"-0"))
    digits = [i for i, c in enumerate(d) if 48 <= c <= 57]
    if not digits:
        return _line_at(d, rng, big)
    i = rng.choice(digits)
    j = i
    while j < len(d) and 48 <= d[j] <= 57:
        j += 1
    return d[:i] + big + d[j:]


def _deep(d: bytes, rng: random.Random) -> bytes:
    depth = rng.choice((100, 1000, 3000))
    kind = rng.choice(("json-array", "json-object", "xml", "yaml"))
    if kind == "json-array":
        piece = b"[" * depth + b"]" * depth
    elif kind == "json-object":
        piece = b'{"a":' * depth + b"1" + b"}" * depth
    elif kind == "xml":
        piece = b"<a>" * depth + b"</a>" * depth
    else:
        piece = b"- " * depth + b"x"
    if rng.random() < 0.5 and b'"session_id": ' in d:
        return d.replace(b'"session_id": ', b'"session_id": ' + piece + b", \"s2\": ", 1)
    return _line_at(d, rng, piece)


def _crlf(d: bytes, rng: random.Random) -> bytes:
    return d.replace(b"\n", b"\r\n")


def _bom(d: bytes, rng: random.Random) -> bytes:
    return b"\xef\xbb\xbf" + d


def _surrogate(d: bytes, rng: random.Random) -> bytes:
    """A lone surrogate escape (valid JSON syntax, no UTF-8 text) at the start of a JSON string."""
    at = [i for i in range(len(d) - 1) if d[i:i + 2] == b': "']
    if not at:
        return _line_at(d, rng, b'"\\ud800"')
    i = rng.choice(at) + 3
    return d[:i] + rng.choice((b"\\ud800", b"\\udfff", b"\\u0000")) + d[i:]


def _long_line(d: bytes, rng: random.Random) -> bytes:
    return _line_at(d, rng, b"x" * rng.choice((5000, 70000)))


MUTATIONS: dict[str, Callable[[bytes, random.Random], bytes]] = {
    "flip": _flip, "truncate": _truncate, "junk-line": _junk_line, "invalid-utf8": _invalid_utf8,
    "control": _control, "huge-number": _huge_number, "deep": _deep, "crlf": _crlf, "bom": _bom,
    "long-line": _long_line, "surrogate": _surrogate,
}


def compress(data: bytes, how: str) -> bytes:
    if how == "gzip":
        return gzip.compress(data, mtime=0)
    if how == "bz2":
        return bz2.compress(data)
    if how == "xz":
        return lzma.compress(data)
    return data


def mutate(data: bytes, rng: random.Random, k: int | None = None) -> tuple[bytes, list[str]]:
    """``data`` damaged by 1-3 random mutations, then maybe compressed (intact or corrupted)."""
    names = []
    for _ in range(k if k is not None else rng.randrange(1, 4)):
        name = rng.choice(sorted(MUTATIONS))
        data = MUTATIONS[name](data, rng)
        names.append(name)
    r = rng.random()
    if r < 0.25:
        how = rng.choice(("gzip", "bz2", "xz"))
        data = compress(data, how)
        names.append(how)
        if rng.random() < 0.5:
            data = rng.choice((_flip, _truncate))(data, rng)
            names.append("corrupt-" + how)
    return data, names


# ---------------------------------------------------------------------------------
# running a reader
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class Format:
    name: str  # tracechain's format name
    gen: Callable[[random.Random], Case]
    block_key: str | None = "block_bytes"  # the reader setting for block size
    risky: bool = False  # may crash the process in a C library: fuzz in a subprocess


FORMATS: dict[str, Format] = {
    "jsonl": Format("jsonl", gen_jsonl, risky=True),
    "csv": Format("csv", gen_csv),
    "edges": Format("edges", gen_edges, block_key=None),
    "access": Format("access", gen_access),
    "w3c": Format("w3c", gen_w3c),
    "otlp": Format("otlp", gen_otlp),
    "xes": Format("xes", gen_xes),
    "cloudevents": Format("cloudevents", gen_cloudevents),
    "strace": Format("strace", gen_strace),
    "regex": Format("regex", gen_regex),
    "parquet": Format("parquet", gen_parquet, block_key="batch_rows", risky=True),
}


@dataclass
class Outcome:
    """What a reader made of a file: events (sorted), skipped lines by reason, or the error."""

    events: list | None = None
    edges: dict | None = None
    skipped: dict | None = None
    error: str | None = None  # a TracechainError's message
    bug: str | None = None  # any other exception, with its traceback

    def result(self) -> tuple:
        if self.error is not None:
            # a file that stops being readable part-way (a corrupt compressed stream) stops with
            # an error after the blocks before it: the blocks read first, and so the line named
            # and the lines skipped before it, depend on the block size; the refusal does not
            return ("error",)
        return (self.events, self.edges, self.skipped)


def _write(tmpdir: str, name: str, data: bytes) -> str:
    path = os.path.join(tmpdir, name)
    with open(path, "wb") as f:
        f.write(data)
    return path


def run_reader(fmt: str | None, path: str, extra: dict | None = None, strict: bool = False) -> Outcome:
    """Read ``path`` with tracechain's parser ``fmt`` (detected when None), in-process."""
    from tracechain.errors import TracechainError
    from tracechain.events import ParseReport
    from tracechain.ingest.base import ReadOptions
    from tracechain.ingest.registry import detect_parser, get_parser
    from tracechain.ingest.sources import Source

    report = ParseReport()
    options = ReadOptions(strict=strict, extra=dict(extra or {}))
    src = Source(os.path.basename(path), path)
    try:
        parser = get_parser(fmt) if fmt else detect_parser(src)
        if parser.kind == "counts":
            counts = parser.read_counts(src, options, report)
            return Outcome(edges=counts.to_edges(), skipped=dict(sorted(report.skipped.items())))
        events = []
        for chunk in parser.read(src, options, report):
            events.extend(zip(chunk.session.to_pylist(), chunk.event.to_pylist(), chunk.line.tolist()))
        return Outcome(events=sorted(events), skipped=dict(sorted(report.skipped.items())))
    except TracechainError as err:
        return Outcome(error=str(err), skipped=dict(sorted(report.skipped.items())))
    except Exception:
        return Outcome(bug=traceback.format_exc(limit=8))
    except RecursionError:  # pragma: no cover - a subclass of Exception; kept for clarity
        return Outcome(bug=traceback.format_exc(limit=8))


def run_counts(fmt: str | None, path: str, extra: dict | None = None) -> Outcome:
    """The whole read-shape-count path (``count_sources``) on ``path``: only errors matter."""
    from tracechain.errors import TracechainError
    from tracechain.pipeline import count_sources

    try:
        count_sources([path], format=fmt, extra=extra)
        return Outcome()
    except TracechainError as err:
        return Outcome(error=str(err))
    except Exception:
        return Outcome(bug=traceback.format_exc(limit=8))


def check_case(fmt: Format, case: Case, tmpdir: str, blocks=(None,), compressions=("none",)) -> list[str]:
    """Read a generated case with each block size and compression; the wrong results found."""
    wrong = []
    for how in compressions:
        path = _write(tmpdir, case.name + ("" if how == "none" else "." + how), compress(case.data, how))
        for block in blocks:
            extra = dict(case.extra)
            if block is not None and fmt.block_key:
                extra[fmt.block_key] = block
            out = run_reader(fmt.name, path, extra)
            where = f"{fmt.name} block={block} compression={how}"
            if out.bug:
                wrong.append(f"{where}: unhandled exception\n{out.bug}")
                continue
            if out.error:
                wrong.append(f"{where}: refused a readable file: {out.error}")
                continue
            got = out.edges if case.edges is not None else out.events
            want = case.edges if case.edges is not None else case.events
            if case.events is not None and case.events and case.events[0][2] is None:
                got = sorted((s, e, None) for s, e, _ in got)
            if got != want:
                missing = [x for x in want if x not in got][:5] if isinstance(want, list) else want
                extra_ = [x for x in got if x not in want][:5] if isinstance(got, list) else got
                wrong.append(f"{where}: events differ from the oracle; missing {missing}, unexpected {extra_}")
    return wrong


def fuzz_one(fmt: Format, rng: random.Random, tmpdir: str, blocks=(None, 64)) -> tuple[list[str], list[str]]:
    """One mutated input: (unhandled exceptions, wrong results).

    Wrong results here are differences between block sizes (the same bytes must give the
    same events, skips and errors whatever the block size).
    """
    case = fmt.gen(rng)
    data, names = mutate(case.data, rng)
    path = _write(tmpdir, case.name, data)
    bugs, wrong = [], []
    results = []
    for block in blocks:
        extra = dict(case.extra)
        if block is not None and fmt.block_key:
            extra[fmt.block_key] = block
        out = run_reader(fmt.name, path, extra)
        if out.bug:
            bugs.append(f"{fmt.name} {names} block={block}: {out.bug}")
        else:
            results.append((block, out.result()))
        if not fmt.block_key:
            break
    if len({repr(r) for _, r in results}) > 1:
        wrong.append(f"{fmt.name} {names}: the result depends on the block size: "
                     + "; ".join(f"block={b}: {repr(r)[:300]}" for b, r in results))
    if results and not any(n in ("gzip", "bz2", "xz") for n in names):
        # the same damaged bytes compressed must read the same (as the first block size did)
        how = rng.choice(("gzip", "bz2", "xz"))
        zpath = _write(tmpdir, case.name + "." + how, compress(data, how))
        extra = dict(case.extra)
        if results[0][0] is not None and fmt.block_key:
            extra[fmt.block_key] = results[0][0]
        out = run_reader(fmt.name, zpath, extra)
        if out.bug:
            bugs.append(f"{fmt.name} {names} + {how}: {out.bug}")
        elif repr(out.result()) != repr(results[0][1]):
            wrong.append(f"{fmt.name} {names}: compressed with {how} it reads differently: "
                         f"{repr(out.result())[:300]}; plain: {repr(results[0][1])[:300]}")
    # the format's sniff on the damaged head (detection turns a failing sniff into a
    # PluginError, which would hide the bug), then the whole path (errors only)
    bugs += sniff_all(path, only=fmt.name)
    out = run_reader(fmt.name, path, dict(case.extra), strict=True)  # strict mode: the first problem raises
    if out.bug:
        bugs.append(f"{fmt.name} {names} strict: {out.bug}")
    out = run_counts(fmt.name, path, dict(case.extra))
    if out.bug:
        bugs.append(f"count_sources(format={fmt.name}) {names}: {out.bug}")
    return bugs, wrong


def sniff_all(path: str, only: str | None = None) -> list[str]:
    """Tracebacks of the built-in parsers' ``sniff`` (or only the one named) on the first bytes
    of ``path`` (none expected)."""
    from tracechain.errors import TracechainError
    from tracechain.ingest.registry import available_parsers
    from tracechain.ingest.sources import Source, peek

    try:
        head = peek(Source(os.path.basename(path), path))
    except TracechainError:
        return []
    except Exception:
        return [f"peek: {traceback.format_exc(limit=8)}"]
    out = []
    for name, parser in available_parsers().items():
        if only is not None and name != only:
            continue
        try:
            score = float(parser.sniff(head, os.path.basename(path)))
            if not 0.0 <= score <= 1.0:
                out.append(f"sniff of {name}: confidence {score} outside [0, 1]")
        except Exception:
            out.append(f"sniff of {name}: {traceback.format_exc(limit=8)}")
    return out


def detected(path: str) -> tuple[str | None, str | None]:
    """(the format tracechain detects for ``path`` or None, an unhandled exception's traceback)."""
    from tracechain.errors import TracechainError
    from tracechain.ingest.registry import detect_parser
    from tracechain.ingest.sources import Source

    try:
        return detect_parser(Source(os.path.basename(path), path)).name, None
    except TracechainError:
        return None, None
    except Exception:
        return None, traceback.format_exc(limit=8)


# ---------------------------------------------------------------------------------
# the mapping file and the rules file
# ---------------------------------------------------------------------------------
_YAML_TRICKY = ("no", "on", "yes", "1.0", "0123", "2024-01-01", "null", "~", "Home", "état", "[start]",
                "a: b", "#x", "- item", "'q'", "\"dq\"", "{x}", "&anchor", "*alias", "!tag", "%", "@", "`")


def _yq(text: str) -> str:
    """``text`` as a YAML double-quoted scalar (YAML 1.1, section 9.1.4: JSON strings are valid)."""
    return json.dumps(text, ensure_ascii=False)


@dataclass
class ConfigCase:
    """A generated mapping or rules file and what a correct reader must make of it."""

    text: str
    renames: dict = field(default_factory=dict)  # mapping: raw name -> state
    goals: tuple = ()
    rule_ids: tuple = ()  # rules: the ids in order


def gen_mapping(rng: random.Random) -> ConfigCase:
    """A valid mapping file (format in tracechain/shape/mapping.py): every name written
    quoted is the text inside the quotes, whatever YAML 1.1 would make of it plain."""
    renames = {}
    lines = ["version: 1", "rename:"]
    for _ in range(rng.randrange(1, 8)):
        k = rng.choice(_YAML_TRICKY + _PLAIN_STATES) + rng.choice(("", "_x", " 2"))
        v = rng.choice(_YAML_TRICKY + _PLAIN_STATES)
        if k in renames:
            continue
        renames[k] = v
        lines.append(f"  {_yq(k)}: {_yq(v)}")
    lines.append("rules:")
    lines.append("  - regex: " + _yq(r"^search:(\w+)$"))
    lines.append("    state: 'Search {1}'")
    lines.append("  - path: /item/{id}")
    lines.append("    state: Item")
    lines.append("  - regex: '^debug\\.'")
    lines.append("    drop: true")
    goals = tuple(dict.fromkeys(rng.choice(_PLAIN_STATES) for _ in range(rng.randrange(0, 3))))
    if goals:
        lines.append("goals: [" + ", ".join(_yq(g) for g in goals) + "]")
    lines.append(f"unmatched: {rng.choice(('keep', 'drop', 'Other'))}")
    lines.append(f"collapse_repeats: {rng.choice(('true', 'false'))}")
    if rng.random() < 0.3:
        lines.append("parser:")
        lines.append(f"  pattern: {_yq(_REGEX)}")
        lines.append("  time_format: '%Y-%m-%dT%H:%M:%S'")
    return ConfigCase("\n".join(lines) + "\n", renames, goals)


_RULE_SNIPPETS = (
    ("dead-end", "    allow: [Help]"),
    ("goal-reachable", ""),
    ("conversion-floor", "    min: 50%"),
    ("steps-ceiling", "    max: 12"),
    ("trap", ""),
    ("allowed-transitions", "    end_anywhere: true\n    transitions:\n      \"[start]\": [Home]\n      Home: [Pay]"),
    ("new-state", "    severity: warning"),
)


def gen_rules(rng: random.Random) -> ConfigCase:
    """A valid rules file for ``tracechain check`` (format in tracechain/check/config.py)."""
    lines = ["version: 1", "goals: [Pay]", "input:", "  gap: 30m", "  order: 1", "rules:"]
    ids = []
    for k in range(rng.randrange(1, 6)):
        kind, body = rng.choice(_RULE_SNIPPETS)
        rid = f"rule-{k}"
        ids.append(rid)
        lines.append(f"  - kind: {kind}")
        lines.append(f"    id: {rid}")
        if body:
            lines.append(body)
    return ConfigCase("\n".join(lines) + "\n", goals=("Pay",), rule_ids=tuple(ids))


def _yaml_mutation(text: bytes, rng: random.Random) -> bytes:
    r = rng.random()
    if r < 0.15:  # YAML structure: anchors, aliases, tags, flow syntax, deep nesting
        piece = rng.choice((b"&a [*a]", b"*nowhere", b"!!python/object:os.system x", b"!!binary AAAA", b"{{{{",
                            b"[" * 2000 + b"]" * 2000, b"- " * 500 + b"x", b"<<: *a", b"? [a, b]\n: c",
                            b"%YAML 1.1\n---", b"--- |\n  x", b"a: !!int 0x1F", b"a: 1e999",
                            b"a: " + b"9" * 5000, b"\t- tab", b"a: b: c", b"...",
                            b"  - regex: 'a{99999999999}'\n    state: x", b"  - regex: '" + b"(" * 1200 + b")" * 1200 + b"'",
                            b"  - kind: dead-end\n    allow: !!set {a, b}", b"  pattern: '(?P<session>a{4294967296})'"))
        return _line_at(text, rng, piece)
    return mutate(text, rng, k=1)[0] if r < 0.9 else MUTATIONS[rng.choice(sorted(MUTATIONS))](text, rng)


def run_config(kind: str, path: str) -> Outcome:
    """Load a mapping (``kind="mapping"``) or rules file (``"rules"``) with tracechain's loader."""
    from tracechain.errors import TracechainError

    try:
        if kind == "mapping":
            from tracechain.shape.mapping import load_mapping

            m = load_mapping(path)
            return Outcome(events=[("renames", sorted(m.rename.items())), ("goals", list(m.goals))])
        from tracechain.check.config import load_rules

        r = load_rules(path)
        return Outcome(events=[("ids", [rc.id for rc in r.rules]), ("goals", list(r.goals))])
    except TracechainError as err:
        return Outcome(error=str(err))
    except Exception:
        return Outcome(bug=traceback.format_exc(limit=8))


def check_config(kind: str, rng: random.Random, tmpdir: str, damage: bool) -> tuple[list[str], list[str]]:
    """One generated config file, damaged or not: (unhandled exceptions, wrong results)."""
    case = (gen_mapping if kind == "mapping" else gen_rules)(rng)
    data = case.text.encode("utf-8")
    names = []
    if damage:
        data = _yaml_mutation(data, rng)
        names.append("damaged")
    elif rng.random() < 0.3:  # harmless variations: the same file must read the same
        how = rng.choice(("crlf", "bom"))
        data = MUTATIONS[how](data, rng)
        names.append(how)
    path = _write(tmpdir, f"{kind}.yaml", data)
    out = run_config(kind, path)
    if out.bug:
        return [f"{kind} {names}: {out.bug}"], []
    if damage:
        return [], []
    if out.error:
        return [], [f"{kind} {names}: a valid file refused: {out.error}\n{case.text}"]
    if kind == "mapping":
        want = [("renames", sorted(case.renames.items())), ("goals", list(case.goals))]
    else:
        want = [("ids", list(case.rule_ids)), ("goals", list(case.goals))]
    if out.events != want:
        return [], [f"{kind} {names}: read {out.events}, written {want}\n{case.text}"]
    return [], []
