"""Broken losses: properties a classification loss should have and these do not.

Shift invariance of softmax losses (adding a constant to a row of logits changes nothing),
symmetry under relabelling the classes, non-negativity, determinism, a gradient that does not
die where the loss is still large, and properness (the expected loss is minimised by predicting
the true distribution). Shapes: categorical ``z`` (N, C) with labels ``y`` (N,); binary ``z`` and
``y`` of the same shape.
"""

from __future__ import annotations

import itertools

import jax
import jax.numpy as jnp
import numpy as np

from ._entry import broken

F = "properties"


def _pick(a: jax.Array, y: jax.Array) -> jax.Array:
    """a[i, y_i] for each row i."""
    return jnp.take_along_axis(a, y[:, None], axis=-1)[:, 0]


# -- shift ---------------------------------------------------------------------------------
@broken(F, "shift", "normaliser log(1 + Σ exp z) (an implicit background class of logit 0 the model "
        "does not have): adding a constant to a row changes the loss", kind="categorical")
def implicit_null_class(z: jax.Array, y: jax.Array) -> jax.Array:
    # log(1 + Σ exp z) = logaddexp(0, logsumexp(z)), evaluated stably
    return jnp.mean(jnp.logaddexp(0.0, jax.nn.logsumexp(z, axis=-1)) - _pick(z, y))


@broken(F, "shift", "scores the target class with a sigmoid (one-vs-rest) while declared a softmax "
        "classifier: -log σ(z_y) ignores the other classes", kind="categorical")
def sigmoid_of_target_logit(z: jax.Array, y: jax.Array) -> jax.Array:
    return -jnp.mean(jax.nn.log_sigmoid(_pick(z, y)))


# -- classes -------------------------------------------------------------------------------
@broken(F, "classes", "treats class 0 as a background/void class and drops its examples",
        kind="categorical")
def class0_dropped_as_background(z: jax.Array, y: jax.Array) -> jax.Array:
    keep = y > 0
    nll = -_pick(jax.nn.log_softmax(z, axis=-1), y)
    return jnp.sum(jnp.where(keep, nll, 0.0)) / jnp.maximum(jnp.sum(keep), 1)


@broken(F, "classes", "assumes 1-based labels and indexes with y - 1, so label 0 wraps to the last "
        "class", kind="categorical")
def labels_off_by_one(z: jax.Array, y: jax.Array) -> jax.Array:
    return -jnp.mean(_pick(jax.nn.log_softmax(z, axis=-1), y - 1))


# -- nonnegative ---------------------------------------------------------------------------
@broken(F, "nonnegative", "stable logistic loss misremembered as z - z·y + log1p(exp(-|z|)) (the "
        "correct form starts with max(z, 0)): negative for z < 0", kind="binary")
def stable_bce_missing_max(z: jax.Array, y: jax.Array) -> jax.Array:
    return jnp.mean(z - z * y + jnp.log1p(jnp.exp(-jnp.abs(z))))


@broken(F, "nonnegative", "log-sum-exp over the other classes only (target left out of the "
        "normaliser): negative once the target logit leads", kind="categorical")
def normaliser_without_target(z: jax.Array, y: jax.Array) -> jax.Array:
    onehot = jax.nn.one_hot(y, z.shape[-1], dtype=bool)
    others = jnp.where(onehot, -jnp.inf, z)
    return jnp.mean(jax.nn.logsumexp(others, axis=-1) - _pick(z, y))


# -- deterministic ---------------------------------------------------------------------------
_calls = itertools.count()


@broken(F, "deterministic", "label smoothing annealed by a hidden call counter: the same inputs give a "
        "different loss on every call", kind="categorical")
def annealed_by_call_count(z: jax.Array, y: jax.Array) -> jax.Array:
    eps = 0.2 / (1.0 + next(_calls))  # Python state read at call (or trace) time
    logp = jax.nn.log_softmax(z, axis=-1)
    return jnp.mean((1.0 - eps) * -_pick(logp, y) - eps * jnp.mean(logp, axis=-1))


def _noisy_grad(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    e = np.exp(z - np.max(z, axis=-1, keepdims=True))
    g = e / np.sum(e, axis=-1, keepdims=True)
    g[np.arange(len(y)), y] -= 1.0
    return g / len(y)


@broken(F, "deterministic", "numpy loss that adds unseeded jitter to the logits ('noise regularisation' "
        "inside the loss)", kind="categorical", grad=_noisy_grad)
def unseeded_logit_jitter(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    zz = np.asarray(z, dtype=np.float64)
    zz = zz + 1e-3 * np.random.default_rng().standard_normal(zz.shape)  # fresh OS entropy each call
    m = np.max(zz, axis=-1, keepdims=True)  # log-sum-exp(z) = m + log Σ exp(z − m)
    lse = m[:, 0] + np.log(np.sum(np.exp(zz - m), axis=-1))
    return np.asarray(np.mean(lse - zz[np.arange(len(y)), np.asarray(y)]), dtype=np.asarray(z).dtype)


# -- live-gradient ---------------------------------------------------------------------------
@broken(F, "live-gradient", "probability clipped to [1e-7, 1] before the log: a confidently wrong "
        "example (p_y < 1e-7) gets zero gradient although its loss is large",
        kind="categorical", reference="categorical_ce")
def clipped_probability(z: jax.Array, y: jax.Array) -> jax.Array:
    p_y = _pick(jax.nn.softmax(z, axis=-1), y)
    return -jnp.mean(jnp.log(jnp.clip(p_y, 1e-7, 1.0)))


@broken(F, ("live-gradient", "reference"), "logits clipped to [-10, 10] 'for stability': beyond "
        "it the gradient is zero although the loss is still wrong", kind="categorical",
        reference="categorical_ce")
def clipped_logits(z: jax.Array, y: jax.Array) -> jax.Array:
    zz = jnp.clip(z, -10.0, 10.0)
    return -jnp.mean(_pick(jax.nn.log_softmax(zz, axis=-1), y))


# -- proper (opt-in) ---------------------------------------------------------------------------
@broken(F, "proper", "L1 distance between softmax probabilities and the one-hot target, used as if "
        "calibrated: its expected value is minimised by putting all mass on the likeliest class",
        kind="categorical", expect=("proper",))
def l1_on_probabilities(z: jax.Array, y: jax.Array) -> jax.Array:
    onehot = jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)
    return jnp.mean(jnp.sum(jnp.abs(jax.nn.softmax(z, axis=-1) - onehot), axis=-1))


@broken(F, "proper", "squared error between the logits themselves and the one-hot target: minimised "
        "at z = q, and softmax(q) ≠ q", kind="categorical", expect=("proper",))
def squared_error_on_logits(z: jax.Array, y: jax.Array) -> jax.Array:
    onehot = jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)
    return jnp.mean(jnp.sum((z - onehot) ** 2, axis=-1))
