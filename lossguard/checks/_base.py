"""What a check is, and the context every check receives.

A check is one module in ``lossguard/checks/`` defining ``CHECK = Check(...)``; the registry
finds it by itself. ``run`` takes a :class:`Context` (the spec, the shared evaluator, the seed,
the effort and cached standard cases) and returns a :class:`~lossguard.result.CheckResult`.
Checks never print and never touch global state.
"""

from __future__ import annotations

import zlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._budget import case_count
from .._range import Beyond, case_reach, describe_max_logit, judged_dtypes
from ..cases import CaseStack, Cell, cases_per_cell, concat, ladder_stack, random_stack, shape_menu, target_domain
from ..effort import Effort, get_effort
from ..evaluate import Evaluator
from ..result import CheckResult, Example
from ..spec import LossSpec
from ..tolerance import DTYPES

__all__ = ["Check", "Context", "EAGER_DTYPE", "Judged", "always", "conclude", "never", "only", "planned", "within"]

#: The dtype of plain (not jitted) calls. A plain call compiles every primitive of the loss once
#: per (shape, dtype), so every check that makes them uses this dtype and ``Context.eager_cell``.
EAGER_DTYPE = "float64"


def always(spec: LossSpec) -> bool:
    return True


def never(spec: LossSpec) -> bool:
    return False


def only(*kinds: str, inputs: str | None = None) -> Callable[[LossSpec], str | None]:
    """An ``applies`` rule: the check needs one of ``kinds`` (and these inputs, if given)."""

    def rule(spec: LossSpec) -> str | None:
        if spec.kind not in kinds:
            return f"applies to kind {' or '.join(kinds)}, not {spec.kind}"
        if inputs is not None and spec.inputs != inputs:
            return f"applies to inputs={inputs}, not {spec.inputs}"
        return None

    return rule


@dataclass
class Judged:
    """A check's verdict on a stack of candidate cases cut down from one of its failing examples.

    Args:
        bad: (K,) whether the check's failure still shows on each case.
        example: ``example(k)`` is the :class:`~lossguard.result.Example` of failing case k
            (``None`` if the failure does not show again when case k is judged alone).
    """

    bad: np.ndarray
    example: Callable[[int], Example | None]


@dataclass(frozen=True)
class Check:
    """A named check.

    Args:
        name: the name users type after ``--skip``/``--expect`` (part of the contract).
        summary: one line on what it catches.
        run: ``run(ctx) -> CheckResult``.
        applies: ``None`` when the check makes sense for the spec, else the reason it does not.
        default: whether it runs without ``--expect`` (when it applies).
        skip_hint: when turning it off is legitimate (shown with a failure).
        order: position in the battery (cheap, foundational checks first).
        compiles: ``compiles(ctx)`` lists the compiled functions the check will ask for, as
            (operation, dtype, shape) with operation ``"vg"`` or ``"jvp"``; the runner compiles
            them in the background before the battery starts (:func:`planned` builds the list).
        still_fails: ``still_fails(ctx, example, stack) -> Judged``: does the failure ``example``
            shows still show on each case of ``stack`` (cases cut down from the example's, all of
            one shape)? The runner then reports the smallest failing input it finds beside the
            worst case (:mod:`lossguard.checks._smallest`); ``None``: not shrunk.
    """

    name: str
    summary: str
    run: Callable[[Context], CheckResult]
    applies: Callable[[LossSpec], str | None] = lambda spec: None
    default: Callable[[LossSpec], bool] = always
    skip_hint: str = ""
    order: int = 50
    compiles: Callable[[Context], list[tuple[str, str, Cell]]] | None = None
    still_fails: Callable[[Context, Example, CaseStack], Judged] | None = None


def conclude(name: str, *, summary: str, cases: int, failed: int, allowance: str, worst: Sequence[Example] = (),
             hint: str = "", details: dict[str, Any] | None = None, judged: int | None = None,
             most: int = 3) -> CheckResult:
    """How every check ends: its verdict from the counts, in one :class:`~lossguard.result.CheckResult`.

    ``fail`` when ``failed`` > 0; otherwise ``pass``, or ``skip`` ("nothing to judge: …") when
    none of the ``cases`` could be judged (``judged``, default ``cases``). The ``hint`` is kept
    only on a failure, and the ``most`` first of ``worst``. The runner times the check.

    Example:
        >>> conclude("shift", summary="unchanged on 4 cases", cases=4, failed=0, allowance="exact",
        ...          hint="never shown on a pass").verdict
        'pass'
        >>> conclude("finite", summary="finite on all 0 judged cases", cases=3, failed=0, allowance="",
        ...          judged=0).summary
        'nothing to judge: finite on all 0 judged cases'
    """
    judged = cases if judged is None else judged
    verdict = "fail" if failed else "pass" if judged else "skip"
    if verdict == "skip":
        summary = f"nothing to judge: {summary}"
    return CheckResult(name=name, verdict=verdict, summary=summary,
                       cases=cases, failed=failed, allowance=allowance, worst=list(worst[:most]),
                       hint=hint if failed else "", details=dict(details or {}))


def within(ctx: Context) -> str:
    """", |z| ≤ 1e+03" for a summary: the declared range of logits (nothing for probabilities)."""
    if ctx.spec.inputs == "probabilities":
        return ""
    return "" if np.isinf(ctx.spec.max_logit) else f", |z| ≤ {describe_max_logit(ctx.spec.max_logit)}"


def planned(dtypes: tuple[str, ...] = DTYPES, op: str = "vg") -> Callable[[Context], list[tuple[str, str, Cell]]]:
    """A ``compiles`` rule: ``op`` in each of ``dtypes`` at the shapes of ``Context.cells_for``."""

    def rule(ctx: Context) -> list[tuple[str, str, Cell]]:
        # float64 is the oracle's precision: compiled whether or not it is declared
        keep = [d for d in dtypes if d == "float64" or d in ctx.spec.dtypes]
        return [(op, d, cell) for d in keep for cell in ctx.cells_for(d)]

    return rule


@dataclass
class Context:
    """What a check receives: the declaration, the shared evaluator, the seed and effort (a name
    is accepted and turned into its :class:`~lossguard.effort.Effort`)."""

    spec: LossSpec
    evaluator: Evaluator
    seed: int = 0
    effort: Effort = "default"  # type: ignore[assignment]
    _stacks: dict[tuple[str, Cell], CaseStack] = field(default_factory=dict)
    #: replaces the shape menu when set (benchmarks measure growth with it); ``None``: the menu
    cells_override: tuple[Cell, ...] | None = None
    #: evaluator calls the battery has spent shrinking failures (bounded by twice
    #: ``effort.shrink_calls``: :mod:`lossguard.checks._smallest`)
    shrink_spent: int = 0

    def __post_init__(self) -> None:
        self.effort = get_effort(self.effort)

    def rng(self, purpose: str) -> np.random.Generator:
        """A generator seeded by (seed, purpose): each check draws its own, reproducibly."""
        return np.random.default_rng([self.seed, zlib.crc32(purpose.encode())])

    @property
    def cells(self) -> list[Cell]:
        if self.cells_override:
            return list(self.cells_override)
        menu = shape_menu(self.spec, self.effort)
        # shapes where the output reads differently from the probe's are left out (the header says so)
        return [c for c in menu if c not in self.evaluator.left_out] or menu

    def cells_for(self, dtype: str) -> list[Cell]:
        """The shapes a check evaluates in ``dtype``.

        float64 (the oracle's precision) gets every cell. Below it, efforts without
        ``low_precision_every_cell`` (quick and default) use the last cell only (the menu's largest class count): each further (dtype, shape)
        costs a compilation, and what depends on the batch size in a low precision (a sum that
        overflows) is the ``dtypes`` check's 4096-row batch. Thorough uses every cell.
        """
        cells = self.cells
        if dtype == "float64" or self.effort.low_precision_every_cell:
            return cells
        return cells[-1:]

    def judged_dtypes(self, wanted: tuple[str, ...] = DTYPES) -> tuple[str, ...]:
        """The dtypes of ``wanted`` inside the declared operating range (``spec.dtypes``)."""
        return judged_dtypes(self.spec.dtypes, wanted)

    def beyond(self) -> Beyond:
        """A fresh record of what a check sees past the declared largest |logit|."""
        return Beyond(self.spec.max_logit)

    def reach(self, predictions: np.ndarray) -> np.ndarray:
        """Per case: the largest |logit| (0 for probabilities), compared with ``spec.max_logit``."""
        return case_reach(self.spec.inputs, predictions)

    @property
    def eager_cell(self) -> Cell:
        """The one shape of plain (not jitted) calls, in :data:`EAGER_DTYPE`: the menu's first."""
        return self.cells_for(EAGER_DTYPE)[0]

    @property
    def domain(self) -> str:
        return target_domain(self.spec)

    def random_cases(self, cell: Cell) -> CaseStack:
        """The battery's shared random cases for ``cell`` (drawn once per run)."""
        key = ("random", cell)
        if key not in self._stacks:
            self._stacks[key] = random_stack(
                self.spec, cell, self.rng(f"random {cell}"), cases_per_cell(self.effort, cell), domain=self.domain
            )
        return self._stacks[key]

    def ladder_cases(self, cell: Cell) -> CaseStack:
        """The extreme-logit ladder for ``cell`` (drawn once per run)."""
        key = ("ladder", cell)
        if key not in self._stacks:
            self._stacks[key] = ladder_stack(self.spec, cell, self.rng(f"ladder {cell}"), domain=self.domain)
        return self._stacks[key]

    def standard_cases(self, cell: Cell) -> CaseStack:
        """Random and ladder cases of ``cell`` together. Once a case is large, only the first
        :func:`~lossguard._budget.case_count` random cases are kept (one at (4096, 1000)), each
        whole, and the ladder stays in cases of its own. Allowances scale with a case's largest
        |logit|: rows of different scales in one case (random cases are drawn at log-uniform
        scales from 0.01 to 30; the ladder reaches 1e4) would widen the allowance of the
        smaller-scale rows by as much as the ratio of the scales."""
        key = ("standard", cell)
        if key not in self._stacks:
            rand = self.random_cases(cell)
            keep = case_count(len(rand), cell.elements(), least=1)
            if keep < len(rand):
                rand = rand.take(np.arange(keep))
            self._stacks[key] = concat([rand, self.ladder_cases(cell)])
        return self._stacks[key]
