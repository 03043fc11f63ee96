"""Binary cross-entropy (logistic loss) in logits or probabilities, with a positive-class weight.

Notation and shapes: predictions ``z`` of shape (N,) or (N, D) — one independent binary output
per element — and targets ``y`` of the same shape with values in [0, 1] (soft targets allowed).
p = σ(z) in logits; in probabilities ``z`` is p itself. w is ``pos_weight`` (1 when ``None``).

Formula (per element):

    logits:         ℓ = (1 − y) z + (1 + (w − 1) y) softplus(−z)
                      = (1 − y) softplus(z) + w y softplus(−z)   (computed form: nothing cancels)
    probabilities:  ℓ = −[w y log p + (1 − y) log(1 − p)]              (0 · log 0 = 0)

    ∂ℓ/∂z = (1 − y) σ(z) − w y σ(−z)        (= σ(z) − y when w = 1)
    ∂ℓ/∂p = −w y / p + (1 − y) / (1 − p)

A probability of exactly 0 (or 1) where the target puts mass on it gives ℓ = +inf; that is the
true value, not an error. Properties (for the default ``pos_weight=None``): convex in z (and in p),
nonnegative, proper (strictly: the minimiser over p is p = y). With ``pos_weight`` ≠ 1 the loss
stays convex and nonnegative but is no longer proper (the minimiser is p = wy / (wy + 1 − y)).

Example:
    >>> import numpy as np
    >>> round(float(BCE.per_example(np.array([0.0]), np.array([1.0]))[0]), 12)  # ln 2
    0.69314718056

References:
    Cox, D. R., "The Regression Analysis of Binary Sequences", Journal of the Royal Statistical
    Society B 20(2), 1958 (logistic regression, whose negative log-likelihood this is).
    Gneiting, T. and Raftery, A. E., "Strictly Proper Scoring Rules, Prediction, and Estimation",
    Journal of the American Statistical Association 102(477), 2007 (propriety of the log score).
"""

from __future__ import annotations

import math
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from numpy.typing import ArrayLike

from ._base import Forms, Param, Reference
from ._stable import f64, j_softplus, sigmoid, softplus, xlog1py, xlogy

__all__ = ["BCE", "bce_per_example", "bce_per_example_grad", "bce_jax"]


def _check_pos_weight(value: Any, classes: int | None) -> str | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) \
            or value <= 0:
        return "expected None or a positive finite number; try pos_weight=2.0"
    return None


def _w(pos_weight: float | None) -> float:
    return 1.0 if pos_weight is None else float(pos_weight)


def bce_per_example(
    z: ArrayLike, y: ArrayLike, inputs: str = "logits", pos_weight: float | None = None
) -> np.ndarray:
    """Binary cross-entropy of each element.

    Shapes: ``z`` and ``y`` (N,) or (N, D) → ℓ of the same shape.
    Formula: see the module docstring.

    Args:
        z: logits, or probabilities in [0, 1] when ``inputs="probabilities"``.
        y: targets in [0, 1].
        inputs: ``"logits"`` or ``"probabilities"``.
        pos_weight: weight of the positive term (``None`` = 1).
    Returns:
        float64 array, shape of ``z``.

    Example:
        >>> float(bce_per_example(np.array([40.0]), np.array([1.0]))[0])
        4.248354255291589e-18

    References:
        Cox, JRSS B, 1958.
    """
    z, y, w = f64(z), f64(y), _w(pos_weight)
    if inputs == "probabilities":
        # log(1 − p) = log1p(−p); 0 · log 0 = 0 on both terms
        return -(w * xlogy(y, z) + xlog1py(1.0 - y, -z))
    # (1 − y) z + (1 + (w − 1) y) softplus(−z) = (1 − y) softplus(z) + w y softplus(−z),
    # using softplus(z) = z + softplus(−z); both terms are ≥ 0, so nothing cancels
    return (1.0 - y) * softplus(z) + w * y * softplus(-z)


def bce_per_example_grad(
    z: ArrayLike, y: ArrayLike, inputs: str = "logits", pos_weight: float | None = None
) -> np.ndarray:
    """∂ℓ/∂z of :func:`bce_per_example`, element by element.

    Shapes: (N,) or (N, D) → same shape.
    Formula: (1 − y) σ(z) − w y σ(−z) in logits; −w y/p + (1 − y)/(1 − p) in probabilities.

    Args:
        z, y, inputs, pos_weight: as in :func:`bce_per_example`.
    Returns:
        float64 array, shape of ``z``.

    Example:
        >>> float(bce_per_example_grad(np.array([0.0]), np.array([1.0]))[0])
        -0.5

    References:
        Cox, JRSS B, 1958.
    """
    z, y, w = f64(z), f64(y), _w(pos_weight)
    if inputs == "probabilities":
        with np.errstate(divide="ignore", invalid="ignore"):
            pos = np.where(y == 0, 0.0, w * y / z)  # 0 · (1/p) = 0 where the target has no mass
            neg = np.where(y == 1, 0.0, (1.0 - y) / (1.0 - z))
        return neg - pos
    # σ(z) − y written as (1 − y) σ(z) − y σ(−z), using 1 − σ(z) = σ(−z): exact for hard targets
    return (1.0 - y) * sigmoid(z) - w * y * sigmoid(-z)


def bce_jax(
    z: jax.Array, y: jax.Array, inputs: str = "logits", pos_weight: float | None = None
) -> jax.Array:
    """JAX twin of :func:`bce_per_example` (differentiable in ``z``).

    Example:
        >>> import jax.numpy as jnp
        >>> round(float(bce_jax(jnp.zeros(1), jnp.ones(1))[0]), 6)
        0.693147
    """
    w = _w(pos_weight)
    if inputs == "probabilities":
        safe_p = jnp.where(y == 0, 1.0, z)  # double-where keeps the derivative finite when masked
        safe_q = jnp.where(y == 1, 0.0, z)
        pos = jnp.where(y == 0, 0.0, y * jnp.log(safe_p))  # 0 · log 0 = 0
        neg = jnp.where(y == 1, 0.0, (1.0 - y) * jnp.log1p(-safe_q))  # log(1 − p) = log1p(−p)
        return -(w * pos + neg)
    # (1 − y) softplus(z) + w y softplus(−z), the cancellation-free form of the logistic loss
    return (1.0 - y) * j_softplus(z) + w * y * j_softplus(-z)


BCE = Reference(
    name="bce",
    summary="binary cross-entropy (logistic loss), soft targets, optional positive-class weight",
    formula="(1 − y) z + (1 + (w − 1) y) softplus(−z)  |  −[w y log p + (1 − y) log(1 − p)]",
    kinds=frozenset({"binary"}),
    inputs=frozenset({"logits", "probabilities"}),
    params=(Param("pos_weight", None, "multiplier w of the positive term w·y·log p (None = 1)", _check_pos_weight),),
    forms=Forms(bce_per_example, bce_per_example_grad, bce_jax),
    properties=frozenset({"convex", "nonnegative", "proper"}),
    citation=(
        "Cox, D. R., 'The Regression Analysis of Binary Sequences', Journal of the Royal "
        "Statistical Society B, 1958"
    ),
    notes=(
        "properties are those of pos_weight=None; with pos_weight != 1 the loss is convex and "
        "nonnegative but not proper. Probabilities of exactly 0 or 1 give +inf where the target "
        "puts mass on them (the true value)."
    ),
)
