"""The ``report`` and ``compare`` commands.

:func:`register` adds both to the command line's sub-parsers (``tracechain.cli`` calls it);
the handlers take the shared options from :mod:`tracechain.options`. The command line itself
(``main``, ``build_parser``) is ``tracechain.cli``'s.

``tracechain report PATH... --html FILE --markdown FILE [--csv FILE] [--svg FILE] [--steps LIST]``
    the analysis as a self-contained HTML report, a Markdown summary, per-state CSV; with
    ``--steps`` also the ordered steps (a funnel) as a section of the report.

``tracechain compare A B`` or ``tracechain compare PATH --split-at TIME`` or
``tracechain compare PATH --split-field NAME --split-values X,Y``
    per-state tests of the exits, Benjamini–Hochberg, the change in conversion and expected
    steps with intervals; a text summary, and ``--html``/``--markdown``/``--svg``/``--dot``.
"""

from __future__ import annotations

import argparse
import sys

__all__ = ["register", "main", "cmd_report", "cmd_compare"]


def _subparsers_action(parser: argparse.ArgumentParser):
    for action in parser._actions:  # argparse keeps the sub-parsers action among the actions
        if isinstance(action, argparse._SubParsersAction):
            return action
    raise RuntimeError("the parser has no sub-commands")


def _privacy_options(p: argparse.ArgumentParser) -> None:
    from ..privacy import add_privacy_options

    add_privacy_options(p)


def _diagram_options(p: argparse.ArgumentParser) -> None:
    from ..options import _positive_int, _share

    d = p.add_argument_group("diagram")
    d.add_argument("--min-edge-share", type=_share, default=0.005, metavar="SHARE",
                   help="hide edges carrying less than this share of transitions (default 0.005 = 0.5%%)")
    d.add_argument("--max-edges", type=_positive_int, default=None, metavar="N",
                   help="draw at most N edges, weakest hidden first, never one that is a drawn state's last path "
                        "from the start (default: 80 or two per state)")
    d.add_argument("--max-states", type=int, default=60, metavar="N",
                   help="draw at most N states: goals, then the states on the most likely paths to a goal (default 60)")
    d.add_argument("--focus", metavar="STATE", help="draw only the neighbourhood of this state")
    d.add_argument("--focus-radius", type=int, choices=(1, 2), default=1, metavar="R",
                   help="how many steps around --focus (1 or 2; default 1)")
    d.add_argument("--layout", choices=("review", "classic"), default="review",
                   help="review (default): exits as a share in each state, columns by the typical step a state "
                        "is reached, goals and terminals in the last column; classic: exits as edges to the end")
    d.add_argument("--fit", choices=("page", "slide"), default="page",
                   help="type sizes for a report page (default) or a 16:9 slide (at least 14 px at 1280 px "
                        "wide; fewer states and edges unless --max-states/--max-edges say otherwise)")
    d.add_argument("--no-diagram", action="store_true", help="leave the diagram out of the report")


def register(subparsers) -> None:
    """Add the ``report`` and ``compare`` commands to ``subparsers`` (an argparse sub-parsers action)."""
    from ..options import (MAX_DRAWS, _seed, _share, add_case_figure_options, add_interval_options, add_level_option,
                           add_steps_options, whole_number)
    from ..options import _add_input_options

    r = subparsers.add_parser(
        "report", help="write an HTML report and a Markdown summary of the analysis",
        description="Analyse event logs and write a self-contained HTML report (no network, no script), a "
                    "Markdown summary for a review document and per-state CSV.")
    _add_input_options(r)
    o = r.add_argument_group("output")
    o.add_argument("--html", metavar="FILE", help="write the HTML report")
    o.add_argument("--markdown", "--md", dest="markdown", metavar="FILE", help="write the Markdown summary")
    o.add_argument("--csv", metavar="FILE", help="write per-state figures as CSV")
    o.add_argument("--svg", metavar="FILE", help="also write the diagram as SVG (and each chart beside it, "
                   "FILE's name + '-CHART.svg')")
    o.add_argument("--png", metavar="FILE", help="write the diagram as PNG for slides (and each chart beside it)")
    o.add_argument("--pdf", metavar="FILE", help="write the diagram as PDF (and each chart beside it)")
    o.add_argument("--no-charts", action="store_true", help="leave the charts out")
    o.add_argument("--title", metavar="TEXT", help="title of the report")
    o.add_argument("--top", type=int, default=15, metavar="N", help="rows in the loss tables (default 15)")
    o.add_argument("--seed", type=_seed, default=0, help="seed of the interval draws (default 0)")
    add_interval_options(o)
    add_case_figure_options(o)
    from ..options import add_segment_options

    add_segment_options(r)
    add_steps_options(r.add_argument_group(
        "ordered steps (a funnel): a section with the sessions reaching each step in order (native engine)"))
    o.add_argument("--order-test", action="store_true",
                   help="test the chain's order (orders 0 to 2; reads the input again and holds the sessions in "
                        "memory) and state the result among the assumptions")
    _diagram_options(r)
    _privacy_options(r)
    r.set_defaults(handler=cmd_report)

    c = subparsers.add_parser(
        "compare", help="compare two sets of sessions: which states' exits changed",
        description="Compare two inputs (two paths), or one input split at a time or by a field: per-state tests "
                    "of the exits with Benjamini-Hochberg, and the change in conversion and expected steps with "
                    "intervals.")
    _add_input_options(c)
    s = c.add_argument_group("what to compare")
    s.add_argument("--split-at", metavar="ISO_TIME", help="one input: events before this time are A, the rest B")
    s.add_argument("--split-field", metavar="NAME", help="one input: sessions by the value of this field")
    s.add_argument("--split-values", metavar="X,Y", help="the two values of --split-field (A, then B)")
    s.add_argument("--names", metavar="A,B", help="names of the two sides in the output (default: from the input)")
    t = c.add_argument_group("statistics")
    t.add_argument("--fdr", type=float, default=0.05, metavar="Q", help="false discovery rate (default 0.05)")
    t.add_argument("--min-expected", type=float, default=5.0, metavar="N",
                   help="pool successors with an expected count below N (default 5)")
    add_level_option(t)
    t.add_argument("--draws", type=whole_number(1, MAX_DRAWS), default=1000,
                   help=f"Dirichlet draws per side (default 1000, at most {MAX_DRAWS:,})")
    t.add_argument("--seed", type=_seed, default=0, help="seed of the draws (default 0)")
    o = c.add_argument_group("output")
    o.add_argument("--html", metavar="FILE", help="write the comparison as an HTML report")
    o.add_argument("--markdown", "--md", dest="markdown", metavar="FILE", help="write it as Markdown")
    o.add_argument("--dot", metavar="FILE", help="write the comparison diagram as Graphviz DOT")
    o.add_argument("--svg", metavar="FILE", help="write the comparison diagram as SVG")
    o.add_argument("--title", metavar="TEXT", help="title of the report")
    o.add_argument("--min-edge-share", type=_share, default=0.0, metavar="SHARE",
                   help="leave out unchanged transitions under this share on both sides (default 0: draw all)")
    o.add_argument("--full-diagram", action="store_true",
                   help="draw every state in the comparison diagram (default: the changed states and their neighbours)")
    o.add_argument("--no-charts", action="store_true", help="leave the charts out")
    o.add_argument("--quiet", "-q", action="store_true", help="no terminal summary")
    _privacy_options(c)
    c.set_defaults(handler=cmd_compare)


# -- report ---------------------------------------------------------------------------------
def _pseudonymizer(args):
    from ..privacy import announce_salt, pseudonymizer_from_args

    pseudo = pseudonymizer_from_args(args)
    announce_salt(pseudo)
    return pseudo


def _diagram(result, args, groups):
    """(Diagram, svg bytes or None, why missing)"""
    from ..errors import RenderError
    from .dot import build_diagram, fit_diagram, render_image

    opts = dict(min_edge_share=args.min_edge_share, max_states=args.max_states, groups=groups,
                focus=args.focus, radius=args.focus_radius, max_edges=args.max_edges, layout=args.layout)
    d = fit_diagram(result, args.fit, **opts) if args.fit else build_diagram(result, **opts)
    try:
        return d, render_image(d.dot, "svg"), None
    except RenderError as err:
        return d, None, str(err)


def _order_test(args):
    """The order table of the input's sessions (orders 0-2), or None with a warning."""
    from ..analyze.order import order_table, session_sequences
    from ..options import progress_from_args, shape_from_args
    from ..errors import TracechainError
    from ..ingest.base import ReadOptions
    from ..pipeline import read_events

    shape, fields, goals, _ = shape_from_args(args)
    if getattr(args, "engine", "auto") not in (None, "auto", "native") or getattr(args, "table", None) \
            or getattr(args, "query", None):
        print("tracechain: warning: no order test: it reads the sessions themselves, which only the native engine "
              "gives", file=sys.stderr)
        return None
    try:
        sessions = session_sequences(read_events(args.paths, format=args.format,
                                                 options=ReadOptions(fields=fields, strict=args.strict),
                                                 progress=progress_from_args(args), filters=shape.filters), shape)
        return order_table(sessions, 2, goals=tuple(goals)) if len(sessions) else None
    except TracechainError as err:
        print(f"tracechain: warning: no order test: {err}", file=sys.stderr)
        return None


def _interval_options(args) -> dict:
    """``level``/``intervals`` (and the sessions for the bootstrap) for the extended analysis."""
    from ..options import interval_method, sessions_from_args

    method = interval_method(args)
    opts = {"level": args.level, "intervals": method}
    if method == "bootstrap":
        opts["interval_sessions"] = sessions_from_args(args, "report --intervals bootstrap")
    return opts


def _charts(result, args) -> list:
    """The report's charts, or one line saying why there are none."""
    from .charts import available, missing_reason, report_charts

    if args.no_charts:
        return []
    if not available():
        if args.png or args.pdf or args.svg:
            print(f"tracechain: warning: no charts: {missing_reason()}", file=sys.stderr)
        return [f"No charts: {missing_reason()}."]
    return report_charts(result, top=args.top, level=args.level, seed=args.seed)


def _segments_section(args, seg):
    """``--segment-by``: the segments' section of the report, with the small multiples when charts can be drawn."""
    from .charts import available, missing_reason, segment_chart
    from .segments import segments_section

    chart = None
    if not args.no_charts:
        chart = segment_chart(seg) if available() else f"No chart of conversion by segment: {missing_reason()}."
    return segments_section(seg, chart)


def _steps_section(args):
    """``--steps``: (the "Ordered steps" section, its chart or None); the sessions are read once more."""
    from ..options import steps_from_args
    from .charts import available, missing_reason, steps_chart
    from .steps_report import steps_section

    res = steps_from_args(args, "report --steps")
    chart = None
    if not args.no_charts:
        chart = steps_chart(res) if available() else f"No chart of the steps: {missing_reason()}."
    return steps_section(res, chart), chart


def _chart_path(image: str, name: str, fmt: str) -> str:
    import os

    stem, _ = os.path.splitext(image)
    return f"{stem}-{name}.{fmt}"


def _chart_files(args, images: dict, charts: list) -> list:
    """(path, chart, format) for each chart beside each image output; checked like the other outputs."""
    import argparse as _ap

    from ..errors import UsageError
    from ..outputs import check_outputs

    out = []
    for fmt, path in images.items():
        if path == "-":
            continue
        for c in charts:
            out.append((_chart_path(path, c.name, fmt), c, fmt))
    given = {p for p in (args.html, args.markdown, args.csv, args.svg, args.png, args.pdf) if p}
    for path, _, _ in out:
        if path in given:
            raise UsageError(f"{path}: the chart file would replace another output (name the image differently)")
        probe = _ap.Namespace(**{k: v for k, v in vars(args).items()
                                 if k in ("paths", "from_paths", "mapping", "rules", "baseline")})
        probe.output = path
        check_outputs(probe)
    return out


def _rel(markdown: str, path: str) -> str:
    import os

    if markdown == "-":
        return path
    return os.path.relpath(os.path.abspath(path), os.path.dirname(os.path.abspath(markdown)))


def _image_ref(markdown: str, images: dict) -> str | None:
    for fmt in ("svg", "png"):
        if images.get(fmt) and images[fmt] != "-":
            return _rel(markdown, images[fmt])
    return None


def _set_chart_refs(doc, markdown: str, chart_files: list) -> None:
    from .html import ChartFigure

    best = {}
    for path, c, fmt in chart_files:
        if fmt in ("svg", "png") and (c.name not in best or fmt == "svg"):
            best[c.name] = _rel(markdown, path)
    for s in doc.sections:
        for b in s.blocks:
            if isinstance(b, ChartFigure):
                b.ref = best.get(b.name)


def _render_diagram(diagram, fmt: str) -> bytes:
    from .dot import render_image

    return render_image(diagram.dot, fmt)


def cmd_report(args: argparse.Namespace) -> int:
    from ..analyze.summary import analyze
    from ..options import build_chain_and_segments
    from ..options import EXIT_OK, with_case_figures
    from ..errors import UsageError
    from ..shape.mapping import load_mapping
    from .csv_report import render_csv
    from .html import build_report, render_html
    from .markdown import render_markdown
    from .writer import write_output

    if not (args.html or args.markdown or args.csv or args.svg or args.png or args.pdf):
        raise UsageError("name at least one output: --html FILE, --markdown FILE, --csv FILE, --svg FILE, "
                         "--png FILE or --pdf FILE")
    if args.top < 1:
        raise UsageError("--top must be at least 1")
    if args.max_states < 1:
        raise UsageError("--max-states must be at least 1")
    outs = [x for x in (args.html, args.markdown, args.csv, args.svg, args.png, args.pdf) if x]
    if outs.count("-") > 1:
        raise UsageError("only one output can go to standard output ('-')")
    from ..options import segments_possible

    segments_possible(args)  # before any reading
    from ..options import native_only, readable_twice, steps_wanted

    if steps_wanted(args) is not None and (args.html or args.markdown):
        native_only(args, "report --steps")
        readable_twice(args, "report --steps")
    chain, report, settings, seg = build_chain_and_segments(args)
    result = with_case_figures(analyze(chain, report, top=max(args.top, 10), settings=settings,
                                       min_visits=args.min_visits), args)
    seg_sections = None
    if args.segment_by is not None and (args.html or args.markdown):
        seg_sections = [_segments_section(args, seg)]
    elif args.segment_by is not None:
        print("tracechain: warning: --segment-by adds a section to the HTML and Markdown report; neither was asked "
              "for", file=sys.stderr)
    steps_chart = None
    if args.steps is not None and (args.html or args.markdown):
        steps_sec, steps_chart = _steps_section(args)
        seg_sections = [steps_sec] + (seg_sections or [])
    elif args.steps is not None:
        print("tracechain: warning: --steps adds a section to the HTML and Markdown report; neither was asked for",
              file=sys.stderr)
    groups = (load_mapping(args.mapping).groups or None) if args.mapping else None
    pseudo = _pseudonymizer(args)
    diagram = svg = missing = None
    images = {fmt: getattr(args, fmt) for fmt in ("svg", "png", "pdf") if getattr(args, fmt)}
    if not args.no_diagram or images:
        diagram, svg, missing = _diagram(result, args, groups)
        if svg is None and images:
            from ..errors import RenderError

            raise RenderError(missing)
        if missing:
            print(f"tracechain: warning: no diagram in the report: {missing}", file=sys.stderr)
    charts = _charts(result, args)
    drawn = [c for c in charts + [steps_chart] if c is not None and not isinstance(c, str)]
    chart_files = _chart_files(args, images, drawn)
    order_table = _order_test(args) if args.order_test and (args.html or args.markdown) else None
    from .html import load_extended

    ext_opts, ext = {}, None
    if args.html or args.markdown or args.csv:
        ext_opts = _interval_options(args)
        ext, _why = load_extended(result, seed=args.seed, **ext_opts)  # once, for the report and the CSV
    written = []
    for fmt, path in images.items():
        written.append(write_output(path, svg if fmt == "svg" else _render_diagram(diagram, fmt)))
    for path, chart, fmt in chart_files:
        written.append(write_output(path, chart.render(fmt)))
    if args.html or args.markdown:
        doc = build_report(result, title=args.title, svg=None if args.no_diagram else svg,
                           diagram=None if args.no_diagram else diagram,
                           diagram_missing=None if args.no_diagram else missing, pseudonymizer=pseudo,
                           top=args.top, seed=args.seed, order_test=order_table,
                           extended=ext if ext is not None else "auto", extended_options=ext_opts,
                           charts=charts, comparison_sections=seg_sections)
        if args.html:
            written.append(write_output(args.html, render_html(doc)))
        if args.markdown:
            _set_chart_refs(doc, args.markdown, chart_files)
            ref = _image_ref(args.markdown, images) or args.html
            written.append(write_output(args.markdown, render_markdown(doc, figure_ref=ref if ref != "-" else None)))
    if args.csv:
        written.append(write_output(args.csv, render_csv(result, extended=ext)))
    for w in written:
        if w != "-":
            print(f"wrote {w}", file=sys.stderr)
    return EXIT_OK


# -- compare --------------------------------------------------------------------------------
def _side_names(args, default: tuple[str, str]) -> tuple[str, str]:
    from ..errors import UsageError

    if not args.names:
        return default
    parts = [p.strip() for p in args.names.split(",")]
    if len(parts) != 2 or not all(parts) or parts[0] == parts[1]:
        raise UsageError("--names needs two different names, e.g. --names before,after")
    return parts[0], parts[1]


def _counts_for_compare(args):
    """(counts_a, counts_b, report_a, report_b, default names, how)"""
    import os

    from ..analyze.compare import count_split_at, count_split_by_field, parse_time
    from ..options import shape_from_args
    from ..errors import UsageError
    shape, fields, goals, terminal = shape_from_args(args)
    split = args.split_at is not None or args.split_field is not None
    if split:
        from ..options import native_only

        native_only(args, "compare --split-at/--split-field")
    if args.split_at is not None and args.split_field is not None:
        raise UsageError("use either --split-at or --split-field, not both")
    if args.split_values is not None and args.split_field is None:
        raise UsageError("--split-values goes with --split-field")
    kw = dict(format=args.format, fields=fields, shape=shape, strict=args.strict)
    if not split:
        if len(args.paths) != 2:
            raise UsageError(f"compare needs two inputs (A B), or one with --split-at or --split-field; "
                             f"got {len(args.paths)}")
        from ..options import count_from_args

        a, ra = count_from_args(args, shape, fields, args.format, {}, paths=[args.paths[0]])
        b, rb = count_from_args(args, shape, fields, args.format, {}, paths=[args.paths[1]])
        names = tuple(os.path.basename(p.rstrip("/")) or p for p in args.paths)
        if names[0] == names[1]:
            names = ("A", "B")
        return a, b, ra, rb, names, goals, terminal, f"two inputs: {args.paths[0]} (A) and {args.paths[1]} (B)"
    if args.split_at is not None:
        at = parse_time(args.split_at)
        a, b, rep = count_split_at(args.paths, at, **kw)
        return a, b, rep, rep, ("before", "after"), goals, terminal, f"one input split at {args.split_at}"
    if not args.split_values:
        raise UsageError("--split-field needs --split-values X,Y")
    vals = tuple(v.strip() for v in args.split_values.split(","))
    if len(vals) != 2 or not all(vals):
        raise UsageError("--split-values needs two values, e.g. --split-values mobile,desktop")
    a, b, rep = count_split_by_field(args.paths, args.split_field, vals, **kw)
    return a, b, rep, rep, vals, goals, terminal, f"one input split by {args.split_field}"


def _side_analysis(counts, report, goals, terminal, settings):
    from ..analyze.summary import analyze
    from ..chain import Chain

    if counts.n_states == 0:
        return None
    known = set(counts.states)
    ch = Chain.from_counts(counts, goals=[g for g in goals if g in known],
                           terminal=[t for t in terminal if t in known])
    return analyze(ch, report, settings=settings)


def _compare_text(cmp) -> str:
    from .text import safe_text

    A, B = (safe_text(x, 30) for x in cmp.names)
    lines = [f"tracechain compare: {A} ({cmp.sessions_a:,} sessions) vs {B} ({cmp.sessions_b:,} sessions)"]
    lvl = f"{100 * cmp.level:.0f}%"
    for fc, pct in ((cmp.conversion, True), (cmp.steps, False)):
        if fc is None:
            continue
        f = (lambda v: "n/a" if v is None else f"{100 * v:.1f}%") if pct else (lambda v: "inf" if v is None else f"{v:.2f}")
        d = (lambda v: "n/a" if v is None else f"{100 * v:+.1f} pts") if pct else (lambda v: "n/a" if v is None else f"{v:+.2f}")
        lines.append(f"  {fc.name}: {A} {f(fc.a)} [{f(fc.a_low)}, {f(fc.a_high)}], {B} {f(fc.b)} "
                     f"[{f(fc.b_low)}, {f(fc.b_high)}]; change {d(fc.diff)} [{d(fc.diff_low)}, {d(fc.diff_high)}] "
                     f"({lvl})")
    sig = cmp.significant
    lines.append(f"  states with changed exits (Benjamini-Hochberg q <= {cmp.fdr:g}): {len(sig)} of {len(cmp.tested)} tested")
    for t in sig[:15]:
        lines.append(f"    {safe_text(t.label, 40)}: X2 = {t.statistic:.1f}, df {t.df}, p = {t.p_value:.2g}, "
                     f"q = {t.q_value:.2g}, exits moved {100 * (t.tvd or 0):.1f}%")
    for kind, idx in (("appeared", cmp.appeared_states), ("vanished", cmp.vanished_states)):
        if idx:
            lines.append(f"  states that {kind}: " + ", ".join(safe_text(cmp.labels[i], 30) for i in idx[:10])
                         + (" ..." if len(idx) > 10 else ""))
    for n in cmp.notes:
        lines.append(f"note: {n}")
    return "\n".join(lines) + "\n"


def changed_neighbourhood(cmp) -> set[int] | None:
    """The states whose exits changed, states on one side only, their neighbours one step away on
    either side, and the start and end; None when nothing changed (draw everything)."""
    core = {t.state for t in cmp.tests if t.significant} | set(cmp.appeared_states) | set(cmp.vanished_states)
    if not core:
        return None
    keep = set(core)
    for e in cmp.edges:
        if e.source in core:
            keep.add(e.target)
        if e.target in core:
            keep.add(e.source)
    keep |= {i for i, r in enumerate(cmp.roles) if r in ("start", "end")}
    return keep


def cmd_compare(args: argparse.Namespace) -> int:
    from ..analyze.compare import compare_counts
    from ..options import EXIT_OK
    from ..errors import RenderError, UsageError
    from .dot import fit_diff_dot, render_image
    from .html import build_compare_report, render_html
    from .markdown import render_markdown
    from .writer import write_output

    if not 0 < args.fdr < 1:
        raise UsageError("--fdr must be between 0 and 1")
    if not 0 < args.level < 1:
        raise UsageError("--level must be between 0 and 1")
    if args.draws < 1:
        raise UsageError("--draws must be at least 1")
    a, b, ra, rb, names, goals, terminal, how = _counts_for_compare(args)
    names = _side_names(args, tuple(names))
    settings = {"goals": goals, "terminal": terminal, "truncate_at_goal": not args.keep_after_goal,
                "gap_seconds": args.gap, "order": args.order, "mapping": args.mapping, "compare": how}
    cmp = compare_counts(a, b, goals, terminal, names=names, fdr=args.fdr, min_expected=args.min_expected,
                         level=args.level, draws=args.draws, seed=args.seed)
    pseudo = _pseudonymizer(args)
    written = []
    dot_text = None
    svg = missing = None
    if args.dot or args.svg or args.html or args.markdown:
        dot_text = fit_diff_dot(cmp, "page", title=args.title, min_edge_share=args.min_edge_share,
                                   states=None if args.full_diagram else changed_neighbourhood(cmp))
        if args.dot:
            written.append(write_output(args.dot, dot_text))
        try:
            svg = render_image(dot_text, "svg")
        except RenderError as err:
            if args.svg:
                raise
            missing = str(err)
        if args.svg:
            written.append(write_output(args.svg, svg))
    if args.html or args.markdown:
        sides = (_side_analysis(a, ra, goals, terminal, settings), _side_analysis(b, rb, goals, terminal, settings))
        charts = []
        if not args.no_charts:
            from .charts import available, compare_charts, missing_reason

            charts = compare_charts(cmp) if available() else [f"No charts: {missing_reason()}."]
        doc = build_compare_report(cmp, sides, diff_svg=svg, diff_missing=missing, pseudonymizer=pseudo,
                                   title=args.title, charts=charts)
        if args.html:
            written.append(write_output(args.html, render_html(doc)))
        if args.markdown:
            ref = args.html or args.svg
            written.append(write_output(args.markdown, render_markdown(doc, figure_ref=ref if ref != "-" else None)))
    if not args.quiet and "-" not in (args.html, args.markdown, args.dot, args.svg):
        sys.stdout.write(_compare_text(cmp))
        sys.stdout.flush()
    for w in written:
        if w != "-":
            print(f"wrote {w}", file=sys.stderr)
    return EXIT_OK
