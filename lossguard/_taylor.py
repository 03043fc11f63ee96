"""The Taylor remainder test: the order at which f(z + h v) − f(z) − h ∇f·v vanishes.

Notation and shapes: φ(h) = f(z + h v) for one direction v; ``slope`` is the claimed directional
derivative ∇f·v (from the gradient under test). Values at J halving steps h_j come in arrays
(J, *B), where B is any batch shape (cases, directions).

Formula: for a smooth f and the true gradient,

    r(h) = |φ(h) − φ(0) − h · slope| = |φ''(0)| h²/2 + O(h³),   so r(h) / r(h/2) → 4,

an observed order log₂(r(h_j) / r(h_{j+1})) of 2. With a wrong slope, r(h) = |φ'(0) − slope| h
+ O(h²) and the order drops to 1 once h is small against |φ'(0) − slope| / |φ''(0)|. Residuals
within a few rounding errors of φ are noise and give no order. The test needs no derivative
estimate of its own, which makes it a useful second opinion beside finite differences.

Example:
    >>> import numpy as np
    >>> h = 2.0 ** -np.arange(5)
    >>> good = taylor_orders(np.zeros(1), np.sin(h)[:, None], h[:, None], np.ones(1), np.full(1, 1e-16))
    >>> bad = taylor_orders(np.zeros(1), np.sin(h)[:, None], h[:, None], np.full(1, 1.1), np.full(1, 1e-16))
    >>> round(float(good.observed[0])), round(float(bad.observed[0]))
    (3, 1)

(sin has no h² term at 0, so the correct slope shows order 3 there: "at least 2" is the test.)

References:
    Farrell, P. E., Ham, D. A., Funke, S. W. and Rognes, M. E., "Automated derivation of the
    adjoint of high-level transient finite element programs", SIAM Journal on Scientific
    Computing 35(4), 2013 (the Taylor remainder convergence test for gradients).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

__all__ = ["TaylorResult", "taylor_orders", "taylor_along", "NOISE_FACTOR"]

#: Residuals below this many rounding errors of φ carry no order information.
NOISE_FACTOR = 16.0


@dataclass
class TaylorResult:
    """Residuals r(h_j) (J, *B), orders between neighbouring steps (J−1, *B) (nan where a
    residual is noise), and the observed order per batch element (median of the reliable
    orders; nan when there are none)."""

    residuals: np.ndarray
    orders: np.ndarray
    observed: np.ndarray

    def describe(self, index: tuple[int, ...] = ()) -> str:
        """One line for a report: the observed order and what a correct gradient gives."""
        o = float(np.asarray(self.observed)[index]) if np.ndim(self.observed) else float(self.observed)
        if not np.isfinite(o):
            return "Taylor remainder order: no reliable estimate (residuals at rounding level)"
        return f"Taylor remainder order {o:.2f} (a correct gradient gives 2 or more, a wrong one 1)"


def taylor_orders(
    f0: np.ndarray, f_steps: np.ndarray, steps: np.ndarray, slope: np.ndarray, noise: np.ndarray
) -> TaylorResult:
    """Observed convergence orders of the first-order Taylor remainder.

    Args:
        f0: φ(0), shape B. f_steps: φ(h_j), shape (J, *B). steps: h_j, shape (J, *B), each
            half (or any fixed fraction) of the previous one.
        slope: the claimed derivative along the direction, shape B.
        noise: bound on the rounding error of one φ value, shape B.
    Returns:
        :class:`TaylorResult`.
    """
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-nan medians: no reliable order
        r = np.abs(f_steps - f0[None] - steps * slope[None])
        floor = NOISE_FACTOR * noise[None]
        ok = np.isfinite(r) & (r > floor)
        ratio = steps[:-1] / steps[1:]
        orders = np.log(r[:-1] / r[1:]) / np.log(ratio)  # r ∝ h^q ⇒ q = log(r_j/r_{j+1}) / log(h_j/h_{j+1})
        orders = np.where(ok[:-1] & ok[1:], orders, np.nan)
        valid = np.isfinite(orders)
        observed = np.where(valid.any(axis=0), np.nanmedian(np.where(valid, orders, np.nan), axis=0)
                            if orders.size else np.nan, np.nan)
    return TaylorResult(r, orders, observed)


def taylor_along(
    phi: Callable[[np.ndarray], np.ndarray], z: np.ndarray, v: np.ndarray, h0: float, f0: float,
    slope: float, noise: float, count: int = 8,
) -> TaylorResult:
    """The Taylor test at one point along one direction, steps h0 · 4^(−j), j = 0 … count−1.

    Args:
        phi: evaluates φ on a stack of points (count, *z.shape) → (count,).
        z: the point. v: the direction. h0: the first step. f0: φ(z). slope: the claimed ∇f·v.
        noise: bound on the rounding error of one φ value.
    Returns:
        :class:`TaylorResult` with batch shape (1,).
    """
    steps = h0 * 4.0 ** -np.arange(count)
    pts = z[None] + steps.reshape((-1,) + (1,) * np.ndim(z)) * v[None]
    vals = np.asarray(phi(pts), dtype=np.float64)
    return taylor_orders(np.asarray([f0]), vals[:, None], steps[:, None], np.asarray([slope]), np.asarray([noise]))
