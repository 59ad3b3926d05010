"""``tracechain steps``: ordered steps (a funnel) through the shaped sessions (see :mod:`.steps`)."""

from __future__ import annotations

import argparse
import sys

from ..errors import UsageError

__all__ = ["register", "cmd_steps", "steps_lines"]

HELP_MODEL = ("model: in the first-order chain fitted to the same sessions, the probability that a walk started in "
              "the step before enters this step before it ends (or enters another goal or terminal state); with "
              "--strict-order, before it enters any other state; first row: from the start")


def register(subparsers, _add_input_options) -> None:
    """Add ``steps``; ``_add_input_options`` is the command line's shared input options."""
    from ..options import add_level_option, add_steps_options

    p = subparsers.add_parser(
        "steps", help="ordered steps (a funnel): sessions reaching each step in order, drop-off, times, model",
        description="Count the sessions that reach each named step in order (a funnel), the drop-off between "
                    "consecutive steps with an interval, the median and 90th-percentile time between them, and "
                    "beside each observed share the fitted chain's prediction. " + HELP_MODEL + ".")
    _add_input_options(p)
    add_steps_options(p, required=True)
    add_level_option(p)
    out = p.add_argument_group("outputs (the text is printed unless one of them is '-')")
    out.add_argument("--json", metavar="FILE",
                     help="write the steps as JSON (schema tracechain/schemas/steps-1.schema.json; '-' for standard "
                          "output)")
    out.add_argument("--csv", metavar="FILE", help="write one row per step as CSV ('-' for standard output)")
    for fmt in ("svg", "png", "pdf"):
        out.add_argument(f"--{fmt}", metavar="FILE",
                         help=f"also draw the steps as bars in {fmt.upper()} (needs the charts extra, matplotlib)")
    p.set_defaults(handler=cmd_steps)


def _p(x) -> str:
    return "n/a" if x is None else f"{100 * x:.1f}%"


def _t(x) -> str:
    from ..report.text import safe_text  # noqa: F401

    if x is None:
        return "-"
    if x < 120:
        return f"{x:.0f}s"
    if x < 7200:
        return f"{x / 60:.1f}m"
    return f"{x / 3600:.1f}h"


def steps_lines(res) -> list[str]:
    from ..report.text import safe_text
    from .commands import _table

    pct = f"{100 * res.level:g}%"
    head = (f"tracechain steps: {res.sessions:,} sessions; "
            + ("strict order (no other state between steps)" if res.strict else "other states allowed between steps")
            + (f"; within {res.within_s:g}s of the first step" if res.within_s is not None else ""))
    rows = []
    for i, r in enumerate(res.rows):
        drop = None if r.share is None else 1 - r.share
        di = "" if r.share_low is None else f"[{_p(1 - r.share_high)}, {_p(1 - r.share_low)}]"
        rows.append([safe_text(r.step, 60), f"{r.reached:,}", _p(r.share), _p(r.model),
                     "" if i == 0 else _p(drop), "" if i == 0 else di,
                     "" if r.time is None else _t(r.time.median_s), "" if r.time is None else _t(r.time.p90_s)])
    lines = [head, ""]
    lines += _table(["step", "sessions", "observed", "model", "drop-off", f"{pct} interval", "median", "p90"], rows)
    lines.append("")
    lines.append("observed: share of the sessions at the step before (first row: of all sessions)")
    lines.append(HELP_MODEL)
    lines.append(f"interval: Jeffreys (Beta posterior); times: from the step before, percentiles by numpy's "
                 f"{res.quantile_method!r} method")
    for n in res.notes:
        lines.append(f"note: {safe_text(n, 400)}")
    return lines


def cmd_steps(args: argparse.Namespace) -> int:
    from ..options import steps_from_args

    res = steps_from_args(args, "tracechain steps")
    from ..files import write_output
    from ..report.steps_report import render_steps_csv, render_steps_json

    if args.json:
        write_output(args.json, render_steps_json(res))
    if args.csv:
        write_output(args.csv, render_steps_csv(res))
    if "-" not in (args.json, args.csv, args.svg, args.png, args.pdf):  # what goes to standard output is alone there
        sys.stdout.write("\n".join(steps_lines(res)) + "\n")
    _write_chart(res, args)
    return 0


def _write_chart(res, args: argparse.Namespace) -> None:
    """The steps chart to each of ``--svg``/``--png``/``--pdf`` that is given."""
    wanted = {fmt: getattr(args, fmt) for fmt in ("svg", "png", "pdf") if getattr(args, fmt, None)}
    if not wanted:
        return
    from ..report.charts import available, missing_reason, steps_chart
    from ..report.writer import write_output

    if not available():
        raise UsageError(f"--{next(iter(wanted))}: {missing_reason()}")
    chart = steps_chart(res)
    for fmt, path in wanted.items():
        written = write_output(path, chart.render(fmt))
        if written != "-":
            print(f"wrote {written}", file=sys.stderr)
