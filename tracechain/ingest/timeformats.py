"""Text times read vectorised: ``--time-format`` layouts with fractional seconds and a
zone, and warehouse text times (``2026-04-01 00:00:17.000 UTC``) without a format.

Arrow's ``strptime`` knows no ``%f`` and reads ``%Z`` loosely, so a format made of the
directives below is read here instead: the format becomes the regular expression
Python's ``datetime.strptime`` builds for it (the patterns of CPython's ``_strptime``
module, matched case-insensitively and to the end of the text, a run of whitespace in
the format matching any run of whitespace), matched in one call to Arrow's
``extract_regex``; the fields are then combined with numpy, checked as ``datetime``
checks them (the day within its month, seconds 0 to 59). So a value reads here exactly
as ``datetime.strptime(value, format)`` reads it (``tests/test_logs_as_they_come.py``
compares the two on the same strings), a value without an offset taken as UTC as
everywhere else. Values holding non-ASCII text (where Python's ``\\d`` and ``\\s`` also
match other scripts' digits and spaces) are read one by one with ``datetime.strptime``.
"""

from __future__ import annotations

import re
import time as _time
from datetime import datetime, timezone

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .._arrowutil import to_numpy

__all__ = ["strptime_seconds", "FORMAT_DIRECTIVES", "strip_zone_name", "ZONE_NAME_RE"]


def _zone_names() -> str:
    # as CPython's _strptime (LocaleTime): "utc", "gmt", the local zone's standard name
    # and, where it has daylight saving, its summer name; longest first
    names = {"utc", "gmt", _time.tzname[0].lower()}
    if _time.daylight:
        names.add(_time.tzname[1].lower())
    names.discard("")
    return "|".join(re.escape(n) for n in sorted(names, key=len, reverse=True))


#: The directives read vectorised, with the patterns ``datetime.strptime`` uses for them.
FORMAT_DIRECTIVES = {
    "Y": r"(?P<Y>\d\d\d\d)",
    "y": r"(?P<y>\d\d)",
    "m": r"(?P<m>1[0-2]|0[1-9]|[1-9])",
    "d": r"(?P<d>3[0-1]|[1-2]\d|0[1-9]|[1-9]| [1-9])",
    "H": r"(?P<H>2[0-3]|[0-1]\d|\d)",
    "M": r"(?P<M>[0-5]\d|\d)",
    "S": r"(?P<S>6[0-1]|[0-5]\d|\d)",
    "f": r"(?P<f>[0-9]{1,6})",
    "z": r"(?P<z>[+-]\d\d:?[0-5]\d(?::?[0-5]\d(?:\.\d{1,6})?)?|(?-i:Z))",
    "Z": None,  # (filled in from the local zone's names when used)
    "%": "%",
}

_REGEX_CHARS = re.compile(r"([\\.^$*+?\(\){}\[\]|])")
#: Python's ``\s`` on ASCII text: space, \t \n \v \f \r and the separators \x1c-\x1f
_SPACE = r"[\t\n\x0b\x0c\r\x1c-\x1f ]+"


def _pattern(fmt: str) -> str | None:
    """The regular expression for ``fmt`` (as ``_strptime.TimeRE.pattern`` builds it), or
    None when it uses a directive not read here."""
    fmt = _REGEX_CHARS.sub(r"\\\1", fmt)
    fmt = re.sub(r"\s+", lambda _: "\x00", fmt)
    out = []
    i = 0
    while i < len(fmt):
        c = fmt[i]
        if c == "%":
            if i + 1 >= len(fmt) or fmt[i + 1] not in FORMAT_DIRECTIVES:
                return None
            d = fmt[i + 1]
            if d == "Z":
                out.append(f"(?P<Z>{_zone_names()})")
            elif d == "%":
                out.append("%")
            else:
                if f"(?P<{d}>" in "".join(out):
                    return None  # (Python refuses a directive given twice)
                out.append(FORMAT_DIRECTIVES[d])
            i += 2
        elif c == "\x00":
            out.append(_SPACE)
            i += 1
        elif ord(c) > 127:
            return None
        else:
            out.append(c)
            i += 1
    return "(?i)^" + "".join(out) + "$"


def _days_from_civil(y: np.ndarray, m: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Days since 1970-01-01 of proleptic Gregorian dates (H. Hinnant's algorithm,
    "chrono-Compatible Low-Level Date Algorithms", days_from_civil)."""
    y = y - (m <= 2)
    era = np.floor_divide(y, 400)
    yoe = y - era * 400
    mp = (m + 9) % 12
    doy = (153 * mp + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


_MONTH_DAYS = np.array([0, 31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31], dtype=np.int64)


def _ints(struct: pa.StructArray, name: str, ok: np.ndarray, default: int) -> np.ndarray:
    col = struct.field(name)
    col = pc.if_else(pa.array(ok), col, pa.scalar("0"))
    return to_numpy(pc.cast(pc.utf8_trim_whitespace(col), pa.int64())).astype(np.int64)


def strptime_seconds(arr: pa.Array, fmt: str) -> tuple[np.ndarray, np.ndarray] | None:
    """``arr`` (strings) read with ``fmt`` as seconds since the epoch: (seconds, bad), NaN
    for nulls and unreadable values; None when ``fmt`` uses a directive not read here."""
    pattern = _pattern(fmt)
    if pattern is None:
        return None
    n = len(arr)
    nulls = to_numpy(arr.is_null()) if arr.null_count else np.zeros(n, dtype=bool)
    if n:  # an empty text is no time, as on the one-by-one path: not a bad one
        nulls = nulls | to_numpy(pc.fill_null(pc.equal(pc.utf8_length(arr), 0), False))
    found = pc.extract_regex(arr, pattern)
    ok = ~to_numpy(found.is_null()) if n else np.zeros(0, dtype=bool)
    names = {f.name for f in found.type}
    fields = found.combine_chunks() if isinstance(found, pa.ChunkedArray) else found
    if isinstance(fields, pa.ChunkedArray):  # pragma: no cover
        fields = fields.combine_chunks()

    def get(name: str, default: int) -> np.ndarray:
        if name not in names:
            return np.full(n, default, dtype=np.int64)
        return _ints(fields, name, ok, default)

    if "Y" in names:
        year = get("Y", 1900)
    elif "y" in names:
        yy = get("y", 0)
        year = np.where(yy <= 68, yy + 2000, yy + 1900)  # (as Python: 69-99 are the 1900s)
    else:
        year = np.full(n, 1900, dtype=np.int64)
    month, day = get("m", 1), get("d", 1)
    hour, minute, second = get("H", 0), get("M", 0), get("S", 0)
    micro = np.zeros(n, dtype=np.int64)
    if "f" in names:
        frac = pc.if_else(pa.array(ok), fields.field("f"), pa.scalar("0"))
        padded = pc.utf8_rpad(frac, width=6, padding="0")
        micro = to_numpy(pc.cast(padded, pa.int64())).astype(np.int64)
    offset_us = np.zeros(n, dtype=np.int64)
    if "z" in names:
        zs = fields.field("z").to_pylist()  # (distinct offsets are few; read each once)
        cache: dict[str | None, int | None] = {}
        for i in np.flatnonzero(ok):
            z = zs[i]
            if z not in cache:
                cache[z] = _offset_us(z)
            if cache[z] is None:
                ok[i] = False
            else:
                offset_us[i] = cache[z]
    leap = ((year % 4 == 0) & (year % 100 != 0)) | (year % 400 == 0)
    mdays = _MONTH_DAYS[np.clip(month, 0, 12)] + ((month == 2) & leap)
    ok &= (year >= 1) & (day <= mdays) & (second <= 59)  # (datetime refuses a leap second)
    days = _days_from_civil(year, month, day)
    us = ((days * 86400 + hour * 3600 + minute * 60 + second) * 1_000_000 + micro) - offset_us
    secs = us / 1e6  # (correctly rounded, as Python's int / int, while us is exact in a double)
    for i in np.flatnonzero(np.abs(us) >= 2**53):  # beyond the year 2255: as Python divides
        secs[i] = int(us[i]) / 10**6
    secs[~ok] = np.nan
    bad = ~ok & ~nulls
    if bad.any():
        # non-ASCII text: Python's \d and \s match more than ASCII; ask Python itself
        ascii_ = pc.fill_null(pc.string_is_ascii(arr), True)
        for i in np.flatnonzero(bad & ~to_numpy(ascii_)):
            try:
                dt = datetime.strptime(arr[int(i)].as_py(), fmt)
            except (ValueError, OverflowError):
                continue
            if dt.tzinfo is None:
                dt = dt.replace(tzinfo=timezone.utc)
            secs[i] = dt.timestamp()
            bad[i] = False
    return secs, bad


def _offset_us(z: str | None) -> int | None:
    """A %z text as microseconds east of UTC, as ``datetime.strptime`` reads it (None:
    refused, as Python refuses ``+01:0030`` or an offset of 24 hours or more)."""
    if z is None:
        return None
    if z in ("Z", "z"):
        return 0 if z == "Z" else None
    if z[3] == ":":
        z = z[:3] + z[4:]
        if len(z) > 5:
            if z[5] != ":":
                return None
            z = z[:5] + z[6:]
    try:  # ("+0130:00" passes the pattern; Python's int(":0") then refuses it)
        hours, minutes, seconds = int(z[1:3]), int(z[3:5]), int(z[5:7] or 0)
        rest = z[8:]
        micro = int(rest + "0" * (6 - len(rest))) if rest else 0
    except ValueError:
        return None
    total = ((hours * 60 + minutes) * 60 + seconds) * 1_000_000 + micro
    if total >= 86400 * 1_000_000:
        return None
    return -total if z.startswith("-") else total


#: A trailing zone name on a warehouse text time: `` UTC``, `` GMT`` or `` Z`` (with or
#: without the space), read as an offset of zero.
ZONE_NAME_RE = r"(?i)(?:\s*(?:UTC|GMT)|\s+Z)$"


def strip_zone_name(arr: pa.Array) -> pa.Array | None:
    """``arr`` without a trailing zone name of UTC, or None when no value has one."""
    has = pc.match_substring_regex(arr, ZONE_NAME_RE)
    if not pc.any(has).as_py():
        return None
    return pc.replace_substring_regex(arr, ZONE_NAME_RE, "")
