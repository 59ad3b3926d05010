"""The ``check`` and ``snapshot`` subcommands.

``register(subparsers)`` adds both to the parser of :mod:`tracechain.cli`; each handler
returns an exit status (check: 0 pass, 1 findings at or above ``--fail-on``, 2 when a rule
could not be evaluated). User mistakes raise :class:`~tracechain.errors.TracechainError`,
which the command line turns into one line and exit status 2.

The input options are those of ``tracechain analyze``; ``--format`` there names the *input*
format, so the report format is ``--output-format`` (default: from the ``--output`` file's
extension: ``.sarif`` SARIF, ``.xml`` JUnit XML, ``.json`` JSON; otherwise text).
"""

from __future__ import annotations

import argparse
import sys
from typing import TYPE_CHECKING, Any

from ..errors import ConfigError, UsageError
from .formats import CHECK_FORMATS
from .severities import FAIL_ON

if TYPE_CHECKING:
    from .config import RulesFile

__all__ = ["register", "cmd_check", "cmd_snapshot", "build_checked_chain", "render", "OUTPUT_FORMATS"]

OUTPUT_FORMATS = CHECK_FORMATS.names()


def register(subparsers: Any) -> None:
    """Add ``check`` and ``snapshot`` to the subparsers of ``tracechain.cli.build_parser()``."""
    from ..options import _add_input_options

    c = subparsers.add_parser(
        "check", help="evaluate behaviour rules on the chain built from traces (a CI gate)",
        description="Build the chain from traces and evaluate the rules of a YAML rules file: dead ends, "
                    "reachable goals, conversion floors, step ceilings, traps, allowed transitions, open cases, "
                    "changes against a baseline snapshot. Exit status 0 pass, 1 findings at or above --fail-on, "
                    "2 usage or input error.")
    _add_input_options(c)
    g = c.add_argument_group("rules and report")
    g.add_argument("--rules", required=True, metavar="YAML", help="the rules file")
    g.add_argument("--baseline", metavar="SNAPSHOT",
                   help="a snapshot to compare with (default: the rules file's 'baseline:')")
    g.add_argument("--output-format", choices=OUTPUT_FORMATS,
                   help="report format (default: from the --output extension, else text)")
    g.add_argument("--output", "-o", metavar="FILE", default="-",
                   help="write the report to FILE, atomically (default: standard output)")
    g.add_argument("--fail-on", choices=FAIL_ON, default="error",
                   help="exit with status 1 when a finding is at least this severe (default: error; never: report only)")
    g.add_argument("--quiet", "-q", action="store_true",
                   help="with --output FILE: no text summary on standard output")
    from ..privacy import add_privacy_options

    add_privacy_options(c)
    c.set_defaults(handler=cmd_check)

    s = subparsers.add_parser(
        "snapshot", help="save the chain built from traces as a JSON baseline",
        description="Build the chain from traces and save its states, transitions with counts, starts, ends, goals "
                    "and settings as a versioned JSON snapshot (tracechain/schemas/snapshot-1.schema.json), for "
                    "'tracechain check --baseline'.")
    _add_input_options(s)
    o = s.add_argument_group("output")
    o.add_argument("--output", "-o", metavar="FILE", default="-", help="the snapshot file (default: standard output)")
    o.add_argument("--rules", metavar="YAML",
                   help="take goals and input options from this rules file, as 'check' does")
    s.set_defaults(handler=cmd_snapshot)


def _merge(args: argparse.Namespace, rules: RulesFile | None) -> argparse.Namespace:
    """The arguments with the rules file's goals and input options filled in where the command
    line gives none."""
    ns = argparse.Namespace(**vars(args))
    if rules is None:
        return ns
    inp = rules.input
    if not ns.goal and rules.goals:
        ns.goal = list(rules.goals)
    if ns.mapping is None and inp.mapping is not None:
        ns.mapping = inp.mapping
    if ns.gap is None and inp.gap is not None:
        ns.gap = inp.gap
    if ns.order == 1 and inp.order is not None:
        ns.order = inp.order
    if ns.collapse is None and inp.collapse_repeats is not None:
        ns.collapse = inp.collapse_repeats
    if not ns.keep_after_goal and inp.keep_after_goal:
        ns.keep_after_goal = True
    # open cases: the rules file's terminal states join the command line's; its stale limit and
    # policy apply unless the command line gives its own
    given = list(getattr(ns, "terminal", None) or [])
    ns.terminal = given + [t for t in inp.terminal_states if t not in given]
    if getattr(ns, "stale_after", None) is None and inp.stale_after is not None:
        ns.stale_after = inp.stale_after
    if getattr(ns, "open_cases", None) is None and inp.open_cases is not None:
        ns.open_cases = inp.open_cases
    for key in ("session_field", "event_field", "time_field"):
        if getattr(ns, key) is None and getattr(inp, key) is not None:
            setattr(ns, key, getattr(inp, key))
    return ns


def _last_name(state: Any) -> Any:
    return state[-1] if isinstance(state, tuple) and state else state


def build_checked_chain(args: argparse.Namespace, rules: RulesFile | None = None, before_reading=None):
    """Read the traces as the command line and rules file say, into the chain ``analyze`` builds.

    With terminal states (``--terminal``, the mapping file's ``terminal:``, the rules file's
    ``input: terminal`` or ``finished_states``), unfinished cases are open or in flight as in
    ``analyze``, and open cases are the outcome ``[stuck] X`` unless ``--open-cases continue``
    (or ``input: open_cases: continue``): every rule sees the same transitions, conversion and
    steps as ``analyze`` shows.

    Unlike ``analyze``, a goal or terminal state that never occurs is not an error: the chain
    is built with the goals that occur, and the rules report the missing ones.
    ``before_reading(goals, terminal)`` is called once the goals and terminal states are known,
    before the traces are read. Returns ``(chain, report, settings, goals)``.
    """
    from ..options import count_from_args, extra_from_args, shape_from_args

    ns = _merge(args, rules)
    shape, fields, goals, terminal = shape_from_args(ns)
    # the format-specific reading options, as 'analyze' reads them
    fmt, extra = extra_from_args(ns, shape.mapping)
    if before_reading is not None:
        before_reading(tuple(goals), tuple(terminal))
    counts, report = count_from_args(ns, shape, fields, fmt, extra)
    mode = getattr(ns, "open_cases", None) or "stuck"
    if shape.cases is not None and mode == "stuck":
        from ..analyze.stuck_outcome import with_stuck_outcomes

        counts = with_stuck_outcomes(counts)
    known = set(counts.states)
    last_names = {_last_name(s) for s in counts.states}
    present = [g for g in goals if g in known]
    term = [t for t in terminal if t in known or t in last_names]
    from ..chain import Chain

    chain = Chain.from_counts(counts, goals=present, terminal=term, smoothing=ns.smoothing)
    settings = {
        "goals": list(goals), "terminal": list(terminal), "truncate_at_goal": shape.truncate_at_goal,
        "collapse_repeats": counts.meta.get("collapse_repeats"), "gap_seconds": shape.gap, "order": shape.order,
        "smoothing": ns.smoothing, "mapping": ns.mapping,
        "stale_after_seconds": shape.cases.stale_after if shape.cases else None,
        "open_cases": mode if shape.cases else None,
    }
    return chain, report, settings, tuple(goals)


def _format_for(path: str, chosen: str | None) -> str:
    if chosen:
        return chosen
    found = CHECK_FORMATS.for_path(path)
    return found.name if found is not None else "text"


def render(result, fmt: str) -> str:
    return CHECK_FORMATS.get(fmt).render(result)


def cmd_check(args: argparse.Namespace) -> int:
    from ..counts import state_label
    from ..report.writer import write_output
    from .config import load_rules
    from .context import CheckContext
    from .engine import run_check
    from .report import render_check_text
    from .snapshot import load_snapshot

    rules = load_rules(args.rules)
    baseline_path = args.baseline or rules.baseline
    chain, report, settings, goals = build_checked_chain(
        args, rules, before_reading=lambda g, t: rules.require(g, baseline_path is not None, bool(t)))
    needs_baseline = any(getattr(rc.rule, "needs_baseline", False) and rc.enabled for rc in rules.rules)
    notes = []
    baseline = None
    if baseline_path is not None:
        if needs_baseline:
            baseline = load_snapshot(baseline_path)
            if baseline.order != settings["order"]:
                raise ConfigError(
                    f"the baseline was made from a chain of order {baseline.order}, this check builds order "
                    f"{settings['order']}; make a new snapshot with the same options", baseline_path)
            if sorted(baseline.goals) != sorted(chain.label(int(g)) for g in chain.goals):
                notes.append(f"the baseline's goals ({', '.join(baseline.goals) or 'none'}) differ from this check's")
        else:
            notes.append("a baseline was given but no enabled rule compares with it")
    seen = [state_label(st) for st in chain.counts.states]
    seen += sorted({str(_last_name(st)) for st in chain.counts.states} - set(seen))
    rules.check_names(seen, baseline.state_names if baseline is not None else (), goals)
    from ..privacy import pseudonymizer_from_args

    keys = pseudonymizer_from_args(args)
    notes.append(key_note(keys))
    ctx = CheckContext(chain, goals=goals, report=report, baseline=baseline, settings=settings, keys=keys)
    result = run_check(ctx, rules.rules, fail_on=args.fail_on, rules_file=args.rules, notes=notes)
    fmt = _format_for(args.output, args.output_format)
    written = write_output(args.output, render(result, fmt))
    if written != "-":
        if not args.quiet:
            sys.stdout.write(render_check_text(result) if fmt != "text" else render(result, "text"))
            sys.stdout.flush()
        print(f"wrote {written}", file=sys.stderr)
    return result.exit_status


def key_note(keys, raw_option: str = "--raw-keys", salt_option: str = "--salt",
             stable: str = "--salt or --salt-file") -> str:
    """How findings show session keys (a note in every report format; never the salt)."""
    if keys.raw:
        return f"session keys are shown raw ({raw_option}); they may identify people"
    if keys.salt_file is not None:
        how = f"with the salt in {keys.salt_file} (not stored here)"
    elif keys.generated:
        how = f"with a salt drawn for this run (not stored; for stable pseudonyms use {stable})"
    else:
        how = f"with the salt given with {salt_option} (not stored here)"
    return f"session keys are pseudonymised (k: + HMAC-SHA256) {how}; {raw_option} shows them as they are"


def cmd_snapshot(args: argparse.Namespace) -> int:
    from ..report.writer import write_output
    from .config import load_rules
    from .snapshot import dumps_snapshot, snapshot_document

    rules = load_rules(args.rules) if args.rules else None
    chain, _report, settings, _goals = build_checked_chain(args, rules)
    written = write_output(args.output, dumps_snapshot(snapshot_document(chain, settings)))
    if written != "-":
        print(f"wrote {written}", file=sys.stderr)
    return 0
