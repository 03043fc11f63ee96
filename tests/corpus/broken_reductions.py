"""Broken losses: reductions over the batch.

A mean over the batch must not depend on how the batch was cut (the mean of a batch is the
example-count-weighted mean of its parts), a sum must add up, and per-example values must not
depend on the other examples. Shapes: logits ``z`` (N, C), labels ``y`` (N,).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

from ._entry import broken

F = "reductions"


def _nll(z: jax.Array, y: jax.Array) -> jax.Array:
    """−log softmax(z)_y per row, shape (N,)."""
    return -jnp.take_along_axis(jax.nn.log_softmax(z, axis=-1), y[:, None], axis=-1)[:, 0]


@broken(F, "batch", "returns the batch sum while declared (by default) as a batch mean",
        kind="categorical")
def sum_declared_as_mean(z: jax.Array, y: jax.Array) -> jax.Array:
    return jnp.sum(_nll(z, y))


@broken(F, "batch", "divides by a hard-coded batch size of 32 instead of the actual one",
        kind="categorical")
def hardcoded_batch_size(z: jax.Array, y: jax.Array) -> jax.Array:
    return jnp.sum(_nll(z, y)) / 32.0


@broken(F, "batch", "centres the logits over the batch axis first, so each example's loss depends on "
        "the others in its batch", kind="categorical")
def batch_centred_logits(z: jax.Array, y: jax.Array) -> jax.Array:
    return jnp.mean(_nll(z - jnp.mean(z, axis=0, keepdims=True), y))


@broken(F, "batch", "per-example values pre-divided by the batch size (for gradient accumulation): "
        "an example's value changes with the size of its batch", kind="categorical")
def per_example_divided_by_n(z: jax.Array, y: jax.Array) -> jax.Array:
    return _nll(z, y) / y.shape[0]


@broken(F, "batch", "normalises the loss by the batch's total confidence (a 'self-balancing' weight "
        "computed over the batch, without stop_gradient)", kind="categorical")
def batch_softmax_weights(z: jax.Array, y: jax.Array) -> jax.Array:
    nll = _nll(z, y)
    w = jax.nn.softmax(nll)  # weights over the batch axis: each depends on every example
    return jnp.sum(w * nll)
