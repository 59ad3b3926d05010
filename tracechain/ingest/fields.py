"""Field names and times shared by the tabular parsers (JSON Lines, CSV).

Field detection looks for common names (case-insensitive) when the user names none.
A field of a nested JSON object is named by its dotted path (``context.page.path``); see
:func:`lookup_path` for the rule that also reaches keys which themselves hold a dot.
Times become float seconds since the Unix epoch: Arrow timestamps, ISO 8601 strings
(a string without an offset is taken as UTC; a trailing zone name `` UTC``, `` GMT`` or
`` Z``, as data warehouses write text times, means an offset of zero) and epoch numbers, whose unit (s, ms,
µs, ns) is read off their magnitude unless the user states it.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import datetime, timezone

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..durations import iso_datetime
from ..errors import FieldError
from .._arrowutil import to_numpy
from .timeformats import ZONE_NAME_RE, strip_zone_name, strptime_seconds

__all__ = ["FieldSpec", "resolve_fields", "times_to_seconds", "lookup_path", "nested_leaves", "PathGap",
           "SESSION_NAMES", "TIME_NAMES", "EVENT_NAMES"]

# (anonymous ids come before user ids: a clickstream export sets the anonymous id on every
# event and the user id only once someone signs in, so the user id would skip the rest;
# common practice, no source)
SESSION_NAMES = (
    "session_id", "sessionid", "session", "sid", "case_id", "caseid", "case", "visit_id",
    "visitor_id", "anonymous_id", "anonymousid", "user_id", "userid", "user", "trace_id", "traceid",
    "job_id", "ticket_id", "order_id",
)
# (when the event happened before when it was received or sent: common practice, no source)
TIME_NAMES = (
    "timestamp", "@timestamp", "time", "ts", "event_time", "eventtime", "event_timestamp", "occurred_at",
    "datetime", "date", "created_at", "changed_at", "updated_at", "received_at", "receivedat", "sent_at",
    "at",
)
EVENT_NAMES = (
    "event", "event_name", "eventname", "event_type", "action", "activity", "state", "status",
    "page", "path", "url", "name", "type",
)

_UNITS = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "ns": 1e-9}


@dataclass(frozen=True)
class FieldSpec:
    """Which fields hold the session key, the time and the event name.

    ``None`` means: detect from common names. ``time=""`` means the data has no time.
    """

    session: str | None = None
    time: str | None = None
    event: str | None = None
    time_unit: str | None = None
    time_format: str | None = None


def _pick(candidates: tuple[str, ...], columns: list[str], nested: frozenset = frozenset()) -> str | None:
    # the preference order decides between names; between spellings of one name (case
    # aside), the first in ``columns`` (the order fields are first seen) wins, never the last.
    # Top-level names come first; only when none is a candidate, a nested field (a dotted
    # path in ``nested``) is taken by its last part: ``context.session_id`` as a session
    lower: dict[str, str] = {}
    last: dict[str, str] = {}
    for c in columns:
        if c in nested:
            last.setdefault(c.rsplit(".", 1)[-1].lower(), c)
        else:
            lower.setdefault(c.lower(), c)
    for table in (lower, last):
        for name in candidates:
            if name in table:
                return table[name]
    return None


def resolve_fields(spec: FieldSpec, columns: list[str], source: str,
                   nested: frozenset = frozenset()) -> tuple[str, str | None, str]:
    """Return the actual (session, time, event) column names, or raise FieldError.

    ``nested`` names the entries of ``columns`` that are dotted paths into nested objects
    (JSON Lines): a field named by the user may be one; detection takes one only by its
    last part, when no top-level name is a candidate."""
    shown = ", ".join(repr(c) for c in columns) or "none"

    def need(value: str | None, candidates: tuple[str, ...], role: str, option: str) -> str:
        if value is not None:
            if value not in columns:
                raise FieldError(
                    f"the {role} field {value!r} (from {option}) is not in the data; fields found: {shown}",
                    source,
                )
            return value
        found = _pick(candidates, columns, nested)
        if found is None:
            raise FieldError(
                f"no {role} field found (looked for {', '.join(candidates[:6])}, ...); "
                f"name it with {option}; fields found: {shown}",
                source,
            )
        return found

    session = need(spec.session, SESSION_NAMES, "session", "--session-field")
    event = need(spec.event, tuple(n for n in EVENT_NAMES if n != session), "event", "--event-field")
    if spec.time == "":
        time = None
    elif spec.time is not None:
        time = need(spec.time, TIME_NAMES, "time", "--time-field")
    else:
        time = _pick(tuple(n for n in TIME_NAMES if n not in (session, event)), columns, nested)
    if session == event:
        raise FieldError(f"the session and event fields are both {session!r}", source)
    return session, time, event


class PathGap:
    """Why a dotted field name picks nothing out of a JSON object: the path passes through
    an array (``array``) or an object on the way is missing, null or a plain value."""

    __slots__ = ("array", "text")

    def __init__(self, array: bool, text: str):
        self.array, self.text = array, text


def lookup_path(obj: dict, name: str) -> tuple[object, PathGap | None]:
    """The value the field ``name`` names in a parsed JSON object, or why there is none.

    The rule: the whole name is looked up as a key first (``{"a.b": 1}`` answers ``a.b``);
    if no key has it, the longest leading part of the name, cut at a dot, that is a key is
    taken and the rest is looked up the same way in its value, which must be an object. So
    a key that itself holds a dot is always reachable: ``labels.test.case`` finds
    ``{"labels": {"test.case": 1}}``. A name no leading part of which is a key gives
    ``(None, None)`` (the field is missing, as a plain key would be); so does a missing
    last key or a null. An array on the way, or a missing, null or plain value where an
    object is needed below the top level, gives a :class:`PathGap`."""
    node, rest, at = obj, name, ""
    while True:
        if rest in node:
            return node[rest], None
        parts = rest.split(".")
        for i in range(len(parts) - 1, 0, -1):
            head = ".".join(parts[:i])
            if head in node:
                break
        else:
            return None, (PathGap(False, f"{at!r} has no {rest!r}") if at else None)
        at = f"{at}.{head}" if at else head
        rest = ".".join(parts[i:])
        node = node[head]
        if isinstance(node, list):
            return None, PathGap(True, f"an array at {at!r}")
        if not isinstance(node, dict):
            what = "null" if node is None else "not an object"
            return None, PathGap(False, f"{at!r} is {what}")


#: Nested objects are searched for field names this many levels deep at most, and at most
#: this many nested fields are kept (an object keyed by ids would otherwise add fields
#: without end; the ones kept are the first seen).
NESTED_DEPTH = 8
NESTED_FIELDS = 2000


def nested_leaves(obj: dict, out: dict, prefix: str = "", depth: int = 1) -> None:
    """Add to ``out`` the dotted path of every plain value (not an object, not an array)
    in the objects nested in ``obj``, in the order they come; top-level keys are not added."""
    for k, v in obj.items():
        if len(out) >= NESTED_FIELDS:
            return
        if isinstance(v, dict):
            if depth <= NESTED_DEPTH:
                nested_leaves(v, out, f"{prefix}{k}.", depth + 1)
        elif prefix and not isinstance(v, list) and (path := prefix + k) not in out:
            out[path] = None


_SCALE_SAMPLE = 4096


def _epoch_scale(values: np.ndarray, unit: str | None) -> float:
    if unit is not None:
        return _UNITS[unit]
    finite = np.zeros(0)
    if len(values) > 2 * _SCALE_SAMPLE:
        # the units are orders of magnitude apart, so the median of evenly spaced values
        # tells them apart as well as the median of all (which costs a pass with a copy)
        sample = values[:: len(values) // _SCALE_SAMPLE]
        finite = np.abs(sample[np.isfinite(sample)])
    if finite.size == 0:
        finite = np.abs(values[np.isfinite(values)])
    if finite.size == 0:
        return 1.0
    m = float(np.median(finite))
    if m > 1e17:
        return 1e-9
    if m > 1e14:
        return 1e-6
    if m > 1e11:
        return 1e-3
    return 1.0


_ZONE_NAME = re.compile(ZONE_NAME_RE)


def _parse_iso(text: str) -> float:
    dt = iso_datetime(_ZONE_NAME.sub("", text.strip()))
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    return dt.timestamp()


_NUMBER_PROBE = 16  # values cast to numbers first, before a whole text column is


def times_to_seconds(arr: pa.Array | pa.ChunkedArray, spec: FieldSpec) -> tuple[np.ndarray, np.ndarray]:
    """Convert a time column to float seconds; return (seconds, bad) where ``bad``
    marks non-null values that could not be read. Nulls become NaN and are not bad."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    n = len(arr)
    typ = arr.type
    if pa.types.is_null(typ):
        return np.full(n, np.nan), np.zeros(n, dtype=bool)
    if pa.types.is_timestamp(typ):
        ints = to_numpy(pc.cast(arr, pa.int64()))
        secs = ints.astype(np.float64) * {"s": 1.0, "ms": 1e-3, "us": 1e-6, "ns": 1e-9}[typ.unit]
        nulls = to_numpy(arr.is_null())
        secs[nulls] = np.nan
        return secs, np.zeros(n, dtype=bool)
    if pa.types.is_integer(typ) or pa.types.is_floating(typ):
        if arr.null_count:
            # (unsafe: nanoseconds since 1970 need more than the 53 bits a double keeps exactly)
            vals = to_numpy(pc.cast(arr, pa.float64(), safe=False)).astype(np.float64, copy=True)
        else:  # (one pass from the buffer; astype copies)
            vals = to_numpy(arr).astype(np.float64)
        return _numeric_times(vals, arr, spec)
    if pa.types.is_boolean(typ):
        return np.full(n, np.nan), ~arr.is_null().to_numpy(zero_copy_only=False)
    # strings (or anything else, as text)
    try:
        arr = pc.cast(arr, pa.string())
    except pa.ArrowInvalid:  # bytes that are not UTF-8 (CSV hands them on as binary): read one by one
        return _times_one_by_one(arr, spec, n)
    nulls = arr.is_null().to_numpy(zero_copy_only=False)
    if spec.time_format:
        read = strptime_seconds(arr, spec.time_format)  # (%f and zones; as datetime.strptime)
        if read is not None:
            return read
        try:
            ts = pc.strptime(arr, format=spec.time_format, unit="us", error_is_null=True)
            out, _ = times_to_seconds(ts, spec)
            bad = np.isnan(out) & ~nulls
            return out, bad
        except pa.ArrowInvalid:
            pass
    else:
        try:
            # A cast of the first values decides cheaply: if one of them is no number, the
            # cast of the whole column fails too, but only after parsing every value (ISO
            # text times). Same results either way; epoch numbers as text still go through.
            if len(arr) > _NUMBER_PROBE:
                pc.cast(arr.slice(0, _NUMBER_PROBE), pa.float64())
            num = pc.cast(arr, pa.float64())
            vals = num.to_numpy(zero_copy_only=False).astype(np.float64, copy=True)
            return _numeric_times(vals, num, spec)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            pass
        try:
            ts = pc.cast(arr, pa.timestamp("us", tz="UTC"))
            return times_to_seconds(ts, spec)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            pass
        try:  # ISO 8601 without an offset, all of them: taken as UTC (as below, one by one)
            ts = pc.cast(arr, pa.timestamp("us"))
            return times_to_seconds(ts, spec)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            pass
        plain = strip_zone_name(arr)  # warehouse text: "2026-04-01 00:00:17.000 UTC"
        if plain is not None:
            try:
                return times_to_seconds(pc.cast(plain, pa.timestamp("us")), spec)
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                pass
    return _times_one_by_one(arr, spec, n)


def _numeric_times(vals: np.ndarray, arr: pa.Array, spec: FieldSpec) -> tuple[np.ndarray, np.ndarray]:
    """Epoch numbers as seconds; a value that is not finite (NaN, or an infinity such as
    ``1e999`` or a number of thousands of digits overflows to) is no time: bad, as on the
    one-by-one path, so that a value reads the same whatever the other values of its
    column. Nulls stay NaN and are not bad."""
    finite = np.isfinite(vals)
    if finite.all():
        vals *= _epoch_scale(vals, spec.time_unit)
        return vals, np.zeros(len(vals), dtype=bool)
    bad = ~finite
    if arr.null_count:
        bad &= ~to_numpy(arr.is_null())
    vals[~finite] = np.nan
    vals *= _epoch_scale(vals, spec.time_unit)
    return vals, bad


def _times_one_by_one(arr: pa.Array, spec: FieldSpec, n: int) -> tuple[np.ndarray, np.ndarray]:
    """The slow path: element by element, marking what cannot be read."""
    out = np.full(n, np.nan)
    bad = np.zeros(n, dtype=bool)
    numeric = np.zeros(n, dtype=bool)  # epoch numbers, scaled together below
    fmt = spec.time_format
    # read as bytes: a reader may hand on text that is not valid UTF-8, which is then an
    # unreadable time for that line, not a decoding error for the whole file
    for i, raw in enumerate(arr.cast(pa.binary()).to_pylist()):
        v = None if raw is None else raw.decode("utf-8", "replace")
        if v is None or v == "":
            continue
        try:
            if fmt:
                dt = datetime.strptime(v, fmt)
                if dt.tzinfo is None:
                    dt = dt.replace(tzinfo=timezone.utc)
                out[i] = dt.timestamp()
            else:
                try:
                    out[i] = float(v)
                    numeric[i] = True
                except ValueError:
                    out[i] = _parse_iso(v)
        except (ValueError, OverflowError):
            bad[i] = True
    if numeric.any():
        # the same unit rule as a wholly numeric column: a column of epoch milliseconds
        # with one unreadable value must not be read as seconds
        vals = out[numeric]
        finite = np.isfinite(vals)
        bad[np.flatnonzero(numeric)[~finite]] = True  # "nan", "inf" are no times
        vals[~finite] = np.nan
        out[numeric] = vals * _epoch_scale(vals, spec.time_unit)
    return out, bad
