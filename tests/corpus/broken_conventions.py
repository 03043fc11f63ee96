"""Broken losses: label-smoothing, weighting and target conventions.

Each computes a plausible loss that is not the one declared: smoothing mass spread over the
wrong classes, a weighted mean normalised by the wrong total, a class weight looked up by the
wrong index, a positive-class weight on the negative term, a divergence in the wrong direction.
Only the comparison with the declared reference can tell; these all declare one.
Shapes: categorical ``z`` (N, C) with labels ``y`` (N,); distribution ``y`` (N, C) on the
simplex; binary ``z`` and ``y`` of the same shape.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

from ._entry import broken

F = "conventions"
WEIGHTS = [0.5, 1.0, 2.0, 4.0]  # one per class: fixes C = 4


def _pick(a: jax.Array, y: jax.Array) -> jax.Array:
    """a[i, y_i] for each row i."""
    return jnp.take_along_axis(a, y[:, None], axis=-1)[:, 0]


@broken(F, "reference", "label smoothing that puts ε/(C-1) on each other class instead of ε/C on every "
        "class", kind="categorical", reference="smoothed_ce", params={"epsilon": 0.1})
def smoothing_over_others(z: jax.Array, y: jax.Array, epsilon: float) -> jax.Array:
    c = z.shape[-1]
    onehot = jax.nn.one_hot(y, c, dtype=z.dtype)
    target = onehot * (1.0 - epsilon) + (1.0 - onehot) * epsilon / (c - 1)
    return -jnp.mean(jnp.sum(target * jax.nn.log_softmax(z, axis=-1), axis=-1))


@broken(F, "reference", "accepts the smoothing parameter but uses a hard-coded 0.1", kind="categorical",
        reference="smoothed_ce", params={"epsilon": 0.25})
def smoothing_parameter_ignored(z: jax.Array, y: jax.Array, epsilon: float) -> jax.Array:
    eps = 0.1
    logp = jax.nn.log_softmax(z, axis=-1)
    return jnp.mean((1.0 - eps) * -_pick(logp, y) + eps * -jnp.mean(logp, axis=-1))


@broken(F, "reference", "class-weighted mean divided by N instead of by the sum of the labels' weights",
        kind="categorical", reference="categorical_ce", params={"weight": WEIGHTS})
def weighted_mean_over_n(z: jax.Array, y: jax.Array, weight: list[float]) -> jax.Array:
    w = jnp.asarray(weight, dtype=z.dtype)[y]
    return jnp.sum(w * -_pick(jax.nn.log_softmax(z, axis=-1), y)) / y.shape[0]


@broken(F, "reference", "class weight looked up by the predicted class (argmax) instead of the label",
        kind="categorical", reference="categorical_ce", params={"weight": WEIGHTS})
def weight_of_predicted_class(z: jax.Array, y: jax.Array, weight: list[float]) -> jax.Array:
    w = jnp.asarray(weight, dtype=z.dtype)[jnp.argmax(z, axis=-1)]
    return jnp.sum(w * -_pick(jax.nn.log_softmax(z, axis=-1), y)) / jnp.sum(w)


@broken(F, "reference", "pos_weight multiplies the negative term instead of the positive one",
        kind="binary", reference="bce", params={"pos_weight": 3.0})
def pos_weight_on_negatives(z: jax.Array, y: jax.Array, pos_weight: float) -> jax.Array:
    # log σ(z) = −softplus(−z), log(1 − σ(z)) = −softplus(z)
    return jnp.mean(y * jax.nn.softplus(-z) + pos_weight * (1.0 - y) * jax.nn.softplus(z))


@broken(F, "reference", "focal α given to the negatives and 1 - α to the positives (swapped)",
        kind="binary", reference="focal_binary", params={"gamma": 2.0, "alpha": 0.25})
def focal_alpha_swapped(z: jax.Array, y: jax.Array, gamma: float, alpha: float) -> jax.Array:
    s = (2.0 * y - 1.0) * z  # p_t = σ(s)
    alpha_t = (1.0 - alpha) * y + alpha * (1.0 - y)
    # (1 − p_t)^γ = exp(γ log σ(−s)), log p_t = log σ(s)
    return jnp.mean(alpha_t * jnp.exp(gamma * jax.nn.log_sigmoid(-s)) * -jax.nn.log_sigmoid(s))


@broken(F, "reference", "focal modulating factor p^γ instead of (1 - p)^γ: it up-weights the easy "
        "examples", kind="categorical", reference="focal_multiclass", params={"gamma": 2.0})
def focal_factor_inverted(z: jax.Array, y: jax.Array, gamma: float) -> jax.Array:
    logp_y = _pick(jax.nn.log_softmax(z, axis=-1), y)
    return jnp.mean(jnp.exp(gamma * logp_y) * -logp_y)


@broken(F, "reference", "KL divergence in the wrong direction, KL(p ‖ y) with a clipped log y, "
        "instead of KL(y ‖ p)", kind="distribution", reference="kl_divergence")
def kl_reversed(z: jax.Array, y: jax.Array) -> jax.Array:
    logp = jax.nn.log_softmax(z, axis=-1)
    logy = jnp.log(jnp.clip(y, 1e-12, 1.0))
    return jnp.mean(jnp.sum(jnp.exp(logp) * (logp - logy), axis=-1))


@broken(F, "reference", "soft binary targets rounded to 0/1 before the loss (a cast meant for hard "
        "labels)", kind="binary", reference="bce")
def soft_targets_rounded(z: jax.Array, y: jax.Array) -> jax.Array:
    t = jnp.round(y)
    return jnp.mean((1.0 - t) * z + jax.nn.softplus(-z))


@broken(F, "reference", "mean over the class axis too (mean of onehot · -log p over N·C entries): "
        "the loss is divided by C", kind="categorical", reference="categorical_ce")
def mean_over_class_axis(z: jax.Array, y: jax.Array) -> jax.Array:
    onehot = jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)
    return jnp.mean(onehot * -jax.nn.log_softmax(z, axis=-1))
