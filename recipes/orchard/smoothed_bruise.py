"""Recipe 2 — a re-implementation that must equal a reference: label-smoothed bruise grades.

The bruise grader (none, light, heavy) trains with label smoothing. The packing team wrote their
own version and wants it to be exactly the registry's ``smoothed_ce``: target (1 − ε)·onehot + ε/C.

Notation: logits (N, C), class axis last; labels (N,) integers in [0, C).

    lossguard check recipes/orchard/smoothed_bruise.py:smoothed_bruise --kind categorical \\
        --reference smoothed_ce --param epsilon=0.1

References:
    Szegedy, C., Vanhoucke, V., Ioffe, S., Shlens, J. and Wojna, Z., "Rethinking the Inception
    Architecture for Computer Vision", CVPR 2016 (label smoothing).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp


def smoothed_bruise(logits: jax.Array, labels: jax.Array, epsilon: float = 0.1) -> jax.Array:
    """Mean cross-entropy against (1 − ε)·onehot + ε/C."""
    c = logits.shape[-1]
    logp = jax.nn.log_softmax(logits, axis=-1)  # log softmax(z) = z − logsumexp(z), max-shifted
    target = (1.0 - epsilon) * jax.nn.one_hot(labels, c, dtype=logp.dtype) + epsilon / c
    per_apple = -jnp.sum(target * logp, axis=-1)
    # divide before summing: with logits near the largest float, a sum of the per-apple losses
    # overflows although their mean is representable
    return jnp.sum(per_apple / labels.shape[0])


def smoothed_bruise_off_by_one(logits: jax.Array, labels: jax.Array, epsilon: float = 0.1) -> jax.Array:
    """A common slip: the smoothing mass spread over the C − 1 other classes only."""
    c = logits.shape[-1]
    logp = jax.nn.log_softmax(logits, axis=-1)
    onehot = jax.nn.one_hot(labels, c, dtype=logp.dtype)
    target = (1.0 - epsilon) * onehot + (1.0 - onehot) * epsilon / (c - 1)
    return -jnp.mean(jnp.sum(target * logp, axis=-1))
