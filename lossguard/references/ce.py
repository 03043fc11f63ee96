"""Softmax cross-entropy (plain, class-weighted, label-smoothed) and its Hessian.

Notation and shapes: predictions ``z`` of shape (N, C), class axis last; targets ``y`` are either
integer labels (N,) in [0, C) ("categorical") or rows of the simplex (N, C) ("distribution").
ls = log softmax(z), p = softmax(z); in probabilities ``z`` is p itself. w is the per-class
``weight`` (all ones when ``None``), ε the smoothing ``epsilon``.

Formulas (per example i):

    categorical_ce, categorical:   ℓ_i = −ls_{i,y_i}                example weight w_{y_i}
    categorical_ce, distribution:  ℓ_i = −Σ_c w_c y_ic ls_ic          example weight 1
    smoothed_ce (categorical):     ℓ_i = −Σ_c t_ic ls_ic,  t_i = (1 − ε) onehot(y_i) + ε / C

    ∂ℓ/∂z (logits): p − onehot(y) (categorical), (Σ_c w_c y_c) p − w ⊙ y (distribution),
                    p − t (smoothed).  In probabilities: −1/p_y at y (categorical), −w ⊙ y / p.

The class weight enters the categorical case as an example weight (so a weighted mean divides by
Σ_i w_{y_i}), and the distribution case inside the sum with example weight 1 (so a mean divides
by N). That is the convention of the widely used deep-learning frameworks' weighted
cross-entropy; both are spelled out here so that a loss following it can be compared exactly.

Properties. categorical_ce (weight=None): convex in z, shift_invariant (adding a constant to a
row changes nothing), proper (the expected loss under y ~ q is minimised at p = q), nonnegative,
class_symmetric. With a non-uniform ``weight`` it is no longer class_symmetric nor proper, which
the static set (declared for the default parameters) does not record. smoothed_ce: convex,
shift_invariant, nonnegative, class_symmetric; not proper for ε > 0 (the minimiser is the
smoothed target, never a one-hot prediction).

Example:
    >>> import numpy as np
    >>> round(float(CATEGORICAL_CE.per_example(np.zeros((1, 4)), np.array([2]))[0]), 12)  # ln 4
    1.38629436112

References:
    Good, I. J., "Rational Decisions", Journal of the Royal Statistical Society B 14(1), 1952
    (the logarithmic score). Bridle, J. S., "Probabilistic Interpretation of Feedforward
    Classification Network Outputs, with Relationships to Statistical Pattern Recognition",
    Neurocomputing (NATO ASI Series F 68), 1990 (softmax outputs). Szegedy, C., Vanhoucke, V.,
    Ioffe, S., Shlens, J. and Wojna, Z., "Rethinking the Inception Architecture for Computer
    Vision", CVPR 2016 (label smoothing).
"""

from __future__ import annotations

import math
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from numpy.typing import ArrayLike

from ._base import Forms, Param, Reference
from ._stable import (f64, j_log_softmax, j_take_label, label_log_softmax, log_softmax, onehot, softmax,
                      take_label, xlogy)

__all__ = ["CATEGORICAL_CE", "SMOOTHED_CE", "ce_per_example", "ce_per_example_grad", "ce_jax",
           "smoothed_per_example", "smoothed_per_example_grad", "smoothed_jax",
           "softmax_ce_hessian"]


def _is_labels(z: Any, y: Any) -> bool:
    """Integer labels (one axis fewer than ``z``) rather than distribution rows."""
    return np.ndim(y) == np.ndim(z) - 1


def _check_weight(value: Any, classes: int | None) -> str | None:
    if value is None:
        return None
    hint = "try weight=[1.0, 2.0, 1.0] (one positive number per class)"
    if isinstance(value, (str, bytes)) or np.ndim(value) != 1:
        return f"expected None or a list of positive numbers; {hint}"
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        return f"expected None or a list of positive numbers; {hint}"
    if any(isinstance(v, bool) for v in value) or not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        return f"expected None or a list of positive finite numbers; {hint}"
    if classes is not None and arr.shape[0] != classes:
        return f"expected {classes} entries (one per class), got {arr.shape[0]}; {hint}"
    return None


def _check_epsilon(value: Any, classes: int | None) -> str | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) \
            or not 0.0 <= value < 1.0:
        return "expected a number in [0, 1); try epsilon=0.1"
    return None


def _weights(weight: Any, classes: int) -> np.ndarray:
    return np.ones(classes) if weight is None else f64(weight)


def ce_per_example(
    z: ArrayLike, y: ArrayLike, inputs: str = "logits", weight: Any = None
) -> np.ndarray:
    """Cross-entropy of each example (class weight not applied for labels; see module doc).

    Shapes: ``z`` (N, C); ``y`` labels (N,) or rows (N, C) → ℓ (N,).
    Formula: −ls_y (labels); −Σ_c w_c y_c ls_c (rows); ls = log p in probabilities.

    Args:
        z: logits (N, C), or probabilities when ``inputs="probabilities"``.
        y: integer labels (N,) or simplex rows (N, C).
        inputs: ``"logits"`` or ``"probabilities"``.
        weight: per-class weights (C,) or ``None``; only used here for distribution rows.
    Returns:
        float64 (N,).

    Example:
        >>> float(ce_per_example(np.array([[40.0, 0.0]]), np.array([0]))[0])
        4.248354255291589e-18

    References:
        Good, JRSS B, 1952.
    """
    z = f64(z)
    if _is_labels(z, y) and inputs != "probabilities":
        return -label_log_softmax(z, y)  # only the label's entry of log softmax is needed
    with np.errstate(divide="ignore"):
        ls = np.log(z) if inputs == "probabilities" else log_softmax(z)
    if _is_labels(z, y):
        return -take_label(ls, y)
    w, t = _weights(weight, z.shape[-1]), f64(y)
    if inputs == "probabilities":
        return -np.sum(w * xlogy(t, z), axis=-1)  # 0 · log 0 = 0
    return -np.sum(w * t * np.where(t == 0, 0.0, ls), axis=-1)  # 0 · log 0 = 0 (ls may be −inf)


def ce_per_example_grad(
    z: ArrayLike, y: ArrayLike, inputs: str = "logits", weight: Any = None
) -> np.ndarray:
    """∂ℓ_i/∂z_i of :func:`ce_per_example`.

    Shapes: ``z`` (N, C) → (N, C).
    Formula: p − onehot(y); (Σ_c w_c y_c) p − w ⊙ y; probabilities: −onehot(y)/p, −w ⊙ y/p.

    Args:
        z, y, inputs, weight: as in :func:`ce_per_example`.
    Returns:
        float64 (N, C).

    Example:
        >>> ce_per_example_grad(np.zeros((1, 2)), np.array([1])).tolist()
        [[0.5, -0.5]]

    References:
        Bridle, Neurocomputing, 1990.
    """
    z = f64(z)
    c = z.shape[-1]
    labels = np.asarray(y)
    if _is_labels(z, y) and inputs != "probabilities" and np.issubdtype(labels.dtype, np.integer) \
            and labels.size and labels.min() >= 0 and labels.max() < c:
        p = np.ascontiguousarray(softmax(z))  # row-major: the sums below add in the usual order
        lab = labels.astype(np.int64)[..., None]
        np.put_along_axis(p, lab, 0.0, axis=-1)
        # p_y − 1 = −Σ_{c≠y} p_c: summing the others avoids the cancellation when p_y ≈ 1
        np.put_along_axis(p, lab, -np.sum(p, axis=-1, keepdims=True), axis=-1)
        return p
    if _is_labels(z, y):
        t, w = onehot(y, c), np.ones(c)
    else:
        t, w = f64(y), _weights(weight, c)
    wt = w * t
    if inputs == "probabilities":
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(wt == 0, 0.0, -wt / z)  # ∂(−a log p)/∂p = −a/p, and 0 where a = 0
    p = softmax(z)
    if _is_labels(z, y):
        # p_y − 1 = −Σ_{c≠y} p_c: summing the others avoids the cancellation when p_y ≈ 1
        others = np.sum(np.where(t > 0, 0.0, p), axis=-1, keepdims=True)
        return np.where(t > 0, -others, p)
    return np.sum(wt, axis=-1, keepdims=True) * p - wt  # ∇(−Σ a_c ls_c) = (Σ a_c) p − a


def ce_jax(z: jax.Array, y: jax.Array, inputs: str = "logits", weight: Any = None) -> jax.Array:
    """JAX twin of :func:`ce_per_example`.

    Example:
        >>> import jax.numpy as jnp
        >>> round(float(ce_jax(jnp.zeros((1, 2)), jnp.array([0]))[0]), 6)
        0.693147
    """
    z = jnp.asarray(z)
    if jnp.ndim(y) == jnp.ndim(z) - 1:
        if inputs == "probabilities":
            # gather p_y before the log: log of an unused p_c = 0 would put 0·(1/0) = nan in the gradient
            return -jnp.log(j_take_label(z, y))
        return -j_take_label(j_log_softmax(z), y)
    if inputs == "probabilities":
        # where on the log's input: a class with y_c = 0 and p_c = 0 must not reach log, whose
        # derivative 1/0 times the zero from the outer where is nan (the double-where rule)
        ls = jnp.log(jnp.where(y == 0, 1.0, z))
    else:
        ls = j_log_softmax(z)
    w = jnp.ones(z.shape[-1]) if weight is None else jnp.asarray(weight, dtype=z.dtype)
    safe = jnp.where(y == 0, 0.0, ls)  # 0 · log 0 = 0 with a finite derivative
    return -jnp.sum(jnp.where(y == 0, 0.0, w * y * safe), axis=-1)


def _ce_example_weights(y: ArrayLike, weight: Any = None, **_: Any) -> np.ndarray:
    """Per-example weights: w_{y_i} for labels, 1 for distribution rows (see module doc)."""
    y = np.asarray(y)
    if y.ndim == 1 and np.issubdtype(y.dtype, np.integer):
        return np.ones(y.shape) if weight is None else f64(weight)[y]
    return np.ones(y.shape[:-1])


def softmax_ce_hessian(z: ArrayLike) -> np.ndarray:
    """Hessian of softmax cross-entropy in the logits of one example: diag(p) − p pᵀ.

    Shapes: ``z`` (C,) → (C, C). It does not depend on the label (the label term is linear).
    Formula: ∂²(logsumexp(z) − z_y)/∂z_a∂z_b = p_a δ_ab − p_a p_b.

    Args:
        z: logits of one example.
    Returns:
        float64 (C, C), symmetric positive semi-definite, rows summing to 0.

    Example:
        >>> softmax_ce_hessian(np.zeros(2)).tolist()
        [[0.25, -0.25], [-0.25, 0.25]]

    References:
        Bridle, Neurocomputing, 1990.
    """
    p = softmax(f64(z))
    h = -np.outer(p, p)
    others = (1.0 - np.eye(p.shape[0])) @ p  # Σ_{b≠a} p_b, summed directly
    # diagonal p_a − p_a² = p_a (1 − p_a) = p_a Σ_{b≠a} p_b: no cancellation when p_a ≈ 1
    np.fill_diagonal(h, p * others)
    return h


# ------------------------------------------------------------------------------- smoothed CE


def _smoothed_target(y: ArrayLike, classes: int, epsilon: float) -> np.ndarray:
    return (1.0 - epsilon) * onehot(y, classes) + epsilon / classes


def smoothed_per_example(
    z: ArrayLike, y: ArrayLike, inputs: str = "logits", epsilon: float = 0.1
) -> np.ndarray:
    """Label-smoothed cross-entropy of each example.

    Shapes: ``z`` (N, C), ``y`` labels (N,) → (N,).
    Formula: ℓ = (1 − ε)(−ls_y) + (ε / C) Σ_c (−ls_c).

    Args:
        z: logits (N, C). y: labels (N,). inputs: ``"logits"``. epsilon: ε ∈ [0, 1).
    Returns:
        float64 (N,).

    Example:
        >>> round(float(smoothed_per_example(np.zeros((1, 3)), np.array([1]))[0]), 12)  # ln 3
        1.098612288668

    References:
        Szegedy, Vanhoucke, Ioffe, Shlens, Wojna, CVPR 2016.
    """
    ls = log_softmax(f64(z))
    # −Σ t_c ls_c with t = (1 − ε) onehot + ε/C, split so each term is a sum of nonpositive ls
    return (1.0 - epsilon) * -take_label(ls, y) + (epsilon / ls.shape[-1]) * -np.sum(ls, axis=-1)


def smoothed_per_example_grad(
    z: ArrayLike, y: ArrayLike, inputs: str = "logits", epsilon: float = 0.1
) -> np.ndarray:
    """∂ℓ/∂z of :func:`smoothed_per_example`: p − t.

    Shapes: (N, C) → (N, C). Formula: p_c − ε/C off the label, −Σ_{c≠y} p_c + ε(1 − 1/C) at it.

    Args:
        z, y, inputs, epsilon: as in :func:`smoothed_per_example`.
    Returns:
        float64 (N, C), each row summing to 0.

    Example:
        >>> smoothed_per_example_grad(np.zeros((1, 2)), np.array([0]), epsilon=0.0).tolist()
        [[-0.5, 0.5]]

    References:
        Szegedy, Vanhoucke, Ioffe, Shlens, Wojna, CVPR 2016.
    """
    z = f64(z)
    c = z.shape[-1]
    p = softmax(z)
    at = onehot(y, c) > 0
    others = np.sum(np.where(at, 0.0, p), axis=-1, keepdims=True)
    # p_y − (1 − ε) − ε/C = −(1 − p_y) + ε(1 − 1/C), with 1 − p_y = Σ_{c≠y} p_c
    return np.where(at, -others + epsilon * (1.0 - 1.0 / c), p - epsilon / c)


def smoothed_jax(
    z: jax.Array, y: jax.Array, inputs: str = "logits", epsilon: float = 0.1
) -> jax.Array:
    """JAX twin of :func:`smoothed_per_example`.

    Example:
        >>> import jax.numpy as jnp
        >>> round(float(smoothed_jax(jnp.zeros((1, 2)), jnp.array([0]))[0]), 6)
        0.693147
    """
    ls = j_log_softmax(jnp.asarray(z))
    c = ls.shape[-1]
    # scale each term before summing: Σ_c ls_c can overflow where (ε/C)·Σ_c ls_c fits
    return (1.0 - epsilon) * -j_take_label(ls, y) - jnp.sum((epsilon / c) * ls, axis=-1)


CATEGORICAL_CE = Reference(
    name="categorical_ce",
    summary="softmax cross-entropy for labels or target distributions, optional class weights",
    formula="−log softmax(z)_y  |  −Σ_c w_c y_c log softmax(z)_c  (probabilities: log p)",
    kinds=frozenset({"categorical", "distribution"}),
    inputs=frozenset({"logits", "probabilities"}),
    params=(Param("weight", None, "per-class weights w_c (labels: example weight w_y; rows: inside the sum)",
                  _check_weight, per_class=True),),
    forms=Forms(ce_per_example, ce_per_example_grad, ce_jax),
    properties=frozenset({"convex", "shift_invariant", "proper", "nonnegative", "class_symmetric"}),
    citation=(
        "Good, I. J., 'Rational Decisions', Journal of the Royal Statistical Society B, 1952; "
        "Bridle, J. S., 'Probabilistic Interpretation of Feedforward Classification Network "
        "Outputs, with Relationships to Statistical Pattern Recognition', Neurocomputing, 1990"
    ),
    example_weights=_ce_example_weights,
    notes=(
        "properties are those of weight=None; a non-uniform weight breaks class_symmetric and "
        "proper. Labels: the weighted mean divides by the sum of the labels' weights; "
        "distribution rows: weights act inside the sum and the mean divides by N."
    ),
)

SMOOTHED_CE = Reference(
    name="smoothed_ce",
    summary="softmax cross-entropy against the label-smoothed target (1 − ε) onehot + ε/C",
    formula="−Σ_c [(1 − ε) [c = y] + ε/C] log softmax(z)_c",
    kinds=frozenset({"categorical"}),
    params=(Param("epsilon", 0.1, "smoothing mass ε ∈ [0, 1) spread uniformly over the C classes", _check_epsilon),),
    forms=Forms(smoothed_per_example, smoothed_per_example_grad, smoothed_jax),
    properties=frozenset({"convex", "shift_invariant", "nonnegative", "class_symmetric"}),
    citation=(
        "Szegedy, C., Vanhoucke, V., Ioffe, S., Shlens, J., Wojna, Z., 'Rethinking the Inception "
        "Architecture for Computer Vision', CVPR 2016"
    ),
    notes="not proper for epsilon > 0; with epsilon = 0 it equals categorical_ce.",
)
