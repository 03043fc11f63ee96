"""Per-run state of the pytest plugin: what one pytest process (or xdist worker) keeps.

The plugin (:mod:`lossguard.pytest_plugin`) stores one :class:`_State` in ``config.stash``. It
holds the effective settings, the check results of each declaration run in this process, the
declarations' evaluators (their compiled functions, a few kept alive at a time), and the failed
checks for the closing summary. Running a battery never raises into pytest: :func:`_safely`
turns any failure into a :class:`Problem` — what failed and its one-line message — that every
item of the declaration then reports (the plugin renders it).

Example:
    >>> _safely(lambda: 1 / 0, 7)
    Problem(what='defect', message='ZeroDivisionError: division by zero', seed=7)
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Literal, TypeVar

from .errors import CheckNameError, LossCallError, LossguardError, SpecError, TargetLoadError
from .spec import LossSpec

if TYPE_CHECKING:
    from .evaluate import Evaluator
    from .pytest_plugin import Battery
    from .result import CheckResult, Result

__all__ = ["Problem", "What", "_State", "_Declared", "_safely", "_run", "_new_evaluator"]

_T = TypeVar("_T")

#: What failed, when the plugin has no verdict to show: the declaration itself (``battery()``,
#: the fixture's arguments, a check name), loading or probing the loss, a call of the loss past
#: its time limit, an output lossguard cannot use, another refusal of the run (a budget), or a
#: defect of lossguard itself.
What = Literal["declaration", "load", "timeout", "output", "run", "defect"]

#: Most declarations whose Evaluator (its compiled functions, ~30 MB each) an xdist worker keeps
#: alive (it cannot know which items come next); the least recently used is dropped.
_LIVE_EVALUATORS = 4


@dataclass(frozen=True)
class Problem:
    """Why the plugin has no verdict for an item: what failed and the one line saying why.

    ``message`` is the error's own line (``"name=value: expected …; try …"`` for lossguard's
    errors, ``"Type: first line"`` for a defect); ``seed`` is the seed to quote in a report of a
    defect. :func:`lossguard.pytest_plugin.problem_text` renders it.
    """

    what: What
    message: str
    seed: int | None = None


@dataclass(eq=False)
class _Declared:
    """A declaration in this process: its check results, its Evaluator (or why none) if kept."""

    battery: Battery  # kept alive here, so the id() it is filed under cannot be reused
    results: dict[str, CheckResult | Problem] = field(default_factory=dict)
    evaluator: Evaluator | Problem | None = None


@dataclass
class _State:
    """What one pytest run (one xdist worker) keeps: settings, results, failed checks."""

    settings: dict[str, Any]
    sources: dict[str, str]
    #: whether this process runs all items of each declaration it runs (no xdist, or a lone or
    #: loadgroup worker); a worker under another --dist cannot know which items will come
    whole: bool = True
    #: ``whole`` only because of ``--dist loadgroup``: trusted for a declaration only if xdist
    #: really grouped its items (their node ids carry xdist's "@group" suffix)
    grouped: bool = False
    declared: dict[int, _Declared] = field(default_factory=dict)
    live: OrderedDict[int, None] = field(default_factory=OrderedDict)  # declarations with an Evaluator
    failures: list[tuple[str, str]] = field(default_factory=list)  # (node id, rendered account)
    workers: dict[str, set[str]] = field(default_factory=dict)  # declaration → xdist workers that ran it
    adhoc: dict[tuple[Any, ...], tuple[LossSpec, Result | Problem]] = field(default_factory=dict)

    def budgets(self) -> dict[str, Any]:
        """The time and memory budgets, as keywords of :func:`lossguard.run`."""
        return {k.replace("-", "_"): self.settings[k] for k in ("call-timeout", "time-budget", "memory-budget")
                if k in self.settings}

    def resolve(self, seed: int | None, effort: str | None) -> tuple[int, str]:
        return (self.settings["seed"] if seed is None else seed,
                self.settings["effort"] if effort is None else effort)

    def outcome(self, bat: Battery, items: Sequence[Any], check: str) -> CheckResult | Problem:
        """The CheckResult of ``check`` for ``bat``, or the :class:`Problem` that prevented it.

        When this process runs whole declarations (:attr:`whole`), the first item of one
        runs the checks of all its items in one battery (XLA compiles ahead for all of them);
        otherwise (an xdist worker, which cannot know which items will come) just ``check``, on
        the declaration's Evaluator, kept for its next items here. No other check ever runs.
        """
        entry = self.declared.setdefault(id(bat), _Declared(bat))
        if check in entry.results:
            return entry.results[check]
        seed, effort = self.resolve(bat.seed, bat.effort)
        wanted = [check]
        # this declaration's items that run a check (skipped ones get no xdist group, so no "@")
        mine = [i for i in items if getattr(i, "battery", None) is bat and i.reason is None]
        whole = self.whole and (not self.grouped or all("@" in i.nodeid for i in mine))
        if whole:
            wanted += [i.check for i in mine if i.check not in entry.results and i.check != check]
        if entry.evaluator is None:
            entry.evaluator = _safely(_new_evaluator, seed, bat.spec, self.budgets().get("call_timeout"))
        if isinstance(entry.evaluator, Problem):
            return entry.evaluator  # the loss could not even be probed: every item says so
        result = _safely(_run, seed, bat.spec, seed, effort, wanted, entry.evaluator, **self.budgets())
        for name in wanted:
            entry.results[name] = result if isinstance(result, Problem) else result.check(name)
        if whole:  # every item of the declaration is answered: its Evaluator is no longer needed
            entry.evaluator = None
            self.live.pop(id(bat), None)
        else:  # more of its items may come: keep the Evaluator, the few most recent of them
            self.live[id(bat)] = None
            self.live.move_to_end(id(bat))
            while len(self.live) > _LIVE_EVALUATORS:
                self.declared[self.live.popitem(last=False)[0]].evaluator = None
        return entry.results[check]


def _new_evaluator(spec: LossSpec, call_timeout: float | None = None) -> Evaluator:
    from ._deadline import Limits
    from ._guard import Guard
    from .evaluate import Evaluator

    return Evaluator(spec, Guard(Limits(call_seconds=call_timeout)) if call_timeout else None)


def _run(spec: LossSpec, seed: int, effort: str, only: list[str] | None, evaluator: Any = None,
         **budgets: Any) -> Result:
    from .runner import run

    return run(spec, seed=seed, effort=effort, only=only, evaluator=evaluator, **budgets)


def _what(exc: BaseException) -> What:
    """Which :data:`What` an exception raised while running a battery stands for."""
    from ._deadline import CallTimeout, Stopped

    if isinstance(exc, (LossCallError, TargetLoadError)):
        return "load"
    if isinstance(exc, CallTimeout):
        return "timeout"
    if isinstance(exc, Stopped):  # the other stop of the guard: an output lossguard cannot use
        return "output"
    if isinstance(exc, (SpecError, CheckNameError)):  # the declaration, or the checks it selects
        return "declaration"
    return "run" if isinstance(exc, LossguardError) else "defect"


def _safely(fn: Callable[..., _T], seed: int, *args: Any, **kwargs: Any) -> _T | Problem:
    """``fn(*args, **kwargs)``, or the :class:`Problem` that kept lossguard from running the battery."""
    from .adapters._base import first_line

    from ._deadline import Stopped

    try:
        return fn(*args, **kwargs)
    except (LossguardError, Stopped) as exc:
        return Problem(_what(exc), str(exc))
    except Exception as exc:  # a defect in lossguard itself: its first line, with the seed
        return Problem("defect", first_line(exc), seed)
