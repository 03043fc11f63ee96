"""Tolerances from the dtype and a rounding-error model, never from a lone constant.

The model is the standard forward error bound for a computation of ``n`` floating-point
operations, each exact up to a relative error of the unit roundoff ``u = ε/2``:

    |computed − exact| ≤ γ_n · (|exact| + S),     γ_n = n·u / (1 − n·u)

where ``S`` is the magnitude of the intermediate quantities that cancel (for a loss in logits,
the largest |logit| of the case: log-sum-exp(z) − z_y subtracts numbers of that size). Gradients
use the normwise form ‖g − g*‖_∞ ≤ γ_n · (1 + S) · ‖g*‖_∞ (an error δ in an exponent gives a
relative error δ in exp). The operation count ``n`` is modelled as ``16 + 2·C + N`` per case:
2·C for a row's max/sum/normalise, N for the batch sum, and 16 for the handful of transcendental
calls (each correctly rounded to within a few ulp in a conforming libm).

References:
    N. J. Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., SIAM, 2002
    (γ_n, Lemma 3.1; normwise bounds, ch. 3).
"""

from __future__ import annotations

from dataclasses import dataclass

import ml_dtypes
import numpy as np

__all__ = ["DTYPES", "dtype_of", "unit_roundoff", "gamma", "op_count", "Allowance", "rounding_allowance"]

#: Float dtypes lossguard knows, lowest precision first.
DTYPES = ("float16", "bfloat16", "float32", "float64")


def dtype_of(name: str | np.dtype) -> np.dtype:
    """The numpy dtype for a name in :data:`DTYPES` (bfloat16 from ml_dtypes)."""
    if str(name) == "bfloat16":
        return np.dtype(ml_dtypes.bfloat16)
    return np.dtype(name)


def unit_roundoff(dtype: str | np.dtype) -> float:
    """u = ε/2, half the spacing of floats at 1 (IEEE 754-2008 round-to-nearest)."""
    return float(ml_dtypes.finfo(dtype_of(dtype)).eps) / 2.0


def gamma(n: int | np.ndarray, dtype: str | np.dtype) -> np.ndarray:
    """γ_n = n·u/(1 − n·u) (Higham 2002, Lemma 3.1); capped at 1 when n·u ≥ 1/2."""
    nu = np.asarray(n, dtype=np.float64) * unit_roundoff(dtype)
    return np.where(nu < 0.5, nu / (1.0 - np.minimum(nu, 0.5)), 1.0)


def op_count(n_examples: int, n_classes: int) -> int:
    """The modelled operation count ``16 + 2·C + N`` (see the module docstring)."""
    return 16 + 2 * int(n_classes) + int(n_examples)


@dataclass(frozen=True)
class Allowance:
    """Per-case allowed absolute error and the rule that produced it (printed beside verdicts)."""

    atol: np.ndarray
    rule: str

    def describe(self) -> str:
        a = np.asarray(self.atol, dtype=np.float64)
        if a.size == 0:
            return self.rule
        return f"{self.rule} (from {np.min(a):.2g} to {np.max(a):.2g})"


def rounding_allowance(
    reference: np.ndarray,
    scale: np.ndarray,
    *,
    dtype: str | np.dtype,
    n_ops: int,
    normwise: bool = False,
    both_sides: int = 2,
    grad_scale: np.ndarray | float = 0.0,
) -> Allowance:
    """Allowed |computed − reference| for each case of a stack.

    Args:
        reference: exact (float64) values, shape (K,) or (K, …).
        scale: the cancelling magnitude S per case, shape (K,).
        dtype: the dtype the compared value was computed in.
        n_ops: modelled operation count (see :func:`op_count`).
        normwise: gradient form γ_n·(1 + S)·‖g*‖_∞ per case instead of γ_n·(|v*| + S).
        both_sides: how many independently rounded computations are compared (2 when the
            reference is itself a float64 computation).
        grad_scale: normwise only: the size G of the terms that cancel in the gradient (for
            softmax-type losses p − y scaled by the reduction, so 1/N for a mean); the bound is
            then γ_n·(1 + S)·(‖g*‖_∞ + G), since p_y − 1 rounds to 0 once p_y rounds to 1.

    Returns:
        An :class:`Allowance` whose ``atol`` broadcasts against ``reference``.
    """
    ref = np.asarray(reference, dtype=np.float64)
    s = np.abs(np.asarray(scale, dtype=np.float64))
    g = float(gamma(n_ops, dtype)) * both_sides
    k = ref.shape[0] if ref.ndim else 1
    s = np.broadcast_to(s, (k,)) if s.ndim <= 1 else s
    if normwise:
        flat = ref.reshape(k, -1) if ref.ndim else ref.reshape(1, 1)
        fin = np.isfinite(flat)
        # ‖g*‖∞ over the finite entries (0 if none) as max(max g, −min g): no |g| temporary
        norm = np.maximum(np.max(flat, axis=1, where=fin, initial=0.0), -np.min(flat, axis=1, where=fin, initial=0.0))
        atol = g * (1.0 + s) * (norm + np.broadcast_to(np.asarray(grad_scale, dtype=np.float64), (k,)))
        atol = atol.reshape((k,) + (1,) * max(ref.ndim - 1, 0))
        rule = f"{both_sides}·γ_n·(1 + max|z|)·(‖g*‖∞ + G), n=16+2C+N, u={unit_roundoff(dtype):.2g}"
    else:
        mag = np.where(np.isfinite(ref), np.abs(ref), 0.0)
        atol = g * (mag + s.reshape((k,) + (1,) * max(ref.ndim - 1, 0)))
        rule = f"{both_sides}·γ_n·(|v*| + max|z|), n=16+2C+N, u={unit_roundoff(dtype):.2g}"
    # the smallest positive normal number: below it rounding is absolute, not relative (IEEE 754)
    tiny = float(ml_dtypes.finfo(dtype_of(dtype)).tiny)
    return Allowance(atol=np.maximum(atol, tiny), rule=rule)
