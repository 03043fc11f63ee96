"""Broken losses: numerics at extreme logits.

Each is a formula that is right on paper and wrong in floating point: an exponential that
overflows, a log that meets an underflowed 0, a where-guard whose other branch poisons the
gradient, a power or square root whose derivative is infinite at a point the ladder reaches.
Shapes: categorical logits ``z`` (N, C) with integer labels ``y`` (N,); binary ``z`` and ``y``
of the same shape.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

from ._entry import broken

F = "numerics"


def _pick(a: jax.Array, y: jax.Array) -> jax.Array:
    """a[i, y_i] for each row i."""
    return jnp.take_along_axis(a, y[:, None], axis=-1)[:, 0]


@broken(F, "finite", "log of a softmax: the target probability underflows to 0 and log(0) = -inf "
        "once it trails the top logit by ~745 (float64) or ~104 (float32)",
        kind="categorical", reference="categorical_ce")
def log_of_softmax(z: jax.Array, y: jax.Array) -> jax.Array:
    return -jnp.mean(jnp.log(_pick(jax.nn.softmax(z, axis=-1), y)))


@broken(F, "finite", "log-sum-exp without subtracting the row max: exp overflows to inf above ~709 "
        "(float64) or ~88 (float32)", kind="categorical", reference="categorical_ce")
def unshifted_logsumexp(z: jax.Array, y: jax.Array) -> jax.Array:
    lse = jnp.log(jnp.sum(jnp.exp(z), axis=-1))
    return jnp.mean(lse - _pick(z, y))


@broken(F, "finite", "binary cross-entropy through sigmoid then log: 1 - σ(z) rounds to 0 for z > ~37 "
        "(float64) and 0 · log 0 = nan", kind="binary", reference="bce")
def sigmoid_then_log(z: jax.Array, y: jax.Array) -> jax.Array:
    p = jax.nn.sigmoid(z)
    return -jnp.mean(y * jnp.log(p) + (1.0 - y) * jnp.log(1.0 - p))


@broken(F, "finite", "softplus written log1p(exp(-z)): exp(-z) overflows for z < -709 (float64), "
        "so a confidently wrong positive scores inf", kind="binary", reference="bce")
def log1p_exp_softplus(z: jax.Array, y: jax.Array) -> jax.Array:
    # (1 − y) z + softplus(−z) is the logistic loss; the softplus is evaluated naively here
    return jnp.mean((1.0 - y) * z + jnp.log1p(jnp.exp(-z)))


@broken(F, "finite", "confidence penalty with where(p > 0, p log p, 0): the value is guarded but "
        "the untaken branch's derivative 0 · log 0 makes the gradient nan",
        kind="categorical", params={"beta": 0.1})
def entropy_bonus_where_trap(z: jax.Array, y: jax.Array, beta: float) -> jax.Array:
    logp = jax.nn.log_softmax(z, axis=-1)
    p = jnp.exp(logp)
    neg_entropy = jnp.sum(jnp.where(p > 0, p * jnp.log(p), 0.0), axis=-1)
    return jnp.mean(-_pick(logp, y) + beta * neg_entropy)


@broken(F, "finite", "calibration penalty ‖p - onehot‖₂: the square root's derivative is infinite "
        "where a confident right row makes the distance exactly 0, and inf · 0 = nan",
        kind="categorical", params={"lam": 0.05})
def distance_penalty_sqrt(z: jax.Array, y: jax.Array, lam: float) -> jax.Array:
    logp = jax.nn.log_softmax(z, axis=-1)
    dist = jnp.sqrt(jnp.sum((jnp.exp(logp) - jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)) ** 2, axis=-1))
    return jnp.mean(-_pick(logp, y) + lam * dist)


@broken(F, "finite", "log-sum-exp stabilised by the max over the whole batch instead of each row: a "
        "row far below the batch max underflows to log(0)", kind="categorical", reference="categorical_ce")
def batch_max_stabiliser(z: jax.Array, y: jax.Array) -> jax.Array:
    m = jax.lax.stop_gradient(jnp.max(z))
    lse = jnp.log(jnp.sum(jnp.exp(z - m), axis=-1)) + m
    return jnp.mean(lse - _pick(z, y))


@broken(F, "finite", "focal weight (1 - p)^γ with γ < 1 taken on the probability: its derivative is "
        "infinite where p rounds to 1, and inf · 0 = nan in the gradient",
        kind="categorical", reference="focal_multiclass", params={"gamma": 0.5})
def focal_small_gamma_power(z: jax.Array, y: jax.Array, gamma: float) -> jax.Array:
    logp_y = _pick(jax.nn.log_softmax(z, axis=-1), y)
    return jnp.mean((1.0 - jnp.exp(logp_y)) ** gamma * -logp_y)


@broken(F, ("reference", "gradient"), "the 'cancellation-free' logistic loss max(z, 0) - z·y + "
        "log1p(exp(-|z|)) differentiated by autodiff: at z = 0 the kinks of max and |·| give "
        "max'(0) = 1/2 and |·|'(0) = 1, so the gradient is -y instead of σ(0) - y = 1/2 - y",
        kind="binary", reference="bce")
def kinked_stable_bce(z: jax.Array, y: jax.Array) -> jax.Array:
    return jnp.mean(jnp.maximum(z, 0.0) - z * y + jnp.log1p(jnp.exp(-jnp.abs(z))))


@broken(F, "finite", "label smoothing's uniform term as ε·mean_c(log p): the row sum of C "
        "log-probabilities overflows at logits near the dtype's largest value although the loss itself fits",
        kind="categorical", reference="smoothed_ce", params={"epsilon": 0.1},
        max_logit="full")  # it breaks only at the format's top, beyond the default |z| ≤ 1e3
def smoothing_sum_overflows(z: jax.Array, y: jax.Array, epsilon: float) -> jax.Array:
    logp = jax.nn.log_softmax(z, axis=-1)
    return jnp.mean((1.0 - epsilon) * -_pick(logp, y) - epsilon * jnp.mean(logp, axis=-1))
