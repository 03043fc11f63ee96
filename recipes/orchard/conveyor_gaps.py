"""Recipe 4 — a loss with an ignore label: frames with no apple on the conveyor.

Some conveyor frames show an empty cup; the labelling tool marks them ``-1``. The ripeness loss
must leave them out: zero gradient for those rows, and a mean over the real apples only.

Notation: logits (N, C), class axis last; labels (N,) in [0, C) or −1.

    lossguard check recipes/orchard/conveyor_gaps.py:gap_ce --kind categorical \\
        --reference categorical_ce --ignore-label -1
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

EMPTY_CUP = -1


def gap_ce(logits: jax.Array, labels: jax.Array) -> jax.Array:
    """Mean cross-entropy over the frames that hold an apple."""
    real = labels != EMPTY_CUP
    safe = jnp.where(real, labels, 0)  # any valid index; the row is masked out below
    logp = jax.nn.log_softmax(logits, axis=-1)  # log softmax(z) = z − logsumexp(z), max-shifted
    nll = -jnp.take_along_axis(logp, safe[:, None], axis=-1)[:, 0]
    count = jnp.maximum(jnp.sum(real), 1).astype(nll.dtype)
    # divide before summing: partial sums stay near the mean (in float16, eight losses of 2e4
    # summed first would pass 65504 and overflow although their mean is representable)
    return jnp.sum(jnp.where(real, nll / count, 0.0))


def gap_ce_all_frames(logits: jax.Array, labels: jax.Array) -> jax.Array:
    """A common slip: the masked sum divided by every frame, empty cups included."""
    real = labels != EMPTY_CUP
    safe = jnp.where(real, labels, 0)
    logp = jax.nn.log_softmax(logits, axis=-1)
    nll = -jnp.take_along_axis(logp, safe[:, None], axis=-1)[:, 0]
    return jnp.sum(jnp.where(real, nll, 0.0)) / labels.shape[0]
