"""The list of stuck cases (``analyze --stuck-cases FILE``), so that an engineer can act on them.

One row per open case: its session key (pseudonymised unless raw keys were asked for), the
state it is stuck in, the time of its last event (ISO 8601, UTC) and its age in seconds at the
reference time (``as_of``), oldest first. A file name ending in ``.json`` gets a JSON document
(with the reference time, the stale limit, how the keys are shown and the data-protection
caution); any other name, or ``-``, gets CSV (RFC 4180 quoting and the same formula-injection
guard as the per-state CSV: :func:`tracechain.report.csv_report.csv_cell`).
"""

from __future__ import annotations

import csv
import io

from .._version import __version__
from ..analyze.stuck import StuckCase
from ..privacy import DATA_PROTECTION_CAUTION, Pseudonymizer
from .csv_report import csv_cell
from .json_report import _iso, dumps

__all__ = ["render_stuck_cases", "STUCK_CASES_COLUMNS"]

STUCK_CASES_COLUMNS = ("case", "state", "last_event", "age_s")


def _age(x: float | None) -> str:
    return "" if x is None else (f"{x:.3f}".rstrip("0").rstrip(".") or "0")


def render_stuck_cases(path: str, cases: list[StuckCase], pseudo: Pseudonymizer, as_of: float | None,
                       stale_after_s: float | None) -> str:
    """The list as CSV, or as JSON when ``path`` ends in ``.json``."""
    if path.lower().endswith(".json"):
        return dumps({
            "tool": {"name": "tracechain", "version": __version__},
            "as_of": _iso(as_of),
            "stale_after_s": stale_after_s,
            "keys": pseudo.mode,
            "privacy": pseudo.statement(),
            "caution": DATA_PROTECTION_CAUTION,
            "cases": [{"case": pseudo(c.key), "state": c.state, "last_event": _iso(c.last_event), "age_s": c.age_s}
                      for c in cases],
        })
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\r\n")
    w.writerow(STUCK_CASES_COLUMNS)
    for c in cases:
        w.writerow([csv_cell(pseudo(c.key)), csv_cell(c.state), _iso(c.last_event) or "", _age(c.age_s)])
    return buf.getvalue()
