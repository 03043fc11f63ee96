"""Extreme-value ladders: the logit magnitudes and row patterns a quick test never tries.

Notation: a row is one example's logits ``z`` of length C (class axis last); ``t`` is its label.
Each pattern places a magnitude ``M`` from :func:`magnitudes` into a row:

- ``right``: z_t = +M, others 0 (confidently right);
- ``wrong``: z_t = −M, one other class +M (confidently wrong);
- ``equal``: every class M (ties; value must be ln C for softmax CE whatever M);
- ``huge``: one random class +M, others drawn at scale 1;
- ``mixed``: rows of very different scales in one batch (each row its own M).

These feed the stacked case generator (``cases``), the stability checks, and the public
Hypothesis strategies, so every generator of extremes lives here.
"""

from __future__ import annotations

import ml_dtypes
import numpy as np

from .tolerance import dtype_of

__all__ = ["magnitudes", "PATTERNS", "ladder_rows", "largest_finite"]

PATTERNS = ("right", "wrong", "equal", "huge", "mixed")


def largest_finite(dtype: str | np.dtype) -> float:
    """The largest finite value of ``dtype`` (IEEE 754: (2 − 2^(1−p))·2^emax)."""
    return float(ml_dtypes.finfo(dtype_of(dtype)).max)


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
        while 10.0**e < top:
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

    ``magnitude`` may be a scalar or one value per row (the ``mixed`` pattern uses that).
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
        scales = 10.0 ** rng.uniform(-3, np.log10(np.maximum(m, 1e-3)) + 1e-12, size=n)
        rows = rng.standard_normal((n, n_classes)) * scales[:, None]
    else:
        raise ValueError(f"pattern={pattern!r}: expected one of {PATTERNS}; try 'wrong'")
    return rows
