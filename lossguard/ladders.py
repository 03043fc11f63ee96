"""Extreme-value ladders: the logit magnitudes and row patterns a quick test never tries.

Notation: a row is one example's logits ``z`` of length C (class axis last); ``t`` is its label.
Each pattern places a magnitude ``M`` from :func:`magnitudes` into a row:

- ``right``: z_t = +M, others 0 (confidently right);
- ``wrong``: z_t = −M, one other class +M (confidently wrong);
- ``equal``: every class M (ties; value must be ln C for softmax CE whatever M);
- ``huge``: one random class +M, others drawn at scale 1;
- ``mixed``: rows of very different scales in one batch: row scales s = M·10^U(−6, 0), one
  row at exactly M, each row's logits spread over [0, s].

These feed the stacked case generator (``cases``), the stability checks, and the public
Hypothesis strategies, so every generator of extremes lives here. The format facts they rest on
(largest and smallest values, ULP, rounding onto a dtype) live in ``_formats`` and are
re-exported here.
"""

from __future__ import annotations

from collections.abc import Sequence

import ml_dtypes
import numpy as np

from ._formats import (common_grid, flush_subnormals, has_subnormals, largest_finite, next_below_one, round_down,
                       round_to, smallest_normal, smallest_subnormal, ulp)
from .tolerance import dtype_of

__all__ = ["magnitudes", "PATTERNS", "ladder_rows", "largest_finite", "smallest_subnormal",
           "smallest_normal", "next_below_one", "round_to", "common_grid", "ulp", "wide_magnitudes",
           "profile_magnitudes", "probability_edges", "EDGE_STEPS", "approach", "probability_rows",
           "sparse_simplex_rows", "mask_non_targets", "round_down", "flush_subnormals",
           "has_subnormals", "mixed_scales", "overflow_rungs", "thin_rungs"]

PATTERNS = ("right", "wrong", "equal", "huge", "mixed")


def magnitudes(dtype: str | np.dtype = "float64", *, up_to_max: bool = False) -> np.ndarray:
    """Logit magnitudes 0, 1e-3, 1e-1, 1, 3, 10, 30, 90, 1e2, 1e3, 1e4, capped to the dtype.

    With ``up_to_max`` the ladder continues by powers of ten up to the dtype's largest finite
    value, which it ends with.
    """
    top = largest_finite(dtype)
    base = [0.0, 1e-3, 1e-1, 1.0, 3.0, 10.0, 30.0, 90.0, 1e2, 1e3, 1e4]
    vals = [v for v in base if v <= top]
    if up_to_max:
        e = 5
        while e <= 308 and 10.0**e < top:  # 10.0**309 raises OverflowError in Python
            vals.append(10.0**e)
            e += 1 if e < 38 else 30
        vals.append(top)
    return np.asarray(vals, dtype=np.float64)


def ladder_rows(
    rng: np.random.Generator,
    labels: np.ndarray,
    n_classes: int,
    pattern: str,
    magnitude: float | np.ndarray,
) -> np.ndarray:
    """Logit rows (N, C) for integer ``labels`` (N,) following ``pattern`` at ``magnitude``.

    ``magnitude`` may be a scalar or one value per row. For ``mixed`` it is the top of the
    rows' scales (:func:`mixed_scales`): each row is a standard normal draw mapped onto [0, s]
    (its smallest logit 0, its largest exactly its scale s), so a row's loss stays within
    s + ln C: the rows differ in scale, not in how wrong they are, and at the top of a dtype's
    range no single row's loss overflows while the batch mean fits (that is ``wrong``'s job).
    Labels outside [0, C) (an ignore label) are treated as class 0 for placement.
    """
    n = labels.shape[0]
    lab = np.where((labels >= 0) & (labels < n_classes), labels, 0).astype(np.int64)
    m = np.broadcast_to(np.asarray(magnitude, dtype=np.float64), (n,)).copy()
    rows = np.zeros((n, n_classes))
    idx = np.arange(n)
    other = (lab + 1 + rng.integers(0, max(n_classes - 1, 1), size=n)) % n_classes
    if pattern == "right":
        rows[idx, lab] = m
    elif pattern == "wrong":
        rows[idx, lab] = -m
        rows[idx, other] = m
    elif pattern == "equal":
        rows[:] = m[:, None]
    elif pattern == "huge":
        rows = rng.standard_normal((n, n_classes))
        rows[idx, rng.integers(0, n_classes, size=n)] = m
    elif pattern == "mixed":
        scales = mixed_scales(rng, m)
        d = rng.standard_normal((n, n_classes))
        lo, hi = d.min(axis=1, keepdims=True), d.max(axis=1, keepdims=True)
        # (d − lo)/(hi − lo) spans [0, 1] with both ends exact (x − x = 0, x / x = 1 in IEEE arithmetic)
        unit = (d - lo) / np.where(hi > lo, hi - lo, 1.0)
        rows = unit * scales[:, None]
    else:
        raise ValueError(f"pattern={pattern!r}: expected one of {PATTERNS}; try 'wrong'")
    return rows


def mixed_scales(rng: np.random.Generator, magnitude: float | np.ndarray, size: int | None = None) -> np.ndarray:
    """Scales of very different size for the ``mixed`` pattern: M·10^U(−6, 0), one at exactly M.

    ``magnitude`` is a scalar (give ``size``) or one top per row; the row with the largest top
    gets its top exactly (a random row when all tops are equal), so a case always holds a row
    at the ladder's rung and rows up to six decades below it (where a stabiliser shared by the
    whole batch underflows).

    Example:
        >>> s = mixed_scales(np.random.default_rng(0), 1e4, 5)
        >>> float(s.max()), bool(s.min() < 1e4)
        (10000.0, True)
    """
    m = np.asarray(magnitude, dtype=np.float64)
    m = np.full(size, float(m)) if m.ndim == 0 else m.astype(np.float64).copy()
    scales = m * 10.0 ** rng.uniform(-6.0, 0.0, size=m.shape[0])
    if m.size:
        # a random row when every row has the same top, else the row with the largest top
        top = int(rng.integers(0, m.size)) if np.all(m == m[0]) else int(np.argmax(m))
        scales[top] = m[top]
    return scales


# --------------------------------------------------------------------------------------------
# ladders for every dtype


def wide_magnitudes(dtype: str | np.dtype = "float64") -> np.ndarray:
    """:func:`magnitudes` (0 … 1e4) continued sparsely to the dtype's largest finite value.

    After 1e4 come 1e5, 1e8, 1e16, 1e38, 1e100, 1e300 (those the dtype holds) and the largest
    finite value itself, so every dtype's ladder stays short (≤ 18 rungs) yet reaches its end.

    Example:
        >>> wide_magnitudes("float16")[-3:].tolist()
        [1000.0, 10000.0, 65504.0]
    """
    top = largest_finite(dtype)
    extra = [v for v in (1e5, 1e8, 1e16, 1e38, 1e100, 1e300) if v < top]
    return np.asarray(list(magnitudes(dtype)) + extra + [top], dtype=np.float64)


def overflow_rungs(mags: np.ndarray, dtypes: Sequence[str] | None = None) -> list[float]:
    """For each dtype, the smallest rung M of ``mags`` with M > ln(largest finite value).

    There e^M overflows: a softmax or log-sum-exp without max subtraction breaks from that rung
    on (float16: 11.1, bfloat16 and float32: 88.7, float64: 709.8).

    Example:
        >>> overflow_rungs(magnitudes("float64"))
        [30.0, 90.0, 1000.0]
    """
    from .tolerance import DTYPES

    m = np.sort(np.asarray(mags, dtype=np.float64))
    out: list[float] = []
    for d in DTYPES if dtypes is None else dtypes:
        past = m[m > np.log(largest_finite(d))]  # e^M > max ⟺ M > ln max
        if past.size and float(past[0]) not in out:
            out.append(float(past[0]))
    return out


def thin_rungs(mags: np.ndarray, keep: int, dtypes: Sequence[str] | None = None) -> np.ndarray:
    """``keep`` rungs of ``mags`` (never fewer than its essentials), spread evenly, ascending.

    Essentials: the first rung (0 in every ladder), the last (a wide ladder's largest finite
    value) and the rungs just past each dtype's exponential overflow (:func:`overflow_rungs`).
    The rest are taken evenly by index among the others.

    Example:
        >>> thin_rungs(magnitudes("float64"), 4, ["float32"]).tolist()
        [0.0, 10.0, 90.0, 10000.0]
    """
    m = np.sort(np.asarray(mags, dtype=np.float64))
    if keep >= m.size:
        return m
    must = {float(m[0]), float(m[-1]), *overflow_rungs(m, dtypes)}
    rest = [float(v) for v in m if float(v) not in must]
    extra = min(max(keep - len(must), 0), len(rest))
    # the centres of ``extra`` equal bins of the remaining rungs: distinct, evenly spread
    picks = np.floor((np.arange(extra) + 0.5) * len(rest) / max(extra, 1)).astype(int)
    must |= {rest[i] for i in picks}
    return np.asarray(sorted(must), dtype=np.float64)


def profile_magnitudes(dtype: str | np.dtype = "float64") -> np.ndarray:
    """A dense magnitude grid for precision profiles: 1e-3 … 1e5 by quarter decades, then by
    decades to 1e38, then every ten decades, plus the largest finite value of every dtype of
    :data:`~lossguard.tolerance.DTYPES` that ``dtype`` holds (where ranges end).

    Example:
        >>> float(profile_magnitudes("float16")[-1])
        65504.0
    """
    from .tolerance import DTYPES

    top = largest_finite(dtype)
    grid = [10.0 ** (k / 4) for k in range(-12, 21)] + [10.0**k for k in range(6, 39)]
    grid += [10.0**k for k in range(40, 309, 10)]
    grid += [largest_finite(d) for d in DTYPES]
    return np.unique(np.asarray([g for g in grid if g <= top], dtype=np.float64))


def probability_edges(dtype: str | np.dtype) -> np.ndarray:
    """Probabilities at and just inside the ends of [0, 1], as ``dtype`` holds them.

    0, the smallest subnormal, the smallest normal, ε, 1/2, the largest value below 1, and 1:
    the exact endpoints (where a log-loss is truly infinite if the target puts mass there) and
    the nearest values a training run can actually produce.

    Example:
        >>> probability_edges("float16").tolist()[-2:]
        [0.99951171875, 1.0]
    """
    eps = float(ml_dtypes.finfo(dtype_of(dtype)).eps)
    vals = [0.0, smallest_subnormal(dtype), smallest_normal(dtype), eps, 0.5, next_below_one(dtype), 1.0]
    return np.asarray(vals, dtype=np.float64)


#: How far :func:`approach` moves an endpoint inward: three steps, each the square of the last,
#: so a diverging limit (log, power) shows growing differences and a finite one shrinking ones.
EDGE_STEPS = (2.0**-13, 2.0**-26, 2.0**-52)


def approach(p: np.ndarray, step: float) -> np.ndarray:
    """Probabilities with exact 0 moved to ``step`` and exact 1 to 1 − ``step`` (others kept)."""
    p = np.asarray(p, dtype=np.float64)
    return np.where(p == 0.0, step, np.where(p == 1.0, 1.0 - step, p))


def probability_rows(q: float, labels: np.ndarray, n_classes: int, pattern: str,
                     rng: np.random.Generator) -> np.ndarray:
    """Probability rows (N, C) with the label's probability at an edge value ``q``.

    - ``"label"``: p_label = q, the other classes share 1 − q equally (q = 0: a certain miss);
    - ``"rest"``: p_label = 1 − q, one random other class holds q, the rest exact zeros.

    Labels outside [0, C) are placed at class 0, as in :func:`ladder_rows`.
    """
    n = labels.shape[0]
    lab = np.where((labels >= 0) & (labels < n_classes), labels, 0).astype(np.int64)
    idx = np.arange(n)
    if pattern == "label":
        rows = np.full((n, n_classes), (1.0 - q) / max(n_classes - 1, 1))
        rows[idx, lab] = q
    elif pattern == "rest":
        rows = np.zeros((n, n_classes))
        other = (lab + 1 + rng.integers(0, max(n_classes - 1, 1), size=n)) % n_classes
        rows[idx, lab] = 1.0 - q
        rows[idx, other] = q
    else:
        raise ValueError(f"pattern={pattern!r}: expected 'label' or 'rest'; try 'label'")
    return rows


def sparse_simplex_rows(rng: np.random.Generator, n: int, n_classes: int) -> np.ndarray:
    """Target rows (N, C) on the simplex with exact zeros: alternately one-hot and two-to-three
    nonzero entries (never all classes), so that masks have zero-target classes to land on."""
    rows = np.zeros((n, n_classes))
    for i in range(n):
        k = 1 if i % 2 == 0 else int(rng.integers(2, max(min(3, n_classes - 1), 2) + 1))
        k = min(k, max(n_classes - 1, 1))
        cls = rng.choice(n_classes, size=k, replace=False)
        rows[i, cls] = rng.dirichlet(np.ones(k)) if k > 1 else 1.0
    return rows


def mask_non_targets(rng: np.random.Generator, targets: np.ndarray, n_classes: int, *,
                     ignore_label: int | None = None) -> np.ndarray:
    """Which entries of an (N, C) logit matrix to set to −inf: a boolean mask.

    Never the label (integer targets; an ignored row keeps class 0); for distribution targets
    (N, C) only classes whose target is exactly 0. Each row masks between one and all of its
    eligible classes (so "every competitor masked" occurs); a row with none eligible is left.
    """
    t = np.asarray(targets)
    if t.ndim == 1:
        lab = np.where((t >= 0) & (t < n_classes), t, 0)
        if ignore_label is not None:
            lab = np.where(t == ignore_label, 0, lab)
        eligible = np.arange(n_classes)[None, :] != lab[:, None]
    else:
        eligible = t == 0
    count = eligible.sum(axis=1)
    # k ~ uniform on 1..count per row, then the k eligible classes with the smallest uniform keys:
    # a uniform random subset of size k (one vectorised draw for all rows, no loop over N)
    k = np.floor(rng.random(count.shape) * count).astype(np.int64) + 1
    keys = np.where(eligible, rng.random(eligible.shape), np.inf)
    kth = np.take_along_axis(np.sort(keys, axis=1), (k - 1)[:, None], axis=1)  # the k-th smallest key
    return eligible & (keys <= kth)  # keys are distinct doubles, so exactly k per row
