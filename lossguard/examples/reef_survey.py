"""Bundled example: losses from an (invented) coral-reef survey project.

A team classifies underwater photo tiles into reef-health classes (healthy, bleached, algae,
rubble, sand …). Their training code carries two versions of the cross-entropy: the one they
ship, and an older one written as ``log(softmax(z))`` that produced NaNs on confident tiles.

    lossguard check lossguard/examples/reef_survey.py:tile_loss --kind categorical --reference categorical_ce
    lossguard check lossguard/examples/reef_survey.py:tile_loss_old --kind categorical --reference categorical_ce
"""

from __future__ import annotations

import jax
import jax.numpy as jnp


def tile_loss(logits: jax.Array, labels: jax.Array) -> jax.Array:
    """Mean cross-entropy over tiles: logits (N, C), integer labels (N,)."""
    logp = jax.nn.log_softmax(logits, axis=-1)  # log softmax(z) = z − logsumexp(z), max-shifted
    return -jnp.mean(jnp.take_along_axis(logp, labels[:, None], axis=-1))


def tile_loss_old(logits: jax.Array, labels: jax.Array) -> jax.Array:
    """The old version: log of a softmax, which underflows to log(0) for confident tiles."""
    p = jax.nn.softmax(logits, axis=-1)
    return -jnp.mean(jnp.log(jnp.take_along_axis(p, labels[:, None], axis=-1)))
