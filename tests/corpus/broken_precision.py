"""Broken losses: low precision (float16, bfloat16) and precision lost inside the loss.

Each is fine in float64 — most in float32 too — and wrong once a guard constant, a fill value,
an internal cast or an accumulator meets a narrower format. Shapes: logits ``z`` (N, C), labels
``y`` (N,).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

from ._entry import broken

F = "precision"
IGNORE = -100


def _pick(a: jax.Array, y: jax.Array) -> jax.Array:
    """a[i, y_i] for each row i."""
    return jnp.take_along_axis(a, y[:, None], axis=-1)[:, 0]


@broken(F, "dtypes", "-log(p + 1e-8): the guard rounds to 0 in float16 (below half its smallest "
        "subnormal, ~6e-8), so an underflowed probability gives log(0) = -inf",
        kind="categorical", reference="categorical_ce")
def epsilon_guard_vanishes(z: jax.Array, y: jax.Array) -> jax.Array:
    p_y = _pick(jax.nn.softmax(z, axis=-1), y)
    return -jnp.mean(jnp.log(p_y + 1e-8))


@broken(F, "dtypes", "ignored rows filled with a -1e9 logit and masked by a multiply: -1e9 is -inf in "
        "float16, the filled row's log-softmax is -inf - (-inf) = nan, and nan · 0 = nan",
        kind="categorical", reference="categorical_ce", ignore_label=IGNORE)
def fill_constant_overflows(z: jax.Array, y: jax.Array) -> jax.Array:
    valid = y != IGNORE
    zz = jnp.where(valid[:, None], z, -1e9)
    nll = -_pick(jax.nn.log_softmax(zz, axis=-1), jnp.where(valid, y, 0))
    return jnp.sum(nll * valid) / jnp.sum(valid)


@broken(F, "dtypes", "computes in float16 internally 'to save memory' and casts the result back: a "
        "float32 caller gets float16 accuracy", kind="categorical", reference="categorical_ce")
def internal_half_cast(z: jax.Array, y: jax.Array) -> jax.Array:
    logp = jax.nn.log_softmax(z.astype(jnp.float16), axis=-1)
    return -jnp.mean(_pick(logp, y)).astype(z.dtype)


@broken(F, "dtypes", "accumulates the batch sum in bfloat16 (8 significant bits) whatever the input "
        "precision", kind="categorical", reference="categorical_ce")
def bfloat16_accumulator(z: jax.Array, y: jax.Array) -> jax.Array:
    nll = -_pick(jax.nn.log_softmax(z, axis=-1), y)
    return (jnp.sum(nll.astype(jnp.bfloat16)) / y.shape[0]).astype(z.dtype)


@broken(F, "dtypes", "softmax shifted by the row mean instead of the row max: exp overflows in float16 "
        "once a logit is 11 above the mean", kind="categorical", reference="categorical_ce")
def mean_shifted_softmax(z: jax.Array, y: jax.Array) -> jax.Array:
    s = z - jnp.mean(z, axis=-1, keepdims=True)
    e = jnp.exp(s)
    return jnp.mean(jnp.log(jnp.sum(e, axis=-1)) - _pick(s, y))


@broken(F, "finite", "masked mean computed as Σ ℓ / n in the input dtype: the sum overflows float16 "
        "(max 65504) while the mean itself is representable", kind="categorical",
        reference="categorical_ce", ignore_label=IGNORE,
        max_logit="full")  # 16 rows overflow float16's sum only past the default |z| ≤ 1e3
def masked_sum_then_divide(z: jax.Array, y: jax.Array) -> jax.Array:
    keep = y != IGNORE
    nll = -_pick(jax.nn.log_softmax(z, axis=-1), jnp.where(keep, y, 0))
    return jnp.sum(jnp.where(keep, nll, 0.0)) / jnp.sum(keep)
