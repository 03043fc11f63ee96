"""Kullback–Leibler divergence from a target distribution to the softmax of the logits.

Notation and shapes: logits ``z`` (N, C), class axis last; targets ``y`` (N, C), rows of the
simplex (zeros allowed). ls = log softmax(z), p = softmax(z).

Formula (per example):

    ℓ = KL(y ‖ p) = Σ_c y_c (log y_c − ls_c),   with 0 · log 0 = 0 (and 0 · ls_c = 0)
    ∂ℓ/∂z = (Σ_c y_c) p − y  (= p − y on the simplex)

It differs from cross-entropy only by the target entropy, which does not depend on z, so it has
the same gradient and is 0 exactly at p = y. Properties: convex in z, shift_invariant, proper,
nonnegative, class_symmetric.

Example:
    >>> import numpy as np
    >>> float(KL_DIVERGENCE.per_example(np.zeros((1, 2)), np.array([[0.5, 0.5]]))[0])
    0.0

References:
    Kullback, S. and Leibler, R. A., "On Information and Sufficiency", The Annals of
    Mathematical Statistics 22(1), 1951.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
from numpy.typing import ArrayLike

from ._base import Forms, Reference
from ._stable import f64, j_log_softmax, j_xlogy, log_softmax, softmax, xlogy

__all__ = ["KL_DIVERGENCE", "kl_per_example", "kl_per_example_grad", "kl_jax"]


def kl_per_example(z: ArrayLike, y: ArrayLike, inputs: str = "logits") -> np.ndarray:
    """KL(y_i ‖ softmax(z_i)) of each example.

    Shapes: ``z``, ``y`` (N, C) → (N,).
    Formula: Σ_c [y_c log y_c − y_c ls_c], each term 0 where y_c = 0.

    Args:
        z: logits (N, C). y: target rows (N, C). inputs: ``"logits"``.
    Returns:
        float64 (N,), ≥ 0 up to rounding.

    Example:
        >>> round(float(kl_per_example(np.array([[0.0, 0.0]]), np.array([[1.0, 0.0]]))[0]), 12)
        0.69314718056

    References:
        Kullback and Leibler, Annals of Mathematical Statistics, 1951.
    """
    z, y = f64(z), f64(y)
    ls = log_softmax(z)
    # y_c (log y_c − ls_c) with 0 · log 0 = 0 and 0 · ls_c = 0 even where ls_c = −inf
    return np.sum(xlogy(y, y) - y * np.where(y == 0, 0.0, ls), axis=-1)


def kl_per_example_grad(z: ArrayLike, y: ArrayLike, inputs: str = "logits") -> np.ndarray:
    """∂ℓ/∂z of :func:`kl_per_example`: (Σ_c y_c) p − y.

    Shapes: (N, C) → (N, C).

    Args:
        z, y, inputs: as in :func:`kl_per_example`.
    Returns:
        float64 (N, C).

    Example:
        >>> kl_per_example_grad(np.zeros((1, 2)), np.array([[1.0, 0.0]])).tolist()
        [[-0.5, 0.5]]

    References:
        Kullback and Leibler, Annals of Mathematical Statistics, 1951.
    """
    z, y = f64(z), f64(y)
    # ∇_z(−Σ y_c ls_c) = (Σ y_c) p − y since ∂ls_c/∂z_k = δ_ck − p_k; the entropy term is constant
    return np.sum(y, axis=-1, keepdims=True) * softmax(z) - y


def kl_jax(z: jax.Array, y: jax.Array, inputs: str = "logits") -> jax.Array:
    """JAX twin of :func:`kl_per_example`.

    Example:
        >>> import jax.numpy as jnp
        >>> float(kl_jax(jnp.zeros((1, 2)), jnp.full((1, 2), 0.5))[0])
        0.0
    """
    ls = j_log_softmax(jnp.asarray(z))
    safe = jnp.where(y == 0, 0.0, ls)  # double-where: 0 · ls = 0 with a finite derivative
    return jnp.sum(j_xlogy(y, y) - y * safe, axis=-1)


KL_DIVERGENCE = Reference(
    name="kl_divergence",
    summary="KL(y ‖ softmax(z)) for target distributions, 0 · log 0 = 0",
    formula="Σ_c y_c (log y_c − log softmax(z)_c)",
    kinds=frozenset({"distribution"}),
    forms=Forms(kl_per_example, kl_per_example_grad, kl_jax),
    properties=frozenset({"convex", "shift_invariant", "proper", "nonnegative", "class_symmetric"}),
    citation=(
        "Kullback, S., Leibler, R. A., 'On Information and Sufficiency', The Annals of "
        "Mathematical Statistics, 1951"
    ),
    notes="equals categorical_ce minus the target entropy; same gradient p − y.",
)
