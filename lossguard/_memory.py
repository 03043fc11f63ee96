"""Memory bound: estimate each check's peak from the shapes before anything runs.

A battery's memory is its shapes: a check holds its largest stack of cases (float64 values,
gradients, a few temporaries and finite-difference points) at once, and the ``dtypes`` check
adds its batch of :data:`~lossguard.checks.dtypes.LARGE_BATCH` examples at the menu's class
count. The estimate is coarse on purpose — a line per element, its slope measured per check
(``benchmarks/memory_map.py`` prints measured peaks beside it) and rounded up — and it is made
before the first call, so ``--classes 100000`` ends at once with one line instead of being
killed by the kernel minutes later.

Notation: S = predictions elements of a check's largest stack of standard cases (random and
ladder, :meth:`~lossguard.checks.Context.standard_cases`); B = elements of the large batch.
Estimate = :data:`BASE_BYTES` + :data:`PER_ELEMENT` · S (+ :data:`PER_BATCH_ELEMENT` · B for
``dtypes``).

Example:
    >>> from lossguard import declare
    >>> spec = declare(lambda z, y: z.mean(), kind="categorical", classes=100_000)
    >>> peaks = check_peaks(spec, "quick")
    >>> peaks["dtypes"] > 30 * 2**30
    True
"""

from __future__ import annotations

import os
from typing import Any

from ._budget import case_count
from .cases import Cell, cases_per_cell, ladder_case_count, ladder_stack, shape_menu
from .errors import LossguardError

__all__ = ["MemoryBudgetError", "BASE_BYTES", "PER_ELEMENT", "PER_BATCH_ELEMENT", "BUDGET_FRACTION",
           "default_budget", "check_peaks", "enforce_memory"]

#: The process before any check: Python, numpy, JAX and compiled functions (measured 280–300 MB
#: with ``benchmarks/memory_map.py``; rounded up).
BASE_BYTES = 400 * 2**20
#: Peak bytes per element of a check's largest stack (measured slopes, quick effort, between
#: (8, 2000) and (8, 8000) logits: batch 180 B, gradient 120 B, the others less; rounded up).
PER_ELEMENT = 200
#: Peak bytes per element of the dtypes check's large batch (measured 40 B between 1000 and
#: 8000 classes; rounded up).
PER_BATCH_ELEMENT = 48
#: The default budget: this fraction of the machine's memory (or of the process's memory limit).
BUDGET_FRACTION = 0.5
_LARGE_BATCH = 4096  # checks/dtypes.LARGE_BATCH (not imported: no check module is loaded here)


class MemoryBudgetError(LossguardError):
    """A check would need more memory than the budget allows."""


def _machine_bytes() -> int:
    """Physical memory, or the cgroup (v2) limit of this process if lower."""
    total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") if hasattr(os, "sysconf") else 8 * 2**30
    try:
        with open("/sys/fs/cgroup/memory.max") as fh:
            text = fh.read().strip()
        if text.isdigit():
            total = min(total, int(text))
    except OSError:
        pass
    return int(total)


def default_budget() -> int:
    """:data:`BUDGET_FRACTION` of the machine's memory, in bytes."""
    return int(BUDGET_FRACTION * _machine_bytes())


def _stack_elements(spec: Any, cell: Cell, effort: str) -> int:
    """Predictions elements of the standard cases of ``cell``, counted without drawing them."""
    per = cell.elements()
    random = case_count(cases_per_cell(effort), per, least=1)
    small = Cell(cell.n, 3) if cell.c is not None else cell
    import numpy as np

    pairs = len(ladder_stack(spec, small, np.random.default_rng(0)))  # one case per pair when small
    return (random + ladder_case_count(cell, pairs)) * per


def check_peaks(spec: Any, effort: str, cells: list[Cell] | None = None) -> dict[str, int]:
    """Estimated peak bytes of each check (by name) at these cells (default: the menu)."""
    from .checks import all_checks

    cells = cells or shape_menu(spec, effort)
    largest = max(cells, key=lambda c: c.elements())
    stack = _stack_elements(spec, largest, effort)
    peaks = {name: BASE_BYTES + PER_ELEMENT * stack for name in all_checks()}
    batch = 2 * _LARGE_BATCH * (cells[0].c or 1) * (2 if spec.kind == "distribution" else 1)
    peaks["dtypes"] += PER_BATCH_ELEMENT * batch
    return peaks


def _gib(n: float) -> str:
    return f"{n / 2**30:.3g} GiB"


def enforce_memory(ctx: Any, names: list[str], budget_gib: float | None) -> None:
    """Refuse the battery, before anything runs, if a check of ``names`` would exceed the budget.

    Raises:
        SpecError: ``budget_gib`` is not a positive number.
        MemoryBudgetError: one line naming the check, the shape, the estimate and the budget.
    """
    from ._suggest import bad_value
    from .errors import SpecError

    if budget_gib is not None and (isinstance(budget_gib, bool) or not isinstance(budget_gib, (int, float))
                                   or not budget_gib > 0):
        raise SpecError(bad_value("memory_budget", budget_gib, "a positive number of GiB", "try memory_budget=4"))
    budget = default_budget() if budget_gib is None else budget_gib * 2**30
    cells = list(ctx.cells)
    peaks = check_peaks(ctx.spec, ctx.effort, cells)
    over = [(peaks[n], n) for n in names if n in peaks and peaks[n] > budget]
    if not over:
        return
    need, name = max(over)
    cell = max(cells, key=lambda c: c.elements())
    shape = (_LARGE_BATCH, cells[0].c) if name == "dtypes" and cells[0].c else cell.pred_shape()
    raise MemoryBudgetError(
        f"memory-budget={_gib(budget)}: check {name} would need about {_gib(need)} at predictions of shape "
        f"{shape}; expected at most the budget; try fewer classes, --skip {name}, or a larger --memory-budget")
