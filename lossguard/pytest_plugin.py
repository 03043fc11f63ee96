"""The pytest skin: one collected test per check, or a fixture for ad-hoc use.

Registered through the ``pytest11`` entry point, so installing lossguard is enough.

Runnable examples of both ways in: ``recipes/orchard/test_sorting_line.py``.

**A declaration that expands into tests.** In a test module, assign the result of
:func:`battery` to a name pytest collects (``test_*`` by default)::

    from lossguard.pytest_plugin import battery
    from conveyor_gaps import gap_ce
    test_gaps = battery(gap_ce, kind="categorical", reference="categorical_ce", ignore_label=-1)

pytest then collects one item per check that :func:`lossguard.checks.select_checks` picks for
the declaration, named ``test_gaps[reference]``, ``test_gaps[finite]`` … so ``-k``,
``-x``, ``--lf``, ``-n`` (pytest-xdist) and ``--junitxml`` behave as for any test. Checks that
do not apply (or were turned off) are collected as skipped, with the reason. Every item asserts
its own check's verdict and fails with that check's report; no check runs that no item of the
run asked for (``-k``, ``--lf``), and the items of a declaration share one battery run.

**Under pytest-xdist** a worker runs only the checks of the items it receives, and builds a
declaration's evaluator (the loss's compiled functions) once. With ``--dist loadgroup`` the
plugin puts each declaration's items in one ``xdist_group`` (unless ``marks=`` names one), so a
single worker runs it as one battery and compiles its functions once (the least total work).
With the default ``--dist load`` a declaration may be split, each worker compiling what its
checks need; a closing line says how many were. Verdicts never depend on the distribution.

**A fixture for your own test functions.** ``run_battery(loss, **declaration)`` runs the
battery with the session's settings, fails the test with the report when a check fails, and
returns the :class:`~lossguard.result.Result` (pass ``require_pass=False`` to inspect it
yourself)::

    def test_gaps_leave_empty_cups_out(run_battery):
        result = run_battery(gap_ce, kind="categorical", reference="categorical_ce",
                             ignore_label=-1, only=["reference"])
        assert result.check("reference").failed == 0

**Settings.** The run settings of :mod:`lossguard.options` (seed, effort) are pytest options
(``--lossguard-seed 3``) and ini keys (``lossguard_effort = quick``); the command line wins over
the ini file. The effective values are printed in the report header, and a closing section lists
every failed check with its worst case, and every item that got no verdict with its
:class:`Problem` (what failed: the declaration, loading the loss, a timeout …) in one line. Items carry the marker ``lossguard`` (``-m lossguard``).
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from typing import Any, NoReturn

import pytest

from ._plugin_state import Problem, _run, _safely, _State
from .errors import LossguardError
from .result import CAUTION
from .options import SETTINGS
from .spec import LossSpec, declare

__all__ = ["battery", "Battery", "CheckItem", "Problem", "problem_text", "run_battery"]

_MARKER = "lossguard"


# -- the declaration ------------------------------------------------------------------------
@dataclass(eq=False)
class Battery:
    """A declared loss waiting to be collected as one test item per check.

    Build it with :func:`battery`. ``spec`` is ``None`` when the declaration itself was bad;
    ``problem`` then says why (every collected item fails with its one line).
    """

    spec: LossSpec | None
    problem: Problem | None = None
    only: tuple[str, ...] | None = None
    seed: int | None = None
    effort: str | None = None
    marks: tuple[Any, ...] = ()
    module: str = ""
    lineno: int = 0

    def selection(self) -> list[tuple[str, str | None]]:
        """(check name, skip reason or None) for this declaration, in battery order."""
        from .checks import select_checks

        assert self.spec is not None
        only = list(self.only) if self.only is not None else None
        return [(check.name, reason) for check, reason in select_checks(self.spec, only)]


def _declared(loss: Any, declaration: dict[str, Any]) -> LossSpec | Problem:
    """The declared spec, or the declaration :class:`Problem` (never an exception into pytest)."""
    if isinstance(loss, LossSpec):
        if declaration:
            return Problem("declaration", f"declaration={sorted(declaration)}: expected no declaration arguments "
                                          f"next to a LossSpec; try passing either the spec or the loss with its "
                                          f"arguments")
        return loss
    try:
        return declare(loss, **declaration)
    except LossguardError as exc:
        return Problem("declaration", str(exc))


def battery(
    loss: Callable[..., Any] | LossSpec,
    *,
    only: Sequence[str] | None = None,
    seed: int | None = None,
    effort: str | None = None,
    marks: Iterable[Any] = (),
    **declaration: Any,
) -> Battery:
    """Declare a loss in a test module; pytest collects one item per check.

    Args:
        loss: the loss function, or a :class:`~lossguard.spec.LossSpec` from ``declare``.
        only: collect just these checks (names as in ``lossguard checks``).
        seed, effort: override the session settings for this declaration.
        marks: pytest marks applied to every item (e.g. ``[pytest.mark.slow]``).
        **declaration: the arguments of :func:`lossguard.declare` (``kind=…``, ``reference=…``).

    Returns:
        A :class:`Battery`; assign it to a name pytest collects, such as ``test_my_loss``.

    Example:
        >>> import jax
        >>> def ce(z, y):
        ...     return -jax.numpy.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1).mean()
        >>> test_ce = battery(ce, kind="categorical", reference="categorical_ce", only=["reference"])
        >>> [name for name, _ in test_ce.selection()]
        ['reference']
    """
    caller = sys._getframe(1)
    where = {"module": str(caller.f_globals.get("__name__", "")), "lineno": caller.f_lineno - 1}
    settings = {"only": tuple(only) if only is not None else None, "seed": seed, "effort": effort,
                "marks": tuple(marks)}
    spec = _declared(loss, declaration)
    if isinstance(spec, Problem):
        return Battery(spec=None, problem=spec, **settings, **where)
    return Battery(spec=spec, **settings, **where)


# -- collected items -------------------------------------------------------------------------
class CheckFailed(Exception):
    """Raised by a :class:`CheckItem` whose check failed; its text is the check's report."""


class CheckItem(pytest.Item):
    """One check of one declared loss, e.g. ``test_gaps[finite]``."""

    def __init__(self, *, battery: Battery, check: str, reason: str | None = None, **kw: Any) -> None:
        super().__init__(**kw)
        self.battery = battery
        self.check = check
        self.reason = reason
        self.add_marker(_MARKER)
        for mark in battery.marks:
            self.add_marker(mark)
        if reason is not None:
            self.add_marker(pytest.mark.skip(reason=reason))
        elif _grouped(self.config) and not any(getattr(m, "name", "") == "xdist_group" for m in battery.marks):
            # under --dist loadgroup a declaration's items share a group: one worker runs them all
            self.add_marker(pytest.mark.xdist_group(self.nodeid.rsplit("[", 1)[0].replace("@", "_")))
        self.user_properties.append(("lossguard_check", check))

    def runtest(self) -> None:
        result = self.battery.problem or _state(self.config).outcome(self.battery, self.session.items, self.check)
        if isinstance(result, Problem):
            self.user_properties += [(_PROBLEM_PROPERTY, result.what), (_FAILURE_PROPERTY, problem_text(result))]
            raise CheckFailed(problem_text(result))
        self.user_properties.append(("lossguard_verdict", result.verdict))
        if result.verdict == "skip":
            pytest.skip(result.summary)
        if not result.ok:
            self.user_properties.append((_FAILURE_PROPERTY, failure_text(result)))
            raise CheckFailed(failure_report(result))

    def repr_failure(self, excinfo: Any, style: Any = None) -> str | Any:
        if isinstance(excinfo.value, CheckFailed):
            return str(excinfo.value)
        return super().repr_failure(excinfo)

    def reportinfo(self) -> tuple[Any, int | None, str]:
        return self.path, self.battery.lineno, self.name


def _grouped(config: Any) -> bool:
    """Whether xdist runs with ``--dist loadgroup`` (on a worker, xdist sets ``loadgroup``)."""
    return bool(getattr(config.option, "loadgroup", False)) or getattr(config.option, "dist", None) == "loadgroup"


@pytest.hookimpl(tryfirst=True)
def pytest_pycollect_makeitem(collector: Any, name: str, obj: object) -> list[pytest.Item] | None:
    if not isinstance(obj, Battery):
        return None
    module = getattr(getattr(collector, "module", None), "__name__", None)
    if module is not None and obj.module and module != obj.module:
        return []  # imported from the module that declared it: collected there, not here
    if not collector.funcnamefilter(name):
        collector.warn(pytest.PytestCollectionWarning(
            f"{name} = battery(...) is not collected: its name does not match python_functions "
            f"(try test_{name})"))
        return []
    def item(check: str, bat: Battery, reason: str | None = None) -> CheckItem:
        # an explicit node id, as pytest builds it, so that pytests that read "name[param]" ids
        # structurally (--lf, --ff) see the same id as the one they stored
        full = f"{name}[{check}]"
        return CheckItem.from_parent(collector, name=full, nodeid=f"{collector.nodeid}::{full}", battery=bat,
                                     check=check, reason=reason)

    if obj.spec is None:
        return [item("declaration", obj)]
    try:
        selection = obj.selection()
    except LossguardError as exc:
        return [item("declaration", Battery(spec=None, problem=Problem("declaration", str(exc)), marks=obj.marks,
                                            module=obj.module, lineno=obj.lineno))]
    return [item(check, obj, reason) for check, reason in selection]


# -- per-run state (lossguard._plugin_state) ---------------------------------------------------
_STATE = pytest.StashKey[_State]()
#: user property carrying a failed check's one-line account (travels through xdist and JUnit XML)
_FAILURE_PROPERTY = "lossguard_failure"
#: user property saying what failed when an item has no verdict (:attr:`Problem.what`)
_PROBLEM_PROPERTY = "lossguard_problem"


def _state(config: Any) -> _State:
    return config.stash[_STATE]


def problem_text(p: Problem) -> str:
    """The one line an item (and the closing section) shows for a :class:`Problem`.

    Example:
        >>> problem_text(Problem("declaration", "kind='categorial': expected one of …; try 'categorical'"))
        "lossguard could not read the declaration: kind='categorial': expected one of …; try 'categorical'"
        >>> problem_text(Problem("defect", "KeyError: 'rows'", seed=3))
        "lossguard could not run the battery (KeyError: 'rows'); please report it with seed=3"
    """
    if p.what == "defect":
        return f"lossguard could not run the battery ({p.message}); please report it with seed={p.seed}"
    doing = "read the declaration" if p.what == "declaration" else "run the battery"
    return f"lossguard could not {doing}: {p.message}"


def failure_report(c: Any) -> str:
    """The failure message of a check: ``name verdict: summary`` first (pytest's short summary
    shows that line), then the check's text report."""
    from .report.text import render_check

    body = render_check(c).split("\n")[1:]
    return "\n".join([f"{c.name} {'failed' if c.verdict == 'fail' else 'could not run'}: {c.summary}"] + body)


def failure_text(c: Any) -> str:
    """A failed check in two lines: name, verdict and summary; then its worst case."""
    from .report.text import one_line_example

    text = f"{c.name} ({c.verdict}): {c.summary}"
    return text + (f"\nworst case: {one_line_example(c.worst[0])}" if c.worst else "")


# -- options, header, summary ----------------------------------------------------------------
def pytest_addoption(parser: Any) -> None:
    group = parser.getgroup("lossguard", "lossguard: numerical checks of loss functions")
    for s in SETTINGS:
        extra = f"; one of {', '.join(s.choices)}" if s.choices else ""
        group.addoption(s.pytest_flag, dest=s.ini, default=None, metavar=s.key.upper(),
                        help=f"{s.help}{extra}; default {s.default!r}; ini key {s.ini}")
        parser.addini(s.ini, help=f"lossguard: {s.help}{extra}", default="")


def _read_settings(config: Any) -> tuple[dict[str, Any], dict[str, str]]:
    values: dict[str, Any] = {}
    sources: dict[str, str] = {}
    for s in SETTINGS:
        raw, source = config.getoption(s.ini), s.pytest_flag
        if raw is None:
            raw, source = config.getini(s.ini), f"ini {s.ini}"
        if raw in (None, ""):
            values[s.name], sources[s.name] = s.default, "default"
            continue
        try:
            values[s.name] = s.parse(raw)
        except ValueError:
            expected = f"one of {', '.join(s.choices)}" if s.choices else f"a value of type {s.type.__name__}"
            raise pytest.UsageError(f"{source}={raw!r}: expected {expected}; try {s.default!r}") from None
        sources[s.name] = source
    if values.get("seed", 0) < 0:
        raise pytest.UsageError(f"{sources['seed']}={values['seed']!r}: expected a non-negative integer; try 0")
    for s in SETTINGS:
        if s.type is float and values[s.name] is not None and not values[s.name] > 0:
            raise pytest.UsageError(f"{sources[s.name]}={values[s.name]!r}: expected a positive number; "
                                    f"try {s.default if s.default is not None else 4}")
    return values, sources


def pytest_configure(config: Any) -> None:
    config.addinivalue_line("markers", f"{_MARKER}: a lossguard check of a declared loss")
    values, sources = _read_settings(config)
    worker = getattr(config, "workerinput", None)  # set by xdist on its workers
    alone = worker is None or worker.get("workercount") == 1
    state = _State(values, sources, whole=alone or _grouped(config), grouped=not alone and _grouped(config))
    config.stash[_STATE] = state
    config.pluginmanager.register(_Recorder(state), "lossguard-recorder")


def pytest_report_header(config: Any) -> str:
    from . import __version__

    state = _state(config)
    parts = [f"{name}={state.settings[name]} ({state.sources[name]})" for name in state.settings]
    return f"lossguard {__version__}: " + ", ".join(parts)


class _Recorder:
    """Collects the failed checks reported by items (here or on xdist workers) into the state,
    and on the xdist controller which workers ran each declaration's items."""

    def __init__(self, state: _State) -> None:
        self.state = state

    def pytest_runtest_logreport(self, report: Any) -> None:
        if report.when != "call":
            return
        worker = getattr(report, "worker_id", None)  # set by xdist on the controller's copy
        for key, value in report.user_properties:
            if key == _FAILURE_PROPERTY:
                self.state.failures.append((report.nodeid, str(value)))
            elif key == "lossguard_check" and worker:
                declaration = report.nodeid.split("@")[0].rsplit("[", 1)[0]
                self.state.workers.setdefault(declaration, set()).add(str(worker))


def pytest_terminal_summary(terminalreporter: Any, exitstatus: int, config: Any) -> None:
    state, tr = _state(config), terminalreporter
    split = sum(len(w) > 1 for w in state.workers.values())
    if split and _grouped(config):  # asked for, but xdist grouped nothing: recommending it would not help
        tr.write_line(f"lossguard: {split} of {len(state.workers)} declared losses ran on more than one "
                      f"worker although --dist loadgroup was given: pytest-xdist put none of their items in "
                      f"a group here (seen with pytest 9.2), so each worker compiled their functions")
    elif split:
        tr.write_line(f"lossguard: {split} of {len(state.workers)} declared losses ran on more than one "
                      f"worker, each compiling its functions there; --dist loadgroup keeps each on one worker")
    if state.declared or state.adhoc:  # a run that used lossguard says what its passes mean
        tr.write_line(f"lossguard: {CAUTION}")
    if not state.failures:
        return
    tr.write_sep("=", "lossguard: failed checks", red=True)
    last = None
    for nodeid, text in state.failures:
        if nodeid != last:
            tr.write_line(nodeid)
        last = nodeid
        for line in text.split("\n"):
            tr.write_line(f"    {line}")


# -- the fixture -----------------------------------------------------------------------------
@pytest.fixture
def run_battery(request: Any) -> Callable[..., Any]:
    """Run a battery inside your own test: ``run_battery(loss, kind=…, …) -> Result``.

    Keyword arguments: ``only``, ``seed``, ``effort`` (default: the session settings),
    ``require_pass`` (default True: fail the test with the report of the failed checks), and the
    arguments of :func:`lossguard.declare`. A :class:`~lossguard.spec.LossSpec` may be passed
    instead of the loss; the same spec object with the same settings runs once per session.
    """
    state = _state(request.config)

    def fail(problem: Problem) -> NoReturn:
        request.node.user_properties += [(_PROBLEM_PROPERTY, problem.what),
                                         (_FAILURE_PROPERTY, problem_text(problem))]
        pytest.fail(problem_text(problem), pytrace=False)

    def go(loss: Callable[..., Any] | LossSpec, *, only: Sequence[str] | None = None,
           seed: int | None = None, effort: str | None = None, require_pass: bool = True,
           **declaration: Any) -> Any:
        spec = _declared(loss, declaration)
        if isinstance(spec, Problem):
            fail(spec)
        s, e = state.resolve(seed, effort)
        chosen = list(only) if only is not None else None
        key = (id(spec), s, e, tuple(chosen) if chosen is not None else None)
        if key not in state.adhoc or state.adhoc[key][0] is not spec:
            state.adhoc[key] = (spec, _safely(_run, s, spec, s, e, chosen, **state.budgets()))
        result = state.adhoc[key][1]
        if isinstance(result, Problem):
            fail(result)
        if require_pass and not result.ok:
            bad = [c for c in result.checks if not c.ok]
            request.node.user_properties.extend((_FAILURE_PROPERTY, failure_text(c)) for c in bad)
            pytest.fail("\n".join(failure_report(c) for c in bad), pytrace=False)
        return result

    return go
