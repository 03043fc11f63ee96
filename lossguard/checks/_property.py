"""Bookkeeping shared by the property checks (shift, classes, batch, padding, nonnegative,
deterministic, proper): one compared property over a stack (:class:`Part`), what a check
accumulates over its sweeps and the verdict it turns into (:class:`Tally`), and the Hypothesis
search that shrinks a failing case (:mod:`lossguard._search`).

Notation: a stack of K cases on axis 0 (:mod:`lossguard.cases`); a *part* marks which of them
broke one compared property and by how much (error over allowance).

Example:
    >>> import numpy as np
    >>> t = Tally("shift")
    >>> t.add([Part("value", np.array([False, True]), np.array([0.5, 3.0]), "rule", lambda most: [])], 2)
    >>> t.failed, t.cases, t.failures_by_part
    (1, 2, {'value': 1})
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, TypeVar

import numpy as np
from hypothesis import strategies as st

from .._search import SearchUnavailable, search_seed, smallest_failure
from ..cases import CaseStack, Cell
from ..errors import LossCallError
from ..evaluate import NoGradient
from ..result import CheckResult, Example
from ..spec import LossSpec
from ..strategies import cases
from ._base import conclude
from ._compare import Mismatch, examples_from, replay

__all__ = ["Part", "Tally", "cell_of", "single", "mismatch_examples", "value_and_grad"]

T = TypeVar("T")


def cell_of(spec: LossSpec, predictions: np.ndarray) -> Cell:
    """The menu cell of one case's predictions (class axis last)."""
    shape = np.shape(predictions)
    if spec.kind != "binary":
        return Cell(shape[0], shape[1])
    return Cell(shape[0]) if len(shape) == 1 else Cell(shape[0], d=shape[1])


def single(spec: LossSpec, predictions: np.ndarray, targets: np.ndarray, repeat: int = 1) -> CaseStack:
    """A stack holding one case ``repeat`` times (float64 predictions).

    One case is enough for the search to reuse the sweep's compiled functions: the JAX adapter
    pads every stack of a shape to that shape's one call size (:func:`lossguard._budget.call_size`).
    ``repeat`` is for checks that need the same case several times in one stack.
    """
    z = np.asarray(predictions, dtype=np.float64)
    y = np.asarray(targets)
    zs, ys = np.repeat(z[None], repeat, axis=0), np.repeat(y[None], repeat, axis=0)
    return CaseStack(zs, ys, cell_of(spec, z), [""] * repeat)


def value_and_grad(ctx: Any, stack: CaseStack, dtype: str = "float64") -> tuple[np.ndarray, np.ndarray | None]:
    """(values, gradients) of a stack; gradients ``None`` when the loss has no gradient oracle."""
    ev = ctx.evaluator
    if ev.has_gradient:
        try:
            return ev.value_and_grad(stack, dtype)
        except NoGradient:
            pass
    return ev.values(stack, dtype), None


def mismatch_examples(
    spec: LossSpec,
    m: Mismatch,
    what: str,
    calls: Sequence[tuple[str, CaseStack]],
    relation: str,
    *,
    most: int = 2,
) -> list[Example]:
    """Examples of the worst failing cases of ``m``; the replay shows every call compared.

    ``calls`` are (name, stack) pairs whose case k was evaluated; ``relation`` states what should
    hold between them (``"a == b"``).
    """
    def replay_of(k: int) -> str:
        lines = [f"{name} = {replay(spec, s.predictions[k], s.targets[k])}" for name, s in calls]
        return "\n".join(lines) + f"\n# expected {relation}"

    return examples_from(m, spec, calls[0][1], what, most=most, replay_of=replay_of)


@dataclass
class Part:
    """One compared property over a stack of K cases.

    Args:
        what: what was compared, in words.
        bad: (K,) which cases broke it.
        ratio: (K,) error over allowance (0 where exact, inf for a finiteness mismatch).
        rule: the allowance rule in words.
        examples: builds up to ``most`` examples of the failing cases.
    """

    what: str
    bad: np.ndarray
    ratio: np.ndarray
    rule: str
    examples: Callable[[int], list[Example]]


@dataclass
class Tally:
    """What a property check accumulates over its sweeps, and the result it turns into."""

    name: str
    cases: int = 0
    failed: int = 0
    unjudged: int = 0
    worst: list[Example] = field(default_factory=list)
    rules: dict[str, None] = field(default_factory=dict)
    failures_by_part: dict[str, int] = field(default_factory=dict)
    closest: float = 0.0
    search: str = ""

    def add(self, parts: Sequence[Part], k: int, *, most: int = 2) -> None:
        """Count a stack of ``k`` cases judged by ``parts``."""
        bad = np.zeros(k, bool)
        by_what: dict[str, np.ndarray] = {}
        for p in parts:
            self.rules[p.rule] = None
            if p.bad.any():
                by_what[p.what] = by_what.get(p.what, np.zeros(k, bool)) | p.bad
                if len(self.worst) < 6:
                    self.worst += p.examples(most)
            finite = p.ratio[np.isfinite(p.ratio) & ~p.bad]
            if finite.size:
                self.closest = max(self.closest, float(np.max(finite)))
            bad |= p.bad
        for what, mask in by_what.items():
            self.failures_by_part[what] = self.failures_by_part.get(what, 0) + int(mask.sum())
        self.cases += k
        self.failed += int(bad.sum())

    def shrink(
        self,
        ctx: Any,
        strategy: st.SearchStrategy[T],
        judge: Callable[[T], list[Part]],
        *,
        max_examples: int | None = None,
    ) -> None:
        """Search for the smallest case failing ``judge`` and put its example first."""
        effort_examples = ctx.effort.search_examples
        n = effort_examples if max_examples is None else min(max_examples, effort_examples)
        s = search_seed(ctx.seed, self.name)

        def fails(value: T) -> bool:
            try:
                return any(bool(p.bad[0]) for p in judge(value))
            except LossCallError:  # the loss raised here: not a counterexample of this property
                return False

        try:
            found = smallest_failure(strategy, fails, seed=s, max_examples=n)
        except SearchUnavailable as exc:
            self.search = f"no Hypothesis search: {exc}; the cases shown come from the sweep"
            return
        rerun = f"rerun with seed={ctx.seed}, effort={str(ctx.effort)!r}, only={[self.name]!r}"
        if found is None:
            self.search = (f"a Hypothesis search (seed {s}, {n} examples) found no smaller failing case; "
                           f"the cases shown come from the sweep ({rerun})")
            return
        try:
            parts = [p for p in judge(found.value) if bool(p.bad[0])]
        except LossCallError:
            parts = []
        if not parts:  # a history-dependent property: keep the sweep's cases
            self.search = f"a Hypothesis search (seed {s}) found a case that did not fail again on replay"
            return
        example = parts[0].examples(1)[0]
        shape = "x".join(str(d) for d in np.shape(example.predictions))
        example.note = (f"smallest failing case (predictions {shape}) found by a Hypothesis search (seed {s}, "
                        f"{found.evaluations} evaluations; {rerun})" + (f"; {example.note}" if example.note else ""))
        self.worst.insert(0, example)
        self.search = f"shrunk by a Hypothesis search (seed {s}, {found.evaluations} evaluations)"

    def sweep(self, ctx: Any, judge: Callable[[Cell, CaseStack], tuple[list[Part], np.ndarray | None]],
              judge_one: Callable[[CaseStack], list[Part]]) -> None:
        """Judge the standard cases of every cell, then shrink at the first cell that failed.

        ``judge(cell, stack)`` returns the parts of a stack and which of its cases were not
        judged (``None``: all were); ``judge_one(stack)`` the parts of a one-case stack that the
        search builds from a case of that cell (:func:`single`).
        """
        failing = None
        for cell in ctx.cells:
            stack = ctx.standard_cases(cell)
            parts, unjudged = judge(cell, stack)
            self.add(parts, len(stack))
            self.unjudged += 0 if unjudged is None else int(np.sum(unjudged))
            if failing is None and any(p.bad.any() for p in parts):
                failing = cell
        if failing is not None:
            self.shrink(ctx, cases(ctx.spec, shapes=[failing]), lambda case: judge_one(single(ctx.spec, *case)))

    def result(self, *, passed: str, failed: str, hint: str, details: dict[str, Any] | None = None) -> CheckResult:
        """The verdict: ``failed``/``passed`` are summary stems completed with the counts."""
        extra = dict(details or {})
        extra["cases_not_judged"] = self.unjudged
        extra["largest_error_over_allowance"] = self.closest
        if self.search:
            extra["search"] = self.search
        if self.failed:
            which = "; ".join(f"{w}: {n}" for w, n in self.failures_by_part.items())
            summary = f"{failed} on {self.failed} of {self.cases} cases ({which})"
        else:
            summary = f"{passed} on {self.cases} cases (largest error {self.closest:.2g} of its allowance)"
        if self.unjudged:
            summary += f"; {self.unjudged} not judged (non-finite values: the finite check's business)"
        return conclude(self.name, summary=summary, cases=self.cases, failed=self.failed,
                        allowance="; ".join(self.rules), worst=self.worst, hint=hint, details=extra)
