"""Command-line subcommands of the extended analyses: ``order``, ``simulate`` and ``whatif``.

:func:`register` adds them to the ``tracechain`` parser's subparsers; each handler returns an
exit status and raises :class:`~tracechain.errors.TracechainError` for user mistakes, which
``tracechain.cli.main`` turns into one line on stderr. The shared input options and
``build_chain`` come from :mod:`tracechain.options`, below this module and the command line.
"""

from __future__ import annotations

import argparse
import sys

from ..errors import AnalysisError, UsageError
# moved to tracechain/options.py (shared by every command); the names stay here
from ..options import _level, add_interval_options, add_level_option, interval_method, sessions_from_args  # noqa: F401

__all__ = ["register", "cmd_order", "cmd_simulate", "cmd_whatif"]


def _table(headers: list[str], rows: list[list[str]]) -> list[str]:
    widths = [max([len(h)] + [len(r[i]) for r in rows]) for i, h in enumerate(headers)]

    def fmt(cells):
        return "  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    return ["  " + fmt(headers), "  " + "  ".join("-" * w for w in widths)] + ["  " + fmt(r) for r in rows]


class _Edit(argparse.Action):
    """Collects the edits in command-line order as (kind, text)."""

    def __call__(self, parser, namespace, values, option_string=None):
        edits = list(getattr(namespace, self.dest, None) or [])
        edits.append((self.const, values))
        setattr(namespace, self.dest, edits)


def _p(p: float) -> str:
    return "<1e-16" if p < 1e-16 else f"{p:.3g}"


def _positive_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
    if v < 0:
        raise argparse.ArgumentTypeError("must be at least 0")
    return v


def _iso_time(text: str) -> float:
    from .compare import parse_time

    try:
        return parse_time(text)
    except UsageError as err:
        raise argparse.ArgumentTypeError(str(err)) from None


def register(subparsers) -> None:
    """Add ``order``, ``simulate`` and ``whatif`` to the ``tracechain`` subparsers action."""
    from ..options import _add_input_options
    from ..options import MAX_DRAWS, MAX_SESSIONS, _seed, whole_number
    from .._limits import MAX_ORDER

    o = subparsers.add_parser(
        "order", help="which chain order the sessions support (likelihood-ratio tests, AIC, BIC)",
        description="Fit chains of order 0..K to the sessions and compare them: log-likelihood, free parameters, "
                    "AIC, BIC, and the likelihood-ratio test of each order against the next.")
    _add_input_options(o)
    o.add_argument("--max-order", type=whole_number(0, MAX_ORDER), default=3, metavar="K",
                   help=f"highest order fitted (default 3, at most {MAX_ORDER})")
    o.add_argument("--level", type=_level, default=0.05, metavar="ALPHA", help="significance level of the tests (default 0.05)")
    o.add_argument("--condition", action="store_true",
                   help="condition on the first K events of each session instead of using partial windows")
    o.add_argument("--no-end", action="store_true",
                   help="the textbook Anderson-Goodman form: the end of a session is not predicted as a symbol "
                        "(default: the chain-with-end form, where ending is one more outcome, as in tracechain's "
                        "chains)")
    o.add_argument("--json", metavar="FILE", help="write the table and the recommendation as JSON ('-' for stdout)")
    o.add_argument("--split-at", metavar="TIME", type=_iso_time,
                   help="also test within each period: sessions starting before TIME (ISO 8601) and the rest; "
                        "heterogeneity between periods mimics memory")
    o.set_defaults(handler=cmd_order)

    s = subparsers.add_parser(
        "simulate", help="draw synthetic sessions from the chain fitted to event logs (JSON Lines)",
        description="Fit the chain to event logs and draw synthetic sessions from it, written as JSON Lines "
                    "(session_id, timestamp, event).")
    _add_input_options(s)
    for action in s._actions:  # the traces are named with --from; positional paths are accepted too
        if action.dest == "paths":
            action.nargs = "*"
            action.help = "event logs (same as --from)"
    s.add_argument("--from", dest="from_paths", nargs="+", default=[], metavar="PATH", help="event logs to fit")
    s.add_argument("-n", "--sessions", dest="n", type=whole_number(0, MAX_SESSIONS), default=1000,
                   metavar="N", help=f"sessions to draw (default 1000, at most {MAX_SESSIONS:,}: held in memory)")
    s.add_argument("--seed", type=_seed, default=0, help="random seed (default 0)")
    s.add_argument("--max-steps", type=_positive_int, default=1000, metavar="N", help="events per session at most")
    s.add_argument("-o", "--output", required=True, metavar="FILE", help="JSON Lines file to write ('-' for stdout)")
    s.set_defaults(handler=cmd_simulate)

    w = subparsers.add_parser(
        "whatif", help="predict conversion and expected steps after editing the chain",
        description="Edit the fitted chain and predict the change in conversion and expected steps, with "
                    "Dirichlet-posterior intervals. Edits apply in the order given.")
    _add_input_options(w)
    e = w.add_argument_group("edits (at least one; repeatable)")
    e.add_argument("--remove-state", dest="edits", action=_Edit, const="remove-state", metavar="S",
                   help="take S out: its in-flow goes to the end")
    e.add_argument("--redirect", dest="edits", action=_Edit, const="redirect", metavar="A=B",
                   help="every exit of A leads to B")
    e.add_argument("--remove-edge", dest="edits", action=_Edit, const="remove-edge", metavar="A,B",
                   help="remove the transition A → B (A's other exits are renormalised)")
    e.add_argument("--fix-dead-end", dest="edits", action=_Edit, const="fix-dead-end", metavar="S=TARGET:SHARE",
                   help="route SHARE (0-1 or a percentage) of S's exits to TARGET")
    w.add_argument("--draws", type=whole_number(0, MAX_DRAWS), default=200, metavar="N",
                   help=f"posterior draws (default 200; 0: no intervals; at most {MAX_DRAWS:,})")
    w.add_argument("--seed", type=_seed, default=0, help="random seed (default 0)")
    add_level_option(w)
    w.add_argument("--prior", type=float, default=0.5, help="Dirichlet prior per cell (default 0.5, Jeffreys)")
    w.set_defaults(handler=cmd_whatif, edits=None)


# -- handlers -----------------------------------------------------------------------------
def cmd_order(args: argparse.Namespace) -> int:
    from ..options import native_only, progress_from_args, shape_from_args
    from ..ingest.base import ReadOptions
    from ..pipeline import read_events
    from ..report.text import safe_text
    from .order import order_table, session_sequences

    native_only(args, "tracechain order")
    shape, fields, goals, _ = shape_from_args(args)
    options = ReadOptions(fields=fields, strict=args.strict)
    sessions = session_sequences(read_events(args.paths, format=args.format, options=options,
                                             progress=progress_from_args(args), filters=shape.filters), shape)
    if not len(sessions):
        raise UsageError("no sessions in the input")
    K = args.max_order
    kw = dict(start="condition" if args.condition else "partial", include_end=not args.no_end, goals=tuple(goals),
              level=args.level)
    table = order_table(sessions, K, **kw)
    periods = []
    if args.split_at is not None:
        import math

        from .order import Sessions

        first = [float(t[0]) if len(t) else math.nan for t in sessions.times]
        if all(math.isnan(x) for x in first):
            raise UsageError("--split-at needs times, and no session has one (name the time field with --time-field)")
        for name, pick in (("before", lambda x: x < args.split_at), ("from", lambda x: x >= args.split_at)):
            idx = [i for i, x in enumerate(first) if not math.isnan(x) and pick(x)]
            sub = Sessions(tuple(sessions.sequences[i] for i in idx), tuple(sessions.times[i] for i in idx),
                           tuple(sessions.keys[i] for i in idx), sessions.goals)
            try:
                periods.append((name, order_table(sub, K, **kw) if len(sub) else None, len(sub)))
            except AnalysisError:
                periods.append((name, None, len(sub)))
    if args.json:
        from ..report.json_report import dumps
        from ..report.writer import write_output
        from .order import order_document

        doc = order_document(table)
        if args.split_at is not None:
            from datetime import datetime, timezone

            when = datetime.fromtimestamp(args.split_at, tz=timezone.utc).isoformat().replace("+00:00", "Z")
            doc["periods"] = [{"period": f"{name} {when}", "sessions": n,
                               "table": None if t is None else order_document(t)} for name, t, n in periods]
        written = write_output(args.json, dumps(doc))
        if written != "-":
            print(f"wrote {written}", file=sys.stderr)
        else:
            return 0
    sys.stdout.write("\n".join(_order_lines(table, K, safe_text)) + "\n")
    for name, t, n in periods:
        sys.stdout.write(f"\nsessions starting {name} {_when(args.split_at)} ({n:,}):\n")
        if t is None:
            sys.stdout.write("  too few sessions to fit\n")
        else:
            sys.stdout.write("\n".join(_order_lines(t, K, safe_text)) + "\n")
    return 0


def _when(t: float) -> str:
    from datetime import datetime, timezone

    return datetime.fromtimestamp(t, tz=timezone.utc).isoformat().replace("+00:00", "Z")


def _order_lines(table, K: int, safe_text) -> list[str]:
    symbols = table.alphabet + (1 if table.include_end else 0)
    form = ("chain-with-end form: the end of a session is one more outcome" if table.include_end
            else "textbook form (--no-end): the end of a session is not predicted")
    lines = [
        f"tracechain order: {table.sessions:,} sessions, {table.observations:,} predicted events"
        + (" (ends included)" if table.include_end else "") + f", {table.alphabet:,} states; "
        + ("first events as partial windows" if table.start == "partial" else f"conditioning on the first {K} events"),
        f"{form}; {symbols:,} symbols, so with every transition observed the test of order k against k+1 has "
        f"s^k (s-1)^2 degrees of freedom with s = {symbols:,} (fewer where transitions are never seen; the df "
        "column gives the value used)",
        "",
    ]
    rows = []
    for f in table.fits:
        t = table.tests[f.order] if f.order < len(table.tests) else None
        test = ("-", "-", "-") if t is None else (
            f"{t.statistic:.2f}", f"{t.df:,}",
            "n/a" if t.p_value is None else (_p(t.p_value) + (" *" if t.rejected else "")))
        rows.append([str(f.order), f"{f.log_likelihood:.2f}", f"{f.parameters:,}", f"{f.aic:.2f}", f"{f.bic:.2f}", *test])
    lines += _table(["order", "log-lik", "free params", "AIC", "BIC", "LR vs next", "df", "p-value"], rows)
    lines.append(f"  * rejected at level {table.level:g}: the next order fits significantly better")
    lines.append("")
    fit = {f.order: f for f in table.fits}
    rec = table.recommended
    lines.append(f"recommendation: order {rec} (the lowest order not rejected against the next at {table.level:g}), "
                 f"{fit[rec].parameters:,} free parameters")
    lines.append(f"BIC prefers order {table.bic_order} ({fit[table.bic_order].parameters:,} free parameters); "
                 f"AIC prefers order {table.aic_order}")
    if rec == 0 or table.bic_order == 0:
        lines.append("note: order 0 means the events look independent of the previous one; "
                     "tracechain's chains start at --order 1")
    if rec == K:
        lines.append(f"note: every test up to order {K} was rejected; try a larger --max-order if the data allow")
    for n in table.notes:
        lines.append(f"note: {safe_text(n, 400)}")
    return lines


def cmd_simulate(args: argparse.Namespace) -> int:
    from ..options import build_chain
    from .simulate import simulate, write_jsonl

    args.paths = list(args.from_paths) + list(args.paths or [])
    if not args.paths:
        raise UsageError("name the event logs to fit with --from PATH")
    if args.max_steps < 1:
        raise UsageError("--max-steps must be at least 1")
    chain, _, _ = build_chain(args)
    sim = simulate(chain, args.n, seed=args.seed, max_steps=args.max_steps)
    written = write_jsonl(sim, args.output)
    events = sum(len(s) for s in sim.sequences)
    if written != "-":
        msg = f"wrote {written}: {len(sim):,} sessions, {events:,} events (seed {args.seed})"
        if sim.truncated:
            msg += f"; {sim.truncated:,} sessions cut at {args.max_steps} events"
        print(msg, file=sys.stderr)
    return 0


def _parse_edit(kind: str, text: str):
    from .whatif import FixDeadEnd, Redirect, RemoveEdge, RemoveState

    if kind == "remove-state":
        return RemoveState(text)
    if kind == "redirect":
        a, sep, b = text.rpartition("=")
        if not sep or not a or not b:
            raise UsageError(f"--redirect needs A=B, got {text!r}")
        return Redirect(a, b)
    if kind == "remove-edge":
        a, sep, b = text.rpartition(",")
        if not sep or not a or not b:
            raise UsageError(f"--remove-edge needs A,B, got {text!r}")
        return RemoveEdge(a, b)
    if kind == "fix-dead-end":
        s, sep, rest = text.rpartition("=")
        target, sep2, share = rest.rpartition(":")
        if not sep or not sep2 or not s or not target:
            raise UsageError(f"--fix-dead-end needs S=TARGET:SHARE, got {text!r}")
        try:
            v = float(share.rstrip("%")) / (100.0 if share.endswith("%") else 1.0)
        except ValueError:
            raise UsageError(f"--fix-dead-end: not a share: {share!r}") from None
        if not 0 < v <= 1:
            raise UsageError("--fix-dead-end: the share must be above 0 and at most 1 (or 100%)")
        return FixDeadEnd(s, target, v)
    raise UsageError(f"unknown edit {kind}")  # pragma: no cover


def cmd_whatif(args: argparse.Namespace) -> int:
    from ..options import build_chain
    from ..report.text import safe_text
    from .whatif import what_if

    if not args.edits:
        raise UsageError("name at least one edit: --remove-state, --redirect, --remove-edge or --fix-dead-end")
    edits = [_parse_edit(k, v) for k, v in args.edits]
    chain, _, settings = build_chain(args)
    if settings.get("order", 1) != 1:
        raise UsageError("whatif works on first-order chains (--order 1): name states by their event names")
    if args.prior <= 0:
        raise UsageError("--prior must be positive")
    res = what_if(chain, edits, level=args.level, draws=max(args.draws, 2), seed=args.seed, prior=args.prior,
                  intervals=args.draws > 0)
    pct = int(round(100 * res.level))

    def p(x):
        return "n/a" if x is None else f"{100 * x:.1f}%"

    def pp(x):
        return "n/a" if x is None else f"{100 * x:+.1f} pts"

    def s(x):
        return "inf" if x is None else f"{x:.2f}"

    def ss(x):
        return "n/a" if x is None else f"{x:+.2f}"

    def iv(i, f):
        return "" if i is None else f"[{f(i.low)}, {f(i.high)}]"

    lines = ["tracechain what-if: " + "; ".join(safe_text(e, 120) for e in res.edits), ""]
    head = ["figure", "before", "after", f"{pct}% interval", "change", f"{pct}% interval"]
    rows = []
    if len(chain.goals):
        c = res.conversion
        rows.append(["conversion from the start", p(c.before), p(c.after), iv(c.after_interval, p), pp(c.change),
                     iv(c.change_interval, pp)])
    st = res.steps
    rows.append(["expected steps from the start", s(st.before), s(st.after), iv(st.after_interval, s), ss(st.change),
                 iv(st.change_interval, ss)])
    lines += _table(head, rows)
    lines.append("")
    lines.append("A model prediction: sessions are assumed to behave as observed everywhere the edit does not touch.")
    for n in res.notes:
        lines.append(f"note: {n}")
    sys.stdout.write("\n".join(lines) + "\n")
    return 0
