"""Focal loss, binary (sigmoid) and multiclass (softmax), computed in log space.

Notation and shapes. Binary: logits ``z`` (N,) or (N, D), targets ``y`` of the same shape;
p = σ(z), s = 2y − 1, p_t = σ(s z) the probability of the true outcome. Multiclass: logits ``z``
(N, C), class axis last, labels ``y`` (N,); p = softmax(z), p_t = p_y. γ = ``gamma`` ≥ 0.
α_t = α for positives and 1 − α for negatives (binary; 1 when α is None); α_y is a per-class
weight, a scalar, or 1 (multiclass).

Formula (Lin et al. 2017):

    ℓ = −α_t (1 − p_t)^γ log p_t

computed as ℓ = α_t · exp(γ log(1 − p_t)) · (−log p_t) with both logs evaluated without forming
p_t: binary log p_t = −softplus(−s z) and log(1 − p_t) = log σ(−s z); multiclass log p_y from the
log-softmax and log(1 − p_y) = logsumexp of the other classes' log-probabilities. The gradients
are derived by hand so that no negative power of (1 − p_t) appears (the factor γ (1 − p_t)^(γ−1)
of the chain rule is always multiplied by p_t (1 − p_t) or by p_c, both ≤ 1 − p_t):

    binary:      ∂ℓ/∂z = α_t [γ (1 − 2y) e^(log p + log(1−p) + (γ−1) log(1−p_t)) · B
                              + (1 − p_t)^γ ((1 − y) σ(z) − y σ(−z))]
    multiclass:  ∂ℓ/∂z_c = α_y (1 − p_y)^γ r_c (γ p_y log p_y − (1 − p_y)),
                 r_y = 1, r_c = −p_c / (1 − p_y) for c ≠ y

with B = −[y log p + (1 − y) log(1 − p)]. Both stay finite for γ ∈ (0, 1) at saturated
probabilities and at |z| up to the largest float64.

Soft binary targets (y ∈ (0, 1)) use the generalisation 1 − p_t = y (1 − p) + (1 − y) p,
α_t = α y + (1 − α)(1 − y) and −log p_t replaced by the soft cross-entropy B; for y ∈ {0, 1} it
is the published formula. Only hard targets are its declared domain (``target_domain="hard"``).

Properties: nonnegative; multiclass also shift_invariant and (alpha=None, the default there)
class_symmetric. Not convex for γ > 0 in general (the second derivative in z turns negative
around z ≈ −4 for y = 1, γ = 2) and not proper for γ > 0 (it pushes p_t away from the target
frequency).

Example:
    >>> import numpy as np
    >>> float(FOCAL_BINARY.per_example(np.array([1e4]), np.array([1.0]), gamma=0.5)[0])
    0.0

References:
    Lin, T.-Y., Goyal, P., Girshick, R., He, K. and Dollár, P., "Focal Loss for Dense Object
    Detection", ICCV 2017.
"""

from __future__ import annotations

import math
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from numpy.typing import ArrayLike

from ._base import Forms, Param, Reference
from ._stable import (f64, j_log1m_softmax_at, j_log_sigmoid, j_log_softmax, j_pow_from_log,
                      j_take_label, log1m_softmax_at, log_sigmoid, log_softmax, pow_from_log,
                      sigmoid, take_label)

__all__ = ["FOCAL_BINARY", "FOCAL_MULTICLASS", "focal_binary_per_example",
           "focal_binary_per_example_grad", "focal_binary_jax", "focal_multiclass_per_example",
           "focal_multiclass_per_example_grad", "focal_multiclass_jax"]

_CITATION = (
    "Lin, T.-Y., Goyal, P., Girshick, R., He, K., Dollár, P., 'Focal Loss for Dense Object "
    "Detection', ICCV 2017"
)


def _real(value: Any) -> bool:
    return not isinstance(value, bool) and isinstance(value, (int, float)) and math.isfinite(value)


def _check_gamma(value: Any, classes: int | None) -> str | None:
    if not _real(value) or value < 0:
        return "expected a finite number >= 0; try gamma=2.0"
    return None


def _check_alpha_binary(value: Any, classes: int | None) -> str | None:
    if value is None or (_real(value) and 0.0 <= value <= 1.0):
        return None
    return "expected None or a number in [0, 1]; try alpha=0.25"


def _check_alpha_multi(value: Any, classes: int | None) -> str | None:
    if value is None or (_real(value) and value >= 0):
        return None
    hint = "try alpha=None, alpha=0.5 or one number >= 0 per class"
    if isinstance(value, (list, tuple, np.ndarray)) and np.ndim(value) == 1:
        if all(_real(v) and v >= 0 for v in value):
            if classes is not None and len(value) != classes:
                return f"expected {classes} entries (one per class), got {len(value)}; {hint}"
            return None
    return f"expected None, a number >= 0 or a per-class list of numbers >= 0; {hint}"


# ------------------------------------------------------------------------------------ binary


def _binary_parts(z: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, ...]:
    """(log p, log(1 − p), B, log(1 − p_t)) for soft or hard targets."""
    lp, lq = log_sigmoid(z), log_sigmoid(-z)  # log(1 − σ(z)) = log σ(−z)
    b = -(y * lp + (1.0 - y) * lq)  # cross-entropy; for hard y it is −log p_t = softplus(−s z)
    with np.errstate(divide="ignore"):
        # 1 − p_t = y(1 − p) + (1 − y)p ⇒ log(1 − p_t) = logaddexp(log y + lq, log(1 − y) + lp);
        # for y ∈ {0, 1} one term is −inf and logaddexp returns the other exactly (log σ(−s z))
        l1mpt = np.logaddexp(np.log(y) + lq, np.log1p(-y) + lp)
    return lp, lq, b, l1mpt


def _alpha_t(y: np.ndarray, alpha: float | None) -> np.ndarray | float:
    return 1.0 if alpha is None else alpha * y + (1.0 - alpha) * (1.0 - y)


def focal_binary_per_example(z: ArrayLike, y: ArrayLike, inputs: str = "logits",
                             gamma: float = 2.0, alpha: float | None = 0.25) -> np.ndarray:
    """Sigmoid focal loss of each element.

    Shapes: ``z``, ``y`` (N,) or (N, D) → same shape.
    Formula: α_t (1 − p_t)^γ · (−log p_t) = α_t e^(γ log σ(−s z)) softplus(−s z) for hard y.

    Args:
        z: logits. y: targets (hard 0/1; soft values use the generalisation in the module doc).
        inputs: ``"logits"``. gamma: γ ≥ 0. alpha: α ∈ [0, 1] or ``None``.
    Returns:
        float64, shape of ``z``.

    Example:
        >>> round(float(focal_binary_per_example(np.array([0.0]), np.array([1.0]),
        ...                                      gamma=0.0, alpha=None)[0]), 12)
        0.69314718056

    References:
        Lin, Goyal, Girshick, He, Dollár, ICCV 2017.
    """
    z, y = f64(z), f64(y)
    _, _, b, l1mpt = _binary_parts(z, y)
    return _alpha_t(y, alpha) * pow_from_log(gamma, l1mpt) * b  # (1 − p_t)^γ = e^(γ log(1 − p_t))


def focal_binary_per_example_grad(z: ArrayLike, y: ArrayLike, inputs: str = "logits",
                                  gamma: float = 2.0, alpha: float | None = 0.25) -> np.ndarray:
    """∂ℓ/∂z of :func:`focal_binary_per_example`, finite for every γ ≥ 0 and finite z.

    Shapes: (N,) or (N, D) → same shape.
    Formula: α_t [γ (1 − 2y) p (1 − p)(1 − p_t)^(γ−1) B + (1 − p_t)^γ (σ(z) − y)], the first
    product evaluated as one exponential so that (1 − p_t)^(γ−1) never appears alone.

    Args:
        z, y, inputs, gamma, alpha: as in :func:`focal_binary_per_example`.
    Returns:
        float64, shape of ``z``.

    Example:
        >>> float(focal_binary_per_example_grad(np.array([-1e4]), np.array([1.0]),
        ...                                     gamma=0.5, alpha=None)[0])
        -1.0

    References:
        Lin, Goyal, Girshick, He, Dollár, ICCV 2017.
    """
    z, y = f64(z), f64(y)
    lp, lq, b, l1mpt = _binary_parts(z, y)
    # σ(z) − y = (1 − y) σ(z) − y σ(−z), using 1 − σ(z) = σ(−z) (exact for hard targets)
    dce = (1.0 - y) * sigmoid(z) - y * sigmoid(-z)
    grad = pow_from_log(gamma, l1mpt) * dce
    if gamma != 0:
        # ∂(1 − p_t)^γ/∂z = γ (1 − 2y) p (1 − p) (1 − p_t)^(γ−1) as one exponential: p (1 − p) ≤
        # 2 (1 − p_t) for any y keeps it ≤ γ log(1 − p_t) + log 2 (hard y: p_t (1 − p_t)^γ)
        with np.errstate(invalid="ignore", over="ignore"):  # exponent −inf ⇒ e^(−inf) = 0 (limit)
            expo = lp + lq + (gamma - 1.0) * l1mpt
        dmod = gamma * (1.0 - 2.0 * y) * np.exp(np.where(np.isnan(expo), -np.inf, expo))
        grad = grad + dmod * b
    return _alpha_t(y, alpha) * grad


def focal_binary_jax(z: jax.Array, y: jax.Array, inputs: str = "logits", gamma: float = 2.0,
                     alpha: float | None = 0.25) -> jax.Array:
    """JAX twin of :func:`focal_binary_per_example` (differentiable in ``z``).

    Example:
        >>> import jax.numpy as jnp
        >>> round(float(focal_binary_jax(jnp.zeros(1), jnp.ones(1), gamma=0.0, alpha=None)[0]), 6)
        0.693147
    """
    lp, lq = j_log_sigmoid(z), j_log_sigmoid(-z)  # log(1 − σ(z)) = log σ(−z)
    b = -(y * lp + (1.0 - y) * lq)
    hard = (y == 0) | (y == 1)
    ys = jnp.where(hard, 0.5, y)  # double-where: the soft branch never sees log 0
    soft = jnp.logaddexp(jnp.log(ys) + lq, jnp.log1p(-ys) + lp)  # log(y(1−p) + (1−y)p)
    l1mpt = jnp.where(y == 1, lq, jnp.where(y == 0, lp, soft))
    at = 1.0 if alpha is None else alpha * y + (1.0 - alpha) * (1.0 - y)
    return at * j_pow_from_log(gamma, l1mpt) * b


# -------------------------------------------------------------------------------- multiclass


def _alpha_y(y: np.ndarray, alpha: Any) -> np.ndarray | float:
    if alpha is None:
        return 1.0
    if np.ndim(alpha) == 0:
        return float(alpha)
    return f64(alpha)[y]


def focal_multiclass_per_example(z: ArrayLike, y: ArrayLike, inputs: str = "logits",
                                 gamma: float = 2.0, alpha: Any = None) -> np.ndarray:
    """Softmax focal loss of each example.

    Shapes: ``z`` (N, C), ``y`` labels (N,) → (N,).
    Formula: α_y e^(γ log(1 − p_y)) (−log p_y), log(1 − p_y) = logsumexp_{c≠y} log p_c.

    Args:
        z: logits (N, C). y: labels (N,). inputs: ``"logits"``. gamma: γ ≥ 0.
        alpha: ``None``, a number, or one number per class.
    Returns:
        float64 (N,).

    Example:
        >>> round(float(focal_multiclass_per_example(np.zeros((1, 4)), np.array([0]),
        ...                                          gamma=0.0)[0]), 12)  # ln 4
        1.38629436112

    References:
        Lin, Goyal, Girshick, He, Dollár, ICCV 2017.
    """
    z, y = f64(z), np.asarray(y, dtype=np.int64)
    ls = log_softmax(z)
    lpy, lqy = take_label(ls, y), log1m_softmax_at(ls, y)  # 1 − p_y = Σ_{c≠y} p_c
    return _alpha_y(y, alpha) * pow_from_log(gamma, lqy) * -lpy  # (1 − p_y)^γ = e^(γ log(1 − p_y))


def focal_multiclass_per_example_grad(z: ArrayLike, y: ArrayLike, inputs: str = "logits",
                                      gamma: float = 2.0, alpha: Any = None) -> np.ndarray:
    """∂ℓ/∂z of :func:`focal_multiclass_per_example`.

    Shapes: (N, C) → (N, C).
    Formula: α_y (1 − p_y)^γ r_c (γ p_y log p_y − (1 − p_y)); r_y = 1, r_c = −p_c/(1 − p_y).

    Args:
        z, y, inputs, gamma, alpha: as in :func:`focal_multiclass_per_example`.
    Returns:
        float64 (N, C); zero rows where 1 − p_y underflows to 0.

    Example:
        >>> g = focal_multiclass_per_example_grad(np.array([[1e4, 0.0]]), np.array([0]), gamma=0.5)
        >>> float(np.abs(g).max())  # saturated and γ < 1: finite (here exactly 0)
        0.0

    References:
        Lin, Goyal, Girshick, He, Dollár, ICCV 2017.
    """
    z, y = f64(z), np.asarray(y, dtype=np.int64)
    ls = log_softmax(z)
    lpy, lqy = take_label(ls, y)[..., None], log1m_softmax_at(ls, y)[..., None]
    at = (y[..., None] == np.arange(z.shape[-1]))
    alive = np.isfinite(lqy)
    # r_c = (δ_cy − p_c)/(1 − p_y): 1 at the label, −e^(ls_c − log(1 − p_y)) elsewhere, a ratio in
    # [−1, 0] since p_c ≤ 1 − p_y; 0 where 1 − p_y = 0 (then every p_c = 0 too)
    r = np.where(at, 1.0, -np.exp(np.where(at, -np.inf, ls) - np.where(alive, lqy, 0.0)))
    r = np.where(at | alive, r, 0.0)
    # p log p → 0 as p → 0 (0 · log 0 = 0), so an underflowed p_y (log p_y = −inf) contributes 0
    plogp = np.where(np.isfinite(lpy), np.exp(lpy) * np.where(np.isfinite(lpy), lpy, 0.0), 0.0)
    # γ p_y log p_y − (1 − p_y): both terms ≤ 0, nothing cancels
    inner = gamma * plogp - np.exp(lqy)
    ay = _alpha_y(y, alpha)
    scale = np.asarray(ay)[..., None] if np.ndim(ay) else ay
    # ∂ℓ/∂z_c = α_y (1 − p_y)^γ r_c (γ p_y log p_y − (1 − p_y)), the (1 − p_y)^(γ−1) absorbed in r_c
    return scale * pow_from_log(gamma, lqy) * r * inner


def focal_multiclass_jax(z: jax.Array, y: jax.Array, inputs: str = "logits", gamma: float = 2.0,
                         alpha: Any = None) -> jax.Array:
    """JAX twin of :func:`focal_multiclass_per_example`.

    Example:
        >>> import jax.numpy as jnp
        >>> round(float(focal_multiclass_jax(jnp.zeros((1, 2)), jnp.array([0]), gamma=0.0)[0]), 6)
        0.693147
    """
    ls = j_log_softmax(jnp.asarray(z))
    lpy, lqy = j_take_label(ls, y), j_log1m_softmax_at(ls, y)  # 1 − p_y = Σ_{c≠y} p_c
    ay = 1.0 if alpha is None else (alpha if np.ndim(alpha) == 0 else jnp.asarray(alpha)[y])
    return ay * j_pow_from_log(gamma, lqy) * -lpy


_GAMMA = Param(name="gamma", default=2.0, doc="focusing exponent γ ≥ 0 (0 gives cross-entropy)",
               validate=_check_gamma)


def _focal(*, alpha: Param, notes: str, **fields: Any) -> Reference:
    """A focal reference: what both focal losses share (γ first among the parameters, the
    citation, and the note on convexity and propriety) added to its own ``fields``."""
    return Reference(params=(_GAMMA, alpha), citation=_CITATION,
                     notes=f"{notes} Not convex, not proper for gamma > 0.", **fields)


FOCAL_BINARY = _focal(
    name="focal_binary",
    summary="sigmoid focal loss −α_t (1 − p_t)^γ log p_t, stable in log space",
    formula="−α_t (1 − p_t)^γ log p_t,  p_t = σ((2y − 1) z),  α_t = α y + (1 − α)(1 − y)",
    kinds=frozenset({"binary"}),
    alpha=Param("alpha", 0.25, "weight α of positives (1 − α for negatives), None = 1", _check_alpha_binary),
    forms=Forms(focal_binary_per_example, focal_binary_per_example_grad, focal_binary_jax),
    properties=frozenset({"nonnegative"}),
    target_domain="hard",
    notes=("soft targets follow the generalisation 1 − p_t = y(1 − p) + (1 − y)p with the soft "
           "cross-entropy in place of −log p_t; comparisons use hard targets only."),
)

FOCAL_MULTICLASS = _focal(
    name="focal_multiclass",
    summary="softmax focal loss −α_y (1 − p_y)^γ log p_y, stable in log space",
    formula="−α_y (1 − p_y)^γ log softmax(z)_y",
    kinds=frozenset({"categorical"}),
    alpha=Param("alpha", None, "None, one number, or a per-class list α_c (weight α_y)", _check_alpha_multi),
    forms=Forms(focal_multiclass_per_example, focal_multiclass_per_example_grad, focal_multiclass_jax),
    properties=frozenset({"nonnegative", "shift_invariant", "class_symmetric"}),
    notes=("class_symmetric holds for alpha=None or a scalar alpha (the default is None); a "
           "per-class alpha breaks it. alpha multiplies inside the per-example loss, so a mean divides by N."),
)
