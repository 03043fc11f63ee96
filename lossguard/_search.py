"""Minimal counterexamples: a seeded, scoped Hypothesis search for a failing case, and the shared
bookkeeping of the property checks (shift, classes, batch, padding, nonnegative, deterministic,
proper).

A property check first sweeps the battery's stacked cases in a few vectorised calls. When that
sweep finds a failure, :func:`smallest_failure` runs a Hypothesis search over the public
strategies (:mod:`lossguard.strategies`, shapes from the menu only) for a case on which the same
property fails, and lets Hypothesis shrink it: toward the first menu shape, zeros and simple
values. The search is fully scoped: its settings are one object passed to the test (no profile is
loaded), ``database=None``, no deadline, quiet, every health check suppressed, an explicit seed
derived from the run's seed, and a bounded number of property evaluations.

Notation: a *property* maps a drawn value to ``True`` (it fails there) or ``False``.

Example:
    >>> from hypothesis import strategies as st
    >>> found = smallest_failure(st.integers(0, 1000), lambda x: x * x > 200, seed=0)
    >>> found.value
    15

References:
    MacIver, D. R. and Donaldson, A. F., "Test-Case Reduction via Test-Case Generation: Insights
    from the Hypothesis Reducer", ECOOP 2020 (how Hypothesis shrinks).
"""

from __future__ import annotations

import time
import zlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, Generic, TypeVar

import numpy as np
from hypothesis import HealthCheck, Phase, Verbosity, given, settings
from hypothesis import seed as hypothesis_seed
from hypothesis import strategies as st
from hypothesis.errors import Flaky, HypothesisException

from .cases import CaseStack, Cell
from .checks._compare import Mismatch, examples_from, replay
from .errors import LossCallError
from .evaluate import NoGradient
from .result import CheckResult, Example
from .spec import LossSpec

__all__ = [
    "EXAMPLES",
    "Found",
    "SearchUnavailable",
    "Part",
    "Tally",
    "search_settings",
    "search_seed",
    "smallest_failure",
    "cell_of",
    "single",
    "mismatch_examples",
    "value_and_grad",
]

T = TypeVar("T")

#: Hypothesis examples generated per search, by effort.
EXAMPLES = {"quick": 25, "default": 50, "thorough": 200}
#: Property evaluations allowed per search (generation and shrinking), per generated example.
BUDGET_PER_EXAMPLE = 6


class _Failing(Exception):
    """Raised inside the search's test to mark a failing value."""


class SearchUnavailable(Exception):
    """The search cannot run here (inside another Hypothesis test, whose settings forbid nesting)."""


def search_settings(max_examples: int) -> settings:
    """The one settings object every search uses (no profile, no database, no output)."""
    return settings(
        database=None,
        max_examples=max_examples,
        deadline=None,
        derandomize=False,
        verbosity=Verbosity.quiet,
        phases=(Phase.generate, Phase.shrink),
        suppress_health_check=list(HealthCheck),
        report_multiple_bugs=False,
        print_blob=False,
    )


def search_seed(seed: int, purpose: str) -> int:
    """A 64-bit search seed from the run's seed and a purpose (the check's name)."""
    return (int(seed) << 32) ^ zlib.crc32(purpose.encode())


@dataclass
class Found(Generic[T]):
    """The smallest failing value a search ended with, and how to repeat the search."""

    value: T
    seed: int
    evaluations: int


def smallest_failure(
    strategy: st.SearchStrategy[T],
    fails: Callable[[T], bool],
    *,
    seed: int,
    max_examples: int = 50,
    budget: int | None = None,
) -> Found[T] | None:
    """Search ``strategy`` for a value on which ``fails`` is True and shrink it.

    Args:
        strategy: what to draw (shapes from a small menu, so a JAX loss compiles a few times).
        fails: the property; ``True`` means the value is a counterexample.
        seed: the search's seed (the same seed gives the same search).
        max_examples: values generated before giving up.
        budget: most evaluations of ``fails`` (generation and shrinking together); further
            candidates count as passing, which ends shrinking early. ``None`` is
            ``BUDGET_PER_EXAMPLE · max_examples``.

    Returns:
        :class:`Found` with the last (smallest) failing value, or ``None`` if none failed.
        A property whose answer changes from call to call (a history-dependent loss) still
        returns the smallest value seen failing.

    Raises:
        SearchUnavailable: when called inside a ``@given`` test that does not allow nesting.
    """
    limit = BUDGET_PER_EXAMPLE * max_examples if budget is None else budget
    failing: list[T] = []
    count = [0]

    def test(value: T) -> None:
        if count[0] >= limit:
            return
        count[0] += 1
        if fails(value):
            failing.append(value)
            raise _Failing

    try:
        run = hypothesis_seed(seed)(search_settings(max_examples)(given(strategy)(test)))
    except HypothesisException as exc:  # the outer test's health check refuses a nested search
        raise SearchUnavailable(str(exc).splitlines()[0]) from None
    try:
        run()
    except (_Failing, Flaky, HypothesisException):
        pass  # the failure itself, or a property that answered differently on replay
    if not failing:
        return None
    return Found(value=failing[-1], seed=seed, evaluations=count[0])


# ------------------------------------------------------------------------------ bookkeeping


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
        effort_examples = EXAMPLES.get(ctx.effort, EXAMPLES["default"])
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
        rerun = f"rerun: --seed {ctx.seed} --effort {ctx.effort} --only {self.name}"
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

    def result(self, t0: float, *, passed: str, failed: str, hint: str,
               details: dict[str, Any] | None = None) -> CheckResult:
        """The verdict: ``failed``/``passed`` are summary stems completed with the counts."""
        extra = dict(details or {})
        extra["cases_not_judged"] = self.unjudged
        extra["largest_error_over_allowance"] = self.closest
        if self.search:
            extra["search"] = self.search
        if self.failed:
            which = "; ".join(f"{w}: {n}" for w, n in self.failures_by_part.items())
            summary = f"{failed} on {self.failed} of {self.cases} cases ({which})"
            verdict = "fail"
        else:
            summary = f"{passed} on {self.cases} cases (largest error {self.closest:.2g} of its allowance)"
            verdict = "pass"
        if self.unjudged:
            summary += f"; {self.unjudged} not judged (non-finite values: the finite check's business)"
        return CheckResult(
            name=self.name, verdict=verdict, summary=summary, cases=self.cases, failed=self.failed,
            allowance="; ".join(self.rules), worst=self.worst[:3], hint=hint if self.failed else "",
            details=extra, seconds=time.perf_counter() - t0,
        )
