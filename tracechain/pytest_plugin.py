"""A pytest plugin: record the events that code under test emits, build the chain, assert on it.

The ``trace_recorder`` fixture collects events in two ways:

* ``trace_recorder.record(session, event)`` (the recorder itself is callable too), for code
  that accepts an event callback;
* ``trace_recorder.handler``, a :class:`logging.Handler` attached to the root logger for the
  duration of the test, which keeps log records carrying both a session and an event
  attribute, e.g. ``log.info("paid", extra={"session": order_id, "event": "Paid"})``. The
  attribute names are the ini options ``tracechain_session_field`` / ``tracechain_event_field``
  (default ``session`` / ``event``). Log records below a logger's level never reach a
  handler: use ``with trace_recorder.capture("shop", logging.INFO): ...`` (or the ini option
  ``tracechain_log_level``) to lower it for the test.

At the end of the test, the assertion helpers build the chain (events in the order recorded,
one session per session key, cut at the first goal) and check it:

* ``assert_no_dead_ends(allow=())``
* ``assert_goal_reachable(goal=None)`` (default: every goal)
* ``assert_transitions_within(allowed, end_anywhere=False, start_anywhere=False)`` where
  ``allowed`` is ``{state: [next, ...]}`` or pairs ``(state, next)``; ``[start]`` and ``[end]``
  name the pseudo-states
* ``check(rules_file)``: every rule of a ``tracechain check`` rules file

A failing helper raises ``AssertionError`` whose message shows the offending path: the
recorded session from ``[start]`` up to the bad transition or into the dead end.

Goals: the ``goals`` argument of the fixture's helpers, ``trace_recorder.goals = [...]``, or the
ini option ``tracechain_goals`` (one per line). With ``--tracechain-report FILE`` (or the ini
option ``tracechain_report``) the helpers' results for the whole run are written as SARIF
(``.sarif``), JUnit XML (``.xml``) or JSON (``.json``): one test case per helper call.

Session keys: every message and report shows them pseudonymised (``k:`` and 16 hexadecimal
digits of HMAC-SHA256 under a salt drawn once per test run, never written anywhere), the
default of every tracechain output; ``--tracechain-raw-keys`` (or the ini option
``tracechain_raw_keys = true``) shows them as recorded, ``--tracechain-salt TEXT`` gives stable
pseudonyms across runs.

Registered through the ``pytest11`` entry point; in a checkout where it is not installed,
enable it with ``-p tracechain.pytest_plugin``.
"""

from __future__ import annotations

import contextlib
import logging
import os
import sys
import time
from collections.abc import Iterable, Iterator
from typing import Any

import pytest

__all__ = ["TraceRecorder", "RecordHandler"]

_START, _END = "[start]", "[end]"


def _rules_mod():
    from .check import rules

    return rules


class RecordHandler(logging.Handler):
    """Keeps log records that carry a session and an event attribute."""

    def __init__(self, recorder: "TraceRecorder", session_field: str = "session", event_field: str = "event"):
        super().__init__(logging.NOTSET)
        self.recorder = recorder
        self.session_field = session_field
        self.event_field = event_field

    def emit(self, record: logging.LogRecord) -> None:
        session = getattr(record, self.session_field, None)
        event = getattr(record, self.event_field, None)
        if session is None or event is None:
            return
        self.recorder.record(session, event)


class _Collector:
    """The helpers' results over a test run, for the optional report."""

    def __init__(self, keys: Any = None) -> None:
        self.outcomes: list[Any] = []
        self.descriptors: list[Any] = []
        self.started = time.time()
        self.keys = keys

    def add(self, rule: Any, name: str, findings: list, seconds: float) -> None:
        from .check.findings import RuleOutcome

        if all(d.id != rule.id for d in self.descriptors):  # each helper call makes its own rule object
            self.descriptors.append(rule)
        self.outcomes.append(RuleOutcome(
            rule_id=rule.id, rule=name, kind=rule.kind, severity="error", description=rule.short_description,
            findings=tuple(findings), seconds=seconds, status="failed" if findings else "passed",
        ))

    def result(self):
        from .check.findings import CheckResult

        notes: tuple[str, ...] = ()
        if self.keys is not None:
            from .check.command import key_note

            notes = (key_note(self.keys, "--tracechain-raw-keys", "--tracechain-salt", "--tracechain-salt TEXT"),)
        return CheckResult(outcomes=tuple(self.outcomes), descriptors=tuple(self.descriptors), fail_on="error",
                           started=self.started, seconds=time.time() - self.started, notes=notes)


class TraceRecorder:
    """Events recorded during one test, and assertions on the chain they make."""

    def __init__(self, name: str = "test", goals: Iterable[str] = (), session_field: str = "session",
                 event_field: str = "event", collector: _Collector | None = None, keys=None):
        from .privacy import Pseudonymizer

        self.name = name
        self.keys = keys if keys is not None else Pseudonymizer()  # how messages and reports show session keys
        self.goals = list(goals)
        self._sessions: list[str] = []
        self._events: list[str] = []
        self._collector = collector
        self.handler = RecordHandler(self, session_field, event_field)
        self._cache: tuple | None = None

    # -- recording ------------------------------------------------------------------
    def record(self, session: Any, event: Any) -> None:
        """Record that ``session`` produced ``event`` (in this order)."""
        self._sessions.append(str(session))
        self._events.append(str(event))

    __call__ = record

    @contextlib.contextmanager
    def capture(self, logger: str | logging.Logger | None = None, level: int | str = logging.DEBUG) -> Iterator[None]:
        """Lower ``logger``'s level (default: the root logger) while the block runs."""
        lg = logger if isinstance(logger, logging.Logger) else logging.getLogger(logger)
        old = lg.level
        lg.setLevel(level)
        try:
            yield
        finally:
            lg.setLevel(old)

    @property
    def events(self) -> list[tuple[str, str]]:
        return list(zip(self._sessions, self._events))

    def sessions(self) -> dict[str, list[str]]:
        """Each session's events, in the order recorded (sessions in order of first appearance)."""
        out: dict[str, list[str]] = {}
        for s, e in zip(self._sessions, self._events):
            out.setdefault(s, []).append(e)
        return out

    # -- the chain --------------------------------------------------------------------
    def _goals(self, goals: Iterable[str] | str | None) -> tuple[str, ...]:
        if goals is None:
            return tuple(self.goals)
        return (goals,) if isinstance(goals, str) else tuple(goals)

    def context(self, goals: Iterable[str] | str | None = None):
        """The :class:`~tracechain.check.context.CheckContext` of the recorded events."""
        from .chain import Chain
        from .check.context import CheckContext
        from .events import EventChunk
        from .pipeline import ShapeOptions, count_chunks

        goals = self._goals(goals)
        key = (goals, len(self._events))
        if self._cache is not None and self._cache[0] == key:
            return self._cache[1]
        if not self._events:
            raise AssertionError(f"{self.name}: no events were recorded (call trace_recorder.record(session, event), "
                                 "or log with extra={'session': ..., 'event': ...})")
        chunk = EventChunk.from_lists(f"<{self.name}>", self._sessions, self._events,
                                      line=list(range(1, len(self._events) + 1)))
        counts = count_chunks([chunk], ShapeOptions(goals=goals))
        present = [g for g in goals if g in set(counts.states)]
        chain = Chain.from_counts(counts, goals=present)
        ctx = CheckContext(chain, goals=goals, keys=self.keys)
        self._cache = (key, ctx)
        return ctx

    def chain(self, goals: Iterable[str] | str | None = None):
        """The chain of the recorded events (:class:`tracechain.Chain`)."""
        return self.context(goals).chain

    # -- paths --------------------------------------------------------------------
    def path(self, session: str, upto: int | None = None, ended: bool = False, goals: tuple[str, ...] = ()) -> str:
        """``[start] -> a -> b ...`` for a recorded session, up to event number ``upto`` (1-based, over
        all events), cut after its first goal as the chain is."""
        steps = [_START]
        for k, (s, e) in enumerate(zip(self._sessions, self._events), start=1):
            if upto is not None and k > upto:
                break
            if s != session:
                continue
            steps.append(e)
            if e in goals:
                break
        if ended:
            steps.append(_END)
        if len(steps) > 25:
            steps = steps[:12] + ["..."] + steps[-12:]
        return " -> ".join(_show(x) for x in steps)

    def _raw_key(self, shown: str) -> str:
        """The recorded key behind a key as findings show it."""
        if getattr(self.keys, "raw", False):
            return shown
        return {self.keys(s): s for s in dict.fromkeys(self._sessions)}.get(shown, shown)

    def _explain(self, ctx, finding_loc, transition: tuple[str, str] | None, goals: tuple[str, ...]) -> str:
        if finding_loc is None:
            return ""
        ended = transition is not None and transition[1] == _END
        return f"\n    session {finding_loc.session!r}: " + self.path(
            self._raw_key(finding_loc.session), None if ended else finding_loc.line, ended=ended, goals=goals)

    # -- assertions -------------------------------------------------------------------
    def _run(self, rule: Any, options: Any, helper: str, goals: tuple[str, ...], explain, hint: str = "") -> None:
        __tracebackhide__ = True
        from .check.findings import Finding
        from .counts import Location

        frame = sys._getframe(2)
        where = (frame.f_code.co_filename, frame.f_lineno)
        t0 = time.perf_counter()
        ctx = self.context(goals)
        issues = list(rule.evaluate(ctx, options))
        seconds = time.perf_counter() - t0
        if self._collector is not None:
            findings = [
                Finding.from_issue(_relocate(i, where, Location), rule.id, f"{self.name}::{helper}", "error")
                for i in issues
            ]
            self._collector.add(rule, f"{self.name}::{helper}", findings, seconds)
        if issues:
            lines = [f"{helper}: {len(issues)} problem{'s' if len(issues) != 1 else ''} in the recorded traces"]
            for i in issues:
                lines.append(f"  {i.message}{explain(ctx, i)}")
            if hint:
                lines.append(hint)
            raise AssertionError("\n".join(lines))

    def assert_no_dead_ends(self, allow: Iterable[str] = (), goals: Iterable[str] | str | None = None) -> None:
        """No state (other than those in ``allow``) whose every exit ends the session."""
        __tracebackhide__ = True
        g = self._goals(goals)

        def explain(ctx, issue):
            loc = ctx.edge_location(ctx.resolve(issue.states[0]), ctx.chain.end)
            return self._explain(ctx, loc, (issue.states[0], _END), g)

        hint = "" if g else ("  (no goal is set, so a goal state counts as a dead end here: a goal is never a dead "
                             "end once named with goals=..., trace_recorder.goals or the ini option tracechain_goals)")
        self._run(_rules_mod().DeadEndRule(), {"allow": frozenset(allow)}, "assert_no_dead_ends", g, explain, hint)

    def assert_goal_reachable(self, goal: Iterable[str] | str | None = None) -> None:
        """Each goal (default: every goal) occurs and can be reached from the start."""
        __tracebackhide__ = True
        g = self._goals(goal) if goal is not None else tuple(self.goals)
        if not g:
            raise AssertionError("assert_goal_reachable: no goal given (pass goal=..., set trace_recorder.goals, or "
                                 "the ini option tracechain_goals)")
        all_goals = tuple(dict.fromkeys(tuple(self.goals) + g))

        def explain(ctx, issue):
            gi = ctx.resolve(issue.states[0])
            if gi is not None:
                return self._explain(ctx, ctx.state_location(gi), None, ())
            shown = list(self.sessions())[:3]
            more = f"\n    ... {len(self.sessions()) - 3} more sessions" if len(self.sessions()) > 3 else ""
            return "".join(f"\n    session {self.keys(s)!r}: {self.path(s, ended=True, goals=all_goals)}"
                           for s in shown) + more

        self._run(_rules_mod().GoalReachableRule(), {"goals": g}, "assert_goal_reachable", all_goals, explain)

    def assert_transitions_within(self, allowed: Any, end_anywhere: bool = False, start_anywhere: bool = False,
                                  goals: Iterable[str] | str | None = None) -> None:
        """Every recorded transition is in ``allowed`` (``{state: [next, ...]}`` or ``(state, next)`` pairs)."""
        __tracebackhide__ = True
        pairs: set[tuple[str, str]] = set()
        if isinstance(allowed, dict):
            for a, targets in allowed.items():
                for b in ([targets] if isinstance(targets, str) else targets):
                    pairs.add((str(a), str(b)))
        else:
            for a, b in allowed:
                pairs.add((str(a), str(b)))
        g = self._goals(goals)

        def explain(ctx, issue):
            return self._explain(ctx, issue.location, issue.transition, g)

        options = {"allowed": frozenset(pairs), "end_anywhere": end_anywhere, "start_anywhere": start_anywhere}
        self._run(_rules_mod().AllowedTransitionsRule(), options, "assert_transitions_within", g, explain)

    def check(self, rules_file: str | os.PathLike) -> None:
        """Every enabled rule of a rules file (its goals apply; input options other than goals do not)."""
        __tracebackhide__ = True
        from .check.config import load_rules

        rules = load_rules(os.fspath(rules_file))
        g = rules.goals or tuple(self.goals)
        rules.require(g, False)
        from .counts import state_label

        rules.check_names([state_label(st) for st in self.context(g).counts.states], (), g)
        problems = []
        for rc in rules.rules:
            if not rc.enabled:
                continue

            def explain(ctx, issue):
                if issue.transition is not None:
                    return self._explain(ctx, issue.location, issue.transition, g)
                return ""

            try:
                self._run(rc.rule, rc.options, f"check[{rc.id}]", g, explain)
            except AssertionError as err:
                problems.append(str(err))
        if problems:
            raise AssertionError("\n".join(problems))


def _show(name: str) -> str:
    from .report.text import safe_text

    return safe_text(name, 80)


def _relocate(issue, where: tuple[str, int], Location):
    """The issue located at the test's assertion line (the trace is in memory, not in a file)."""
    from dataclasses import replace

    session = issue.location.session if issue.location is not None else ""
    return replace(issue, location=Location(where[0], int(where[1]), session))


# -- pytest hooks -----------------------------------------------------------------------

_COLLECTOR = pytest.StashKey[_Collector]()
_KEYS = pytest.StashKey[Any]()


def _keys(config: pytest.Config):
    """One pseudonymiser for the whole run (the same key gets the same pseudonym in every test)."""
    got = config.stash.get(_KEYS, None)
    if got is None:
        from .privacy import Pseudonymizer

        raw = bool(config.getoption("tracechain_raw_keys") or config.getini("tracechain_raw_keys"))
        got = Pseudonymizer(salt=config.getoption("tracechain_salt"), raw=raw)
        config.stash[_KEYS] = got
    return got


def pytest_addoption(parser: pytest.Parser) -> None:
    group = parser.getgroup("tracechain", "tracechain trace assertions")
    group.addoption("--tracechain-report", metavar="FILE", default=None,
                    help="write the results of trace_recorder assertions as SARIF (.sarif), JUnit XML (.xml) or "
                         "JSON (.json)")
    parser.addini("tracechain_report", "file for the results of trace_recorder assertions (.sarif, .xml, .json)",
                  default="")
    parser.addini("tracechain_goals", "default goal states of trace_recorder (one per line)", type="linelist",
                  default=[])
    group.addoption("--tracechain-raw-keys", action="store_true", default=False,
                    help="show session keys as recorded in trace_recorder messages and reports (default: "
                         "pseudonymised)")
    group.addoption("--tracechain-salt", metavar="TEXT", default=None,
                    help="salt of the pseudonyms of session keys (default: drawn for the run, not stored)")
    parser.addini("tracechain_raw_keys", "show session keys as recorded (default: pseudonymised)", type="bool",
                  default=False)
    parser.addini("tracechain_session_field", "log-record attribute holding the session key", default="session")
    parser.addini("tracechain_event_field", "log-record attribute holding the event name", default="event")
    parser.addini("tracechain_log_level", "root logger level while a trace_recorder test runs (default: unchanged)",
                  default="")


def _report_path(config: pytest.Config) -> str | None:
    path = config.getoption("tracechain_report") or config.getini("tracechain_report")
    if not path:
        return None
    if not os.path.isabs(path):
        path = os.path.join(str(config.invocation_params.dir), path)
    return path


def _report_format(path: str) -> str:
    from .check.formats import CHECK_FORMATS

    found = CHECK_FORMATS.for_path(path)
    if found is None:
        raise pytest.UsageError(f"--tracechain-report {path}: use a .sarif, .xml or .json file name")
    return found.name


def pytest_configure(config: pytest.Config) -> None:
    path = _report_path(config)
    if path is not None:
        _report_format(path)  # fail early on a bad name
        config.stash[_COLLECTOR] = _Collector(keys=_keys(config))


def pytest_sessionfinish(session: pytest.Session, exitstatus: int) -> None:
    config = session.config
    path = _report_path(config)
    collector = config.stash.get(_COLLECTOR, None)
    if path is None or collector is None or hasattr(config, "workerinput"):
        return
    from .check.command import render
    from .report.writer import write_output

    write_output(path, render(collector.result(), _report_format(path)))


def pytest_terminal_summary(terminalreporter, exitstatus: int, config: pytest.Config) -> None:
    path = _report_path(config)
    if path is not None and config.stash.get(_COLLECTOR, None) is not None:
        terminalreporter.write_line(f"tracechain: wrote trace assertion results to {path}")


@pytest.fixture
def trace_recorder(request: pytest.FixtureRequest) -> Iterator[TraceRecorder]:
    """Records events of the code under test; see :mod:`tracechain.pytest_plugin`."""
    config = request.config
    rec = TraceRecorder(
        name=request.node.nodeid, goals=config.getini("tracechain_goals"),
        session_field=config.getini("tracechain_session_field") or "session",
        event_field=config.getini("tracechain_event_field") or "event",
        collector=config.stash.get(_COLLECTOR, None), keys=_keys(config),
    )
    root = logging.getLogger()
    root.addHandler(rec.handler)
    level = config.getini("tracechain_log_level")
    old = root.level
    if level:
        root.setLevel(level.upper() if isinstance(level, str) else level)
    try:
        yield rec
    finally:
        root.removeHandler(rec.handler)
        if level:
            root.setLevel(old)
