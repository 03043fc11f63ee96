"""Correct losses, written in as many different styles as practitioners use.

Every one must pass the whole default battery (and the opt-in checks it declares with
``expect``). Shapes: categorical ``z`` (N, C) with labels ``y`` (N,); distribution ``y`` (N, C)
on the simplex; binary ``z`` and ``y`` of the same shape; probability inputs are rows of a
softmax (or sigmoid outputs).
"""

from __future__ import annotations

from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ._entry import correct

IGNORE = -100
WEIGHTS = [0.5, 1.0, 2.0, 4.0]  # one per class: fixes C = 4


def _pick(a: jax.Array, y: jax.Array) -> jax.Array:
    """a[i, y_i] for each row i."""
    return jnp.take_along_axis(a, y[:, None], axis=-1)[:, 0]


@correct("jax.nn.log_softmax and take_along_axis, batch mean", kind="categorical",
         reference="categorical_ce")
def ce_with_jax_nn(z: jax.Array, y: jax.Array) -> jax.Array:
    return -jnp.mean(_pick(jax.nn.log_softmax(z, axis=-1), y))


@correct("hand-written log-sum-exp with max subtraction, target logit gathered by index",
         kind="categorical", reference="categorical_ce")
def ce_handwritten_logsumexp(z: jax.Array, y: jax.Array) -> jax.Array:
    m = jax.lax.stop_gradient(jnp.max(z, axis=-1, keepdims=True))  # lse(z) = m + log Σ exp(z − m), any m
    lse = m[:, 0] + jnp.log(jnp.sum(jnp.exp(z - m), axis=-1))
    return jnp.mean(lse - _pick(z, y))


@correct("per-example outputs (no reduction), written for vmap", kind="categorical",
         reference="categorical_ce")
def ce_per_example(z: jax.Array, y: jax.Array) -> jax.Array:
    return jax.nn.logsumexp(z, axis=-1) - _pick(z, y)


@correct("batch sum, declared reduction='sum'", kind="categorical", reference="categorical_ce",
         reduction="sum")
def ce_summed(z: jax.Array, y: jax.Array) -> jax.Array:
    return jnp.sum(jax.nn.logsumexp(z, axis=-1) - _pick(z, y))


def _np_log_softmax(z: np.ndarray) -> np.ndarray:
    m = np.max(z, axis=-1, keepdims=True)  # log softmax(z) = z − m − log Σ exp(z − m)
    return z - m - np.log(np.sum(np.exp(z - m), axis=-1, keepdims=True))


def _np_ce_grad(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    g = np.exp(_np_log_softmax(z))  # ∂/∂z mean_i(−log softmax(z_i)_{y_i}) = (softmax(z) − onehot)/N
    g[np.arange(len(y)), y] -= 1
    return g / len(y)


@correct("plain numpy (not traceable by JAX) with a hand-derived closed-form grad",
         kind="categorical", reference="categorical_ce", grad=_np_ce_grad)
def ce_numpy_with_grad(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    z = np.asarray(z)
    return np.asarray(-np.mean(_np_log_softmax(z)[np.arange(len(y)), np.asarray(y)]), dtype=z.dtype)


@jax.custom_vjp
def _ce_vjp(z: jax.Array, y: jax.Array) -> jax.Array:
    return -jnp.mean(_pick(jax.nn.log_softmax(z, axis=-1), y))


def _ce_vjp_fwd(z: jax.Array, y: jax.Array) -> tuple[jax.Array, Any]:
    logp = jax.nn.log_softmax(z, axis=-1)
    return -jnp.mean(_pick(logp, y)), (jnp.exp(logp), y)


def _ce_vjp_bwd(res: Any, g: jax.Array) -> tuple[jax.Array, None]:
    p, y = res
    # ∂/∂z of the mean CE is (p − onehot)/N, scaled by the incoming cotangent g
    return g * (p - jax.nn.one_hot(y, p.shape[-1], dtype=p.dtype)) / y.shape[0], None


_ce_vjp.defvjp(_ce_vjp_fwd, _ce_vjp_bwd)


@correct("jax.custom_vjp with the residual softmax kept differentiable and the cotangent applied",
         kind="categorical", reference="categorical_ce", expect=("second-order",))
def ce_custom_vjp(z: jax.Array, y: jax.Array) -> jax.Array:
    return _ce_vjp(z, y)


@correct("class-weighted, normalised by the sum of the labels' weights (the usual convention)",
         kind="categorical", reference="categorical_ce", params={"weight": WEIGHTS})
def ce_class_weighted(z: jax.Array, y: jax.Array, weight: list[float]) -> jax.Array:
    w = jnp.asarray(weight, dtype=z.dtype)[y]
    share = w / jnp.sum(w)  # normalise the weights first: Σ w ℓ can overflow where Σ (w/Σw) ℓ does not
    return jnp.sum(share * -_pick(jax.nn.log_softmax(z, axis=-1), y))


@correct("ignore label sanitised before indexing, masked with where, mean over kept examples",
         kind="categorical", reference="categorical_ce", ignore_label=IGNORE)
def ce_ignore_label(z: jax.Array, y: jax.Array) -> jax.Array:
    keep = y != IGNORE
    nll = -_pick(jax.nn.log_softmax(z, axis=-1), jnp.where(keep, y, 0))  # any legal index; masked below
    # divide before summing: Σ ℓ_i can overflow float16 where the mean Σ (ℓ_i / n) does not
    return jnp.sum(jnp.where(keep, nll, 0.0) / jnp.sum(keep))


@correct("probability inputs, soft targets; double where so 0 · log 0 = 0 with a finite gradient",
         kind="distribution", inputs="probabilities", reference="categorical_ce")
def ce_probabilities_guarded(p: jax.Array, y: jax.Array) -> jax.Array:
    used = y > 0
    safe_p = jnp.where(used, p, 1.0)  # log is never taken of a p that does not count
    return -jnp.mean(jnp.sum(jnp.where(used, y * jnp.log(safe_p), 0.0), axis=-1))


@correct("label smoothing written out without optax: (1 - ε)·nll + ε·mean_c(-log p)",
         kind="categorical", reference="smoothed_ce", params={"epsilon": 0.1})
def smoothed_ce_by_hand(z: jax.Array, y: jax.Array, epsilon: float) -> jax.Array:
    logp = jax.nn.log_softmax(z, axis=-1)
    # mean_c as Σ_c (ε/C)·log p_c: scaling before the sum keeps C large terms from overflowing
    uniform = jnp.sum((epsilon / logp.shape[-1]) * logp, axis=-1)
    return jnp.mean((1.0 - epsilon) * -_pick(logp, y) - uniform)


@correct("logistic loss as (1 - y)·z + softplus(-z) with jax.nn.softplus", kind="binary",
         reference="bce")
def bce_softplus_form(z: jax.Array, y: jax.Array) -> jax.Array:
    # −y log σ(z) − (1 − y) log(1 − σ(z)) = (1 − y) z + softplus(−z)
    # softplus = logaddexp(·, 0) is smooth at 0 (no kink for autodiff to mis-split)
    return jnp.mean((1.0 - y) * z + jax.nn.softplus(-z))


@correct("per-element BCE through jax.nn.log_sigmoid with a positive-class weight",
         kind="binary", reference="bce", params={"pos_weight": 3.0})
def bce_log_sigmoid_weighted(z: jax.Array, y: jax.Array, pos_weight: float) -> jax.Array:
    # log σ(z) and log(1 − σ(z)) = log σ(−z), both without cancellation
    return -(pos_weight * y * jax.nn.log_sigmoid(z) + (1.0 - y) * jax.nn.log_sigmoid(-z))


@correct("sigmoid focal loss in log space: (1 - p_t)^γ = exp(γ log σ(-s))", kind="binary",
         reference="focal_binary", params={"gamma": 2.0, "alpha": 0.25})
def focal_binary_log_space(z: jax.Array, y: jax.Array, gamma: float, alpha: float) -> jax.Array:
    s = (2.0 * y - 1.0) * z  # p_t = σ(s) for hard targets
    alpha_t = alpha * y + (1.0 - alpha) * (1.0 - y)
    return jnp.mean(alpha_t * jnp.exp(gamma * jax.nn.log_sigmoid(-s)) * -jax.nn.log_sigmoid(s))


@correct("softmax focal loss with 1 - p_y = -expm1(log p_y)", kind="categorical",
         reference="focal_multiclass", params={"gamma": 2.0})
def focal_multiclass_expm1(z: jax.Array, y: jax.Array, gamma: float) -> jax.Array:
    logp_y = _pick(jax.nn.log_softmax(z, axis=-1), y)
    return jnp.mean((-jnp.expm1(logp_y)) ** gamma * -logp_y)


@correct("KL(y ‖ softmax z) with a double where for 0 · log 0", kind="distribution",
         reference="kl_divergence")
def kl_double_where(z: jax.Array, y: jax.Array) -> jax.Array:
    logp = jax.nn.log_softmax(z, axis=-1)
    used = y > 0
    logy = jnp.log(jnp.where(used, y, 1.0))
    return jnp.mean(jnp.sum(jnp.where(used, y * (logy - logp), 0.0), axis=-1))


@correct("Brier score on softmax probabilities, no reference; declared proper; a bounded loss "
         "that saturates for confidently wrong rows by design, so live-gradient is skipped",
         kind="categorical", expect=("proper",), skip=("live-gradient",))
def brier_score(z: jax.Array, y: jax.Array) -> jax.Array:
    onehot = jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)
    return jnp.mean(jnp.sum((jax.nn.softmax(z, axis=-1) - onehot) ** 2, axis=-1))


@correct("soft-target cross-entropy, terms with a zero target dropped by where (masked classes)",
         kind="distribution", reference="categorical_ce")
def soft_target_ce(z: jax.Array, y: jax.Array) -> jax.Array:
    logp = jax.nn.log_softmax(z, axis=-1)
    # y_c = 0 contributes 0 even where log p_c = −inf (a masked class): 0 · (−inf) would be nan
    return -jnp.mean(jnp.sum(jnp.where(y > 0, y * logp, 0.0), axis=-1))


@partial(jax.jit, static_argnames=())
def _jitted_core(z: jax.Array, y: jax.Array) -> jax.Array:
    return jax.nn.logsumexp(z, axis=-1) - _pick(z, y)


@correct("already wrapped in jax.jit by its author, per-example outputs", kind="categorical",
         reference="categorical_ce")
def ce_prejitted(z: jax.Array, y: jax.Array) -> jax.Array:
    return _jitted_core(z, y)
