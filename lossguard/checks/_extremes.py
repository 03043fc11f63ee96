"""The stacks of the stability checks: extreme ladders and probability edges, filled and rounded.

Notation and shapes as in :mod:`lossguard.cases` (K cases stacked on axis 0, class axis last).
:func:`extreme_stack` is the ``finite`` check's stack for one (shape, dtype); :func:`fill_to` and
:func:`on_grid` are shared by the stability checks. How packing works at large shapes is told in
:mod:`lossguard.checks.finite`.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from .._budget import call_size, case_count
from ..cases import PATTERNS, CaseStack, Cell, concat, draw_targets, ladder_case_count, ladder_stack
from ..ladders import common_grid, largest_finite, probability_edges, probability_rows, wide_magnitudes
from .._range import split_rungs
from .._simplex import looks_like_simplex, simplex_grid
from ._base import Context

__all__ = ["STACK_SIZE", "LEAST_CASES", "ACCUMULATOR", "fill_to", "on_grid", "extreme_stack", "overflow_bound"]

#: Where a batch mean's sum is expected to be held: float32 for the 16-bit formats (what JAX's
#: reductions do; a float16 sum that overflows while the mean fits is a bug), else the dtype.
ACCUMULATOR = {"float16": "float32", "bfloat16": "float32"}

#: At the menu's shapes every stack of the stability checks is filled to this many cases (the
#: compiled call size of small cases, :func:`lossguard._budget.call_size`): the filler costs nothing.
STACK_SIZE = 128
#: Cases per dtype the extreme ladder is packed into at the largest shapes: the rows whose loss
#: fits (judged), and the rows whose loss, or their share of a batch sum, overflows (exempt together).
LEAST_CASES = 2


def fill_to(stack: CaseStack, filler: CaseStack | Callable[[], CaseStack], size: int = STACK_SIZE) -> CaseStack:
    """``stack`` followed by cases of ``filler`` (cycled) up to ``size`` cases, but never past the
    slots its compiled calls hold anyway (``stack`` rounded up to a multiple of
    :func:`~lossguard._budget.call_size`): free cases at the menu's shapes, none at large ones.
    ``filler`` may be a function building the stack, called only when a case is needed.

    Example:
        >>> from lossguard import declare
        >>> from lossguard.cases import random_stack
        >>> spec = declare(lambda z, y: z.mean(), kind="categorical")
        >>> small = random_stack(spec, Cell(8, 3), np.random.default_rng(0), 5)
        >>> large = random_stack(spec, Cell(512, 4096), np.random.default_rng(0), 5)
        >>> len(fill_to(small, small)), len(fill_to(large, large))
        (128, 5)
    """
    per_call = call_size(stack.cell.elements())
    size = min(size, per_call * -(-len(stack) // per_call))
    short = size - len(stack)
    if short <= 0:
        return stack
    more = filler() if callable(filler) else filler
    return concat([stack, more.take(np.arange(short) % len(more))])


def on_grid(stack: CaseStack, dtypes: list[str] | tuple[str, ...]) -> CaseStack:
    """Predictions and float targets moved onto values every dtype of ``dtypes`` holds (rows of
    the simplex stay on it: :func:`lossguard._simplex.simplex_grid`)."""
    y = stack.targets
    if looks_like_simplex(y):  # distribution rows: rounded as a whole, so they stay on the simplex
        y = simplex_grid(y, dtypes)
    elif np.issubdtype(y.dtype, np.floating):
        y = common_grid(y, dtypes)
    return CaseStack(common_grid(stack.predictions, dtypes), y, stack.cell, list(stack.notes))


def _edge_rows(ctx: Context, cell: Cell, rng: np.random.Generator, y: np.ndarray, pattern: str,
               q: float) -> np.ndarray:
    """Probability rows for the targets ``y`` (some rows of a case) with an edge value ``q``."""
    if cell.c is None:
        return np.full(y.shape, q if pattern == "label" else 1.0 - q)
    labels = y if ctx.spec.kind == "categorical" else np.argmax(y, axis=-1)
    return probability_rows(q, labels, cell.c, pattern, rng)


def _edge_stack(ctx: Context, cell: Cell, dtype: str) -> CaseStack:
    """Probability inputs at the exact endpoints and just inside them, in ``dtype``.

    One case per (pattern, edge) at the menu's shapes; at large shapes packed like the ladder,
    ordered by −log of the probability the label gets, so that the two pairs whose true loss is
    infinite (label at 0, the rest at 1) share the last case.
    """
    spec, rng = ctx.spec, ctx.rng(f"finite edges {cell} {dtype}")
    pairs = [(pattern, float(q)) for q in probability_edges(dtype) for pattern in ("label", "rest")]
    k = case_count(len(pairs), cell.elements(), least=2)
    preds, targs, notes = [], [], []
    if k >= len(pairs):
        for pattern, q in pairs:
            y = draw_targets(spec, cell, rng, 1, domain=ctx.domain)[0]
            preds.append(_edge_rows(ctx, cell, rng, y, pattern, q))
            targs.append(y)
            notes.append(f"edge {pattern} p={q:.3g}")
        return CaseStack(np.stack(preds), np.stack(targs), cell, notes)
    with np.errstate(divide="ignore"):  # −log 0 = inf sorts last
        pairs.sort(key=lambda pq: float(-np.log(pq[1] if pq[0] == "label" else 1.0 - pq[1])))
    for group in np.array_split(np.arange(len(pairs)), k):
        y = draw_targets(spec, cell, rng, 1, domain=ctx.domain)[0]
        p = np.empty(cell.pred_shape())
        turn = np.arange(cell.n) % len(group)
        for j, i in enumerate(group):
            rows = np.flatnonzero(turn == j)
            p[rows] = _edge_rows(ctx, cell, rng, y[rows], *pairs[i])
        preds.append(p)
        targs.append(y)
        notes.append("edges packed, rows in turn: " + ", ".join(f"{a} p={b:.3g}" for a, b in (pairs[i] for i in group)))
    return CaseStack(np.stack(preds), np.stack(targs), cell, notes)


def overflow_bound(ctx: Context, cell: Cell, dtype: str) -> float:
    """A per-example loss above which a packed row may make its case unrepresentable in ``dtype``.

    The smaller of the dtype's largest value (the example's own loss) and, for a batch sum or
    mean, the largest value of the dtype the sum is held in (:data:`ACCUMULATOR`) over the
    number of examples (a share of the sum). Rows above it are packed apart.
    """
    ev, shape = ctx.evaluator, cell.pred_shape()
    count = int(np.prod(shape)) if ctx.spec.kind == "binary" else shape[0]
    if ev.output == "per_example":
        return largest_finite(dtype)
    held = dtype if ev.reduction == "sum" else ACCUMULATOR.get(dtype, dtype)
    return min(largest_finite(dtype), largest_finite(held) / count)


def extreme_stack(ctx: Context, cell: Cell, dtype: str) -> CaseStack:
    """The ladder (and probability edges) for ``dtype``, filled (:func:`fill_to`), rounded.

    At large shapes the ladder is packed into at least :data:`LEAST_CASES` cases, ordered by
    the size of the loss (see the module docstring).
    """
    mags = wide_magnitudes(dtype)
    cases = ladder_case_count(cell, len(mags) * len(PATTERNS), least=LEAST_CASES)
    # packed cases never mix rungs inside and beyond the declared |logit|: a case is judged by its
    # largest |z|, so the two halves are laddered apart (at the menu's shapes nothing changes)
    halves = [mags] if cases >= len(mags) * len(PATTERNS) else [h for h in split_rungs(mags, ctx.spec.max_logit) if h.size]
    ladders = []
    for i, part in enumerate(halves):
        k = cases if len(halves) == 1 else ladder_case_count(cell, len(part) * len(PATTERNS), least=LEAST_CASES)
        with np.errstate(over="ignore"):  # softmax of rows at the dtype's top: z − max z may be −inf
            ladders.append(ladder_stack(ctx.spec, cell, ctx.rng(f"finite ladder {cell} {dtype}" + " beyond" * i),
                                        mags=part, domain=ctx.domain, cases=k, order="loss", dtypes=[dtype],
                                        apart_above=overflow_bound(ctx, cell, dtype)))
    ladder = concat(ladders)
    parts = [ladder] + ([_edge_stack(ctx, cell, dtype)] if ctx.spec.inputs == "probabilities" else [])
    return on_grid(fill_to(concat(parts), lambda: ctx.random_cases(cell)), [dtype])
