"""Recipe 5 — a change compared against the previous version: the focal loss rewrite.

Heavy bruises are rare, so the bruise grader uses a focal loss with γ = 0.5. Version 1 wrote
the modulating factor as ``(1 − p_t) ** γ``; version 2 computes it in log space. Before shipping
version 2 the team runs ``lossguard compare`` to see where the two part.

Notation: logits (N, C), class axis last; labels (N,) in [0, C); p_t = softmax(z)_t.
Formula (Lin et al. 2017): ℓ = −(1 − p_t)^γ log p_t, averaged over N.

    lossguard compare recipes/orchard/bruise_focal.py:focal_v1 recipes/orchard/bruise_focal.py:focal_v2 \\
        --kind categorical --param gamma=0.5

References:
    Lin, T.-Y., Goyal, P., Girshick, R., He, K. and Dollár, P., "Focal Loss for Dense Object
    Detection", ICCV 2017.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp


def focal_v1(logits: jax.Array, labels: jax.Array, gamma: float = 0.5) -> jax.Array:
    """Version 1: (1 − p_t) ** γ. Once p_t rounds to 1 the derivative of x ** γ at x = 0 is
    infinite, and ∞ · 0 in the chain rule gives NaN."""
    logp = jax.nn.log_softmax(logits, axis=-1)
    logp_t = jnp.take_along_axis(logp, labels[:, None], axis=-1)[:, 0]
    p_t = jnp.exp(logp_t)
    return jnp.mean(-((1.0 - p_t) ** gamma) * logp_t)


def focal_v2(logits: jax.Array, labels: jax.Array, gamma: float = 0.5) -> jax.Array:
    """Version 2: (1 − p_t)^γ = exp(γ · log(1 − p_t)), log(1 − p_t) = logsumexp of the other
    classes' log-probabilities, so no power of 0 is ever differentiated. Logits of −inf (classes
    masked out) are allowed."""
    logp = jax.nn.log_softmax(logits, axis=-1)  # log softmax(z) = z − logsumexp(z), max-shifted
    is_t = jax.nn.one_hot(labels, logits.shape[-1], dtype=bool)
    logp_t = jnp.sum(jnp.where(is_t, logp, 0.0), axis=-1)
    others = jnp.where(is_t, -jnp.inf, logp)
    # a row whose other classes are all masked (−inf logits) has 1 − p_t = 0 exactly; feed the
    # logsumexp zeros there so that its unused branch keeps a finite gradient (double where)
    alive = jnp.any(others > -jnp.inf, axis=-1)
    lse = jax.nn.logsumexp(jnp.where(alive[:, None], others, 0.0), axis=-1)
    log1m_pt = jnp.where(alive, lse, -jnp.inf)  # log(1 − p_t) = log Σ_{c≠t} p_c
    return jnp.mean(-jnp.exp(gamma * log1m_pt) * logp_t)
