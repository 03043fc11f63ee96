"""Recipe 1 — a new loss with no reference: Poly-1 for the ripeness grader.

An (invented) fruit-packing cooperative photographs apples on a conveyor and grades each one
into C ripeness grades. The grading team tries Poly-1, cross-entropy plus a linear term in the
probability of the true grade. lossguard has no registry entry for it, so the battery checks what
any loss must satisfy (finite values and gradients at extreme logits, gradients that match finite
differences, invariance to shifting a row of logits, …) without a reference.

Notation: logits (N, C), class axis last; grades (N,) integers in [0, C).
Formula (Leng et al. 2022): ℓ = −log p_t + ε (1 − p_t), p_t = softmax(z)_t, averaged over N.

    lossguard check recipes/orchard/poly_grade.py:poly1_grade --kind categorical --param epsilon=1.0

References:
    Leng, Z., Tan, M., Liu, C., Cubuk, E. D., Shi, X., Cheng, S. and Anguelov, D., "PolyLoss: A
    Polynomial Expansion Perspective of Classification Loss Functions", ICLR 2022.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp


def poly1_grade(logits: jax.Array, grades: jax.Array, epsilon: float = 1.0) -> jax.Array:
    """Mean Poly-1 loss over a batch of apples."""
    logp = jax.nn.log_softmax(logits, axis=-1)  # log softmax(z) = z − logsumexp(z), max-shifted
    logp_t = jnp.take_along_axis(logp, grades[:, None], axis=-1)[:, 0]
    p_t = jnp.exp(logp_t)  # p_t from its logarithm: never exp of a large logit
    return jnp.mean(-logp_t + epsilon * (1.0 - p_t))


def poly1_grade_draft(logits: jax.Array, grades: jax.Array, epsilon: float = 1.0) -> jax.Array:
    """The first draft: the log of a softmax, which meets log(0) on confidently wrong apples."""
    p = jax.nn.softmax(logits, axis=-1)
    p_t = jnp.take_along_axis(p, grades[:, None], axis=-1)[:, 0]
    return jnp.mean(-jnp.log(p_t) + epsilon * (1.0 - p_t))
