"""The losses the speed benchmark times: a small one and a large one (invented scenario).

A wildlife camera-trap team scores photos against species classes. ``small_loss`` is their plain
softmax cross-entropy; ``large_loss`` is the one they train with: a softmax focal loss with one
α per species (10 classes), an ignore label for unlabelled frames, written out op by op — a
bigger graph for JAX to trace and compile.

    lossguard check benchmarks/speed_losses.py:small_loss --kind categorical --reference categorical_ce
    lossguard check benchmarks/speed_losses.py:large_loss --kind categorical --reference focal_multiclass \
        --param gamma=2.0 --param 'alpha=[0.5,0.6,0.7,0.8,0.9,1.0,1.1,1.2,1.3,1.4]' --ignore-label -100
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

IGNORE = -100
ALPHA = [0.5, 0.6, 0.7, 0.8, 0.9, 1.0, 1.1, 1.2, 1.3, 1.4]
GAMMA = 2.0

#: how each loss is declared (the same flags as on the command lines above)
DECLARATIONS = {
    "small_loss": {"kind": "categorical", "reference": "categorical_ce"},
    "large_loss": {"kind": "categorical", "reference": "focal_multiclass",
                   "params": {"gamma": GAMMA, "alpha": ALPHA}, "ignore_label": IGNORE},
}


def small_loss(z: jax.Array, y: jax.Array) -> jax.Array:
    """Mean softmax cross-entropy: logits (N, C), labels (N,)."""
    logp = jax.nn.log_softmax(z, axis=-1)  # log softmax(z) = z − logsumexp(z), max-shifted
    return -jnp.mean(jnp.take_along_axis(logp, y[:, None], axis=-1))


def large_loss(z: jax.Array, y: jax.Array, gamma: float = GAMMA, alpha: list[float] = ALPHA) -> jax.Array:
    """Focal loss −α_y (1 − p_y)^γ log p_y, mean over labelled frames; logits (N, 10), labels (N,)."""
    keep = y != IGNORE
    safe = jnp.where(keep, y, 0)  # a legal index for unlabelled frames; they are masked below
    m = jax.lax.stop_gradient(jnp.max(z, axis=-1, keepdims=True))
    shifted = z - m  # logsumexp(z) = m + log Σ exp(z − m)
    lse = jnp.log(jnp.sum(jnp.exp(shifted), axis=-1))
    logp_y = jnp.take_along_axis(shifted, safe[:, None], axis=-1)[:, 0] - lse
    one_minus_p = -jnp.expm1(logp_y)  # 1 − p = −expm1(log p), exact near p = 1
    # (1 − p)^γ = exp(γ log(1 − p)) with log(1 − p) = log(−expm1(log p)); guarded at p = 1
    log_q = jnp.log(jnp.where(one_minus_p > 0, one_minus_p, 1.0))
    factor = jnp.where(one_minus_p > 0, jnp.exp(gamma * log_q), 0.0)
    # scale the weights by 1/n first: α_y ℓ_i and Σ ℓ_i can overflow where the mean does not
    a = jnp.asarray(alpha, dtype=z.dtype)[safe] / jnp.sum(keep)
    return jnp.sum(jnp.where(keep, a * factor * -logp_y, 0.0))


def other_small_loss(z: jax.Array, y: jax.Array) -> jax.Array:
    """The same cross-entropy written differently (per-example values): a second small loss."""
    return jax.nn.logsumexp(z, axis=-1) - jnp.take_along_axis(z, y[:, None], axis=-1)[:, 0]
