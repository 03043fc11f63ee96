"""Minimal counterexamples: a seeded, scoped Hypothesis search for a failing case.

The property checks (shift, classes, batch, padding, nonnegative, deterministic, proper) keep
their bookkeeping in :mod:`lossguard.checks._property`, which calls the search defined here.

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

import zlib
from collections.abc import Callable
from dataclasses import dataclass
from typing import Generic, TypeVar

from hypothesis import HealthCheck, Phase, Verbosity, given, settings
from hypothesis import seed as hypothesis_seed
from hypothesis import strategies as st
from hypothesis.errors import Flaky, HypothesisException


__all__ = ["BUDGET_PER_EXAMPLE", "Found", "SearchUnavailable", "search_settings", "search_seed",
           "smallest_failure"]

T = TypeVar("T")

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
