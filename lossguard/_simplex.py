"""Target rows of the probability simplex moved onto a low-precision grid without leaving it.

Rounding each entry of a row y (Σ y = 1) to float16 or bfloat16 on its own leaves a row that
sums to 1.00098 or 0.99805: an input the ``distribution`` kind promises never to send. Here the
row is rounded as a whole, by the largest-remainder method on a common quantum q:

    q = the largest spacing any dtype of the grid has at the row's largest entry m
        (2^(⌊log2 m⌋ − p + 1), p the dtype's significand bits, and never below its smallest
        subnormal),
    n_c = ⌊y_c / q⌋, then the 1/q − Σ n_c entries with the largest remainders get one more q.

Every n_c·q is at most m (plus one q) with at most p significant bits, so it lies on every grid,
and the row sums to exactly 1. Entries that are exactly 0 stay 0 (their remainder is 0, and
at least one more entry than needed has a positive remainder); entries below q may become 0
or q. Rows that rounding entry by entry already leaves on the simplex are kept as rounded.

Reference: the largest-remainder (Hamilton) apportionment method; see M. L. Balinski and
H. P. Young, "Fair Representation", Yale University Press, 1982.

Example:
    >>> import numpy as np
    >>> y = np.full((1, 1, 3), 1 / 3)
    >>> out = simplex_grid(y, ["float16"])
    >>> float(out.sum()), bool(np.all(out.astype(np.float16).astype(np.float64) == out))
    (1.0, True)
"""

from __future__ import annotations

from collections.abc import Sequence

import ml_dtypes
import numpy as np

from ._formats import common_grid, flush_subnormals, smallest_subnormal
from .tolerance import dtype_of

__all__ = ["looks_like_simplex", "simplex_grid", "flushed"]


def looks_like_simplex(y: np.ndarray) -> bool:
    """Float rows (axis −1 of a (K, N, C) array) that are nonnegative and sum to 1 (to 1e-9)."""
    y = np.asarray(y)
    if y.ndim != 3 or y.shape[-1] < 2 or not np.issubdtype(y.dtype, np.floating):
        return False
    with np.errstate(invalid="ignore"):
        return bool(np.all(y >= 0) and np.all(np.abs(y.sum(axis=-1) - 1.0) <= 1e-9))


def _quantum(m: np.ndarray, dtypes: Sequence[str]) -> np.ndarray:
    """Per row: the largest spacing of any dtype at the row's largest entry ``m`` (> 0)."""
    q = np.zeros_like(m)
    e = np.floor(np.log2(m))
    for d in dtypes:
        bits = int(ml_dtypes.finfo(dtype_of(d)).nmant) + 1  # significand bits p, implicit one included
        q = np.maximum(q, np.maximum(np.exp2(e - bits + 1), smallest_subnormal(d)))
    return q


def simplex_grid(y: np.ndarray, dtypes: Sequence[str]) -> np.ndarray:
    """``y`` (rows on the simplex, class axis last) on every grid of ``dtypes``, rows summing to
    exactly 1 (see the module docstring)."""
    y = np.asarray(y, dtype=np.float64)
    out = common_grid(y, dtypes)
    off = out.sum(axis=-1) != 1.0
    if not off.any():
        return out
    rows = y[off]  # (R, C)
    q = _quantum(rows.max(axis=-1), dtypes)[:, None]
    units = rows / q
    n = np.floor(units)
    short = np.rint(1.0 / q[:, 0] - n.sum(axis=-1)).astype(np.int64)  # quanta still to hand out
    order = np.argsort(-(units - n), axis=-1, kind="stable")  # largest remainder first
    give = np.arange(rows.shape[-1])[None, :] < short[:, None]
    np.put_along_axis(n, order, np.take_along_axis(n, order, -1) + give, -1)
    out[off] = n * q
    return out


def flushed(stack, dtype: str):  # type: ignore[no-untyped-def]
    """``stack`` (a :class:`~lossguard.cases.CaseStack`) with the subnormals of ``dtype`` in its
    predictions and float targets replaced by 0, as XLA on CPU computes with them; simplex rows
    whose entries were flushed are repaired onto the simplex in ``dtype``."""
    y = stack.targets
    if np.issubdtype(y.dtype, np.floating):
        simplex = looks_like_simplex(y)
        y = flush_subnormals(y, dtype)
        if simplex:
            y = simplex_grid(y / y.sum(axis=-1, keepdims=True), [dtype])
    return type(stack)(flush_subnormals(stack.predictions, dtype), y, stack.cell, list(stack.notes))
