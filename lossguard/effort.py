"""What an effort profile changes, in one place: quick (a pre-commit hook), default (CI), thorough
(before a release).

Every number an effort sets is a field of one frozen :class:`Effort`; checks and engines read
fields (``ctx.effort.directions``), never compare effort names. The public API keeps taking the
names ``"quick"``, ``"default"`` and ``"thorough"``; :func:`get_effort` turns a name into its
profile, and :func:`validate_run` checks a seed and an effort together.

Example:
    >>> get_effort("quick").cases_per_cell, get_effort("thorough").directions
    (16, 4)
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from ._suggest import bad_value, did_you_mean
from .errors import SpecError
from .tolerance import DTYPES

__all__ = ["Effort", "EFFORTS", "PROFILES", "get_effort", "validate_run"]


@dataclass(frozen=True)
class Effort:
    """Every number an effort changes.

    Args:
        name: ``"quick"``, ``"default"`` or ``"thorough"``.
        menu_cells: how many of the shape menu's cells a battery uses (``None``: all of them).
        low_precision_every_cell: float32 and below at every cell (else at the last one only).
        cases_per_cell: random cases drawn per cell (fewer at large shapes).
        directions: finite-difference directions per case (gradient, second-order).
        search_examples: Hypothesis examples per shrinking search (property checks).
        masking_dtypes: dtypes the masking check evaluates.
        nonnegative_dtypes: dtypes the nonnegative check evaluates.
        profile_rows: rows per case of the stability profile.
        shrink_calls: most evaluator calls spent shrinking one failing check's worst case
            (:mod:`lossguard._shrink`), and half of what a whole battery may spend; each call is
            one stack of candidates of one shape, so at most one new compilation.
    """

    name: str
    menu_cells: int | None
    low_precision_every_cell: bool
    cases_per_cell: int
    directions: int
    search_examples: int
    masking_dtypes: tuple[str, ...]
    nonnegative_dtypes: tuple[str, ...]
    profile_rows: int
    shrink_calls: int = 8

    def __str__(self) -> str:
        return self.name


#: The three profiles by name, in increasing effort.
PROFILES: dict[str, Effort] = {e.name: e for e in (
    Effort("quick", menu_cells=1, low_precision_every_cell=False, cases_per_cell=16, directions=2,
           search_examples=25, masking_dtypes=("float32", "float64"), nonnegative_dtypes=("float64",),
           profile_rows=2, shrink_calls=6),
    Effort("default", menu_cells=2, low_precision_every_cell=False, cases_per_cell=48, directions=3,
           search_examples=50, masking_dtypes=DTYPES, nonnegative_dtypes=("float64", "float32"), profile_rows=4,
           shrink_calls=8),
    Effort("thorough", menu_cells=None, low_precision_every_cell=True, cases_per_cell=256, directions=4,
           search_examples=200, masking_dtypes=DTYPES, nonnegative_dtypes=("float64", "float32"),
           profile_rows=16, shrink_calls=16),
)}
#: Effort names, in increasing effort.
EFFORTS = tuple(PROFILES)


def get_effort(effort: str | Effort) -> Effort:
    """The profile named ``effort`` (an :class:`Effort` is returned as it is).

    Raises:
        SpecError: ``"effort=…: expected quick, default or thorough; try …"``.
    """
    if isinstance(effort, Effort):
        return effort
    if effort not in PROFILES:
        raise SpecError(bad_value("effort", effort, "quick, default or thorough", did_you_mean(str(effort), EFFORTS)))
    return PROFILES[effort]


def validate_run(seed: Any, effort: Any) -> Effort:
    """Check a run's seed (a non-negative integer) and effort; return the effort's profile.

    Raises:
        SpecError: one line for a bad seed or effort.
    """
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise SpecError(bad_value("seed", seed, "a non-negative integer", "try seed=0"))
    return get_effort(effort)
