"""Broken losses: hand-written gradients (jax.custom_vjp, numpy with a declared grad).

The forward values are right; the backward pass is not. Only comparing the gradient with an
independent oracle (finite differences of the value) can tell. Shapes: logits ``z`` (N, C),
labels ``y`` (N,). For softmax cross-entropy ∂ℓ_i/∂z_i = softmax(z_i) − onehot(y_i) (common
practice; Bridle 1990), divided by N for a batch mean.
"""

from __future__ import annotations

from collections.abc import Callable
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ._entry import broken

F = "custom-grad"


def _nll(z: jax.Array, y: jax.Array) -> jax.Array:
    """−log softmax(z)_y per row, shape (N,)."""
    return -jnp.take_along_axis(jax.nn.log_softmax(z, axis=-1), y[:, None], axis=-1)[:, 0]


def _ce_with_backward(backward: Callable[[jax.Array, jax.Array, jax.Array, jax.Array], jax.Array],
                      per_example: bool = False) -> Callable[[jax.Array, jax.Array], jax.Array]:
    """Mean (or per-example) softmax CE whose VJP is ``backward(z, y, p, g)``; p = softmax(z)."""

    @jax.custom_vjp
    def f(z: jax.Array, y: jax.Array) -> jax.Array:
        return _nll(z, y) if per_example else jnp.mean(_nll(z, y))

    def fwd(z: jax.Array, y: jax.Array) -> tuple[jax.Array, Any]:
        return f(z, y), (z, y, jax.nn.softmax(z, axis=-1))

    def bwd(res: Any, g: jax.Array) -> tuple[jax.Array, None]:
        z, y, p = res
        return backward(z, y, p, g), None

    f.defvjp(fwd, bwd)
    return f


def _onehot(y: jax.Array, z: jax.Array) -> jax.Array:
    return jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)


_missing_mean = _ce_with_backward(lambda z, y, p, g: g * (p - _onehot(y, z)))
_sign_flipped = _ce_with_backward(lambda z, y, p, g: g * (_onehot(y, z) - p) / y.shape[0])
_no_cotangent = _ce_with_backward(lambda z, y, p, g: p - _onehot(y, z), per_example=True)
_sigmoid_residual = _ce_with_backward(
    lambda z, y, p, g: g * (jax.nn.sigmoid(z) - _onehot(y, z)) / y.shape[0])


@broken(F, "gradient", "custom_vjp backward forgets the 1/N of the batch mean: gradient N times too big",
        kind="categorical", reference="categorical_ce")
def vjp_missing_mean(z: jax.Array, y: jax.Array) -> jax.Array:
    return _missing_mean(z, y)


@broken(F, "gradient", "custom_vjp backward returns onehot - p: gradient ascent on the loss",
        kind="categorical", reference="categorical_ce")
def vjp_sign_flipped(z: jax.Array, y: jax.Array) -> jax.Array:
    return _sign_flipped(z, y)


@broken(F, "gradient", "custom_vjp backward ignores the incoming cotangent g: right only when every "
        "per-example output is weighted by exactly 1", kind="categorical", reference="categorical_ce")
def vjp_ignores_cotangent(z: jax.Array, y: jax.Array) -> jax.Array:
    return _no_cotangent(z, y)


@broken(F, "gradient", "custom_vjp backward uses sigmoid(z) where the forward used softmax(z)",
        kind="categorical", reference="categorical_ce")
def vjp_sigmoid_for_softmax(z: jax.Array, y: jax.Array) -> jax.Array:
    return _sigmoid_residual(z, y)


@partial(jax.custom_vjp, nondiff_argnums=(2,))
def _smoothed(z: jax.Array, y: jax.Array, epsilon: float) -> jax.Array:
    logp = jax.nn.log_softmax(z, axis=-1)
    nll = -jnp.take_along_axis(logp, y[:, None], axis=-1)[:, 0]
    return jnp.mean((1.0 - epsilon) * nll - epsilon * jnp.mean(logp, axis=-1))


def _smoothed_fwd(z: jax.Array, y: jax.Array, epsilon: float) -> tuple[jax.Array, Any]:
    return _smoothed(z, y, epsilon), (z, y)


def _smoothed_bwd(epsilon: float, res: Any, g: jax.Array) -> tuple[jax.Array, None]:
    z, y = res
    # the bug: p − onehot is the gradient of the unsmoothed loss; smoothing needs p − target
    return g * (jax.nn.softmax(z, axis=-1) - _onehot(y, z)) / y.shape[0], None


_smoothed.defvjp(_smoothed_fwd, _smoothed_bwd)


@broken(F, "gradient", "custom_vjp for label-smoothed CE whose backward still uses the hard one-hot "
        "target", kind="categorical", reference="smoothed_ce", params={"epsilon": 0.1})
def vjp_smoothing_forgotten(z: jax.Array, y: jax.Array, epsilon: float) -> jax.Array:
    return _smoothed(z, y, epsilon)


@broken(F, "gradient", "focal loss with the modulating factor (1 - p)^γ wrapped in stop_gradient: "
        "autodiff returns a gradient the value does not have", kind="categorical",
        reference="focal_multiclass", params={"gamma": 2.0})
def focal_weight_detached(z: jax.Array, y: jax.Array, gamma: float) -> jax.Array:
    logp_y = -_nll(z, y)
    factor = jax.lax.stop_gradient(-jnp.expm1(logp_y) ** gamma)  # 1 − p = −expm1(log p)
    return jnp.mean(factor * -logp_y)


def _np_ce(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    m = np.max(z, axis=-1, keepdims=True)  # log-sum-exp(z) = m + log Σ exp(z − m)
    logp = z - m - np.log(np.sum(np.exp(z - m), axis=-1, keepdims=True))
    return np.asarray(-np.mean(logp[np.arange(len(y)), y]))


def _np_ce_grad_no_mean(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    e = np.exp(z - np.max(z, axis=-1, keepdims=True))
    p = e / np.sum(e, axis=-1, keepdims=True)
    p[np.arange(len(y)), y] -= 1.0
    return p  # the bug: the gradient of the mean needs a further / len(y)


@broken(F, "gradient", "numpy loss whose declared closed-form grad forgets the 1/N of the mean",
        kind="categorical", reference="categorical_ce", grad=_np_ce_grad_no_mean)
def numpy_grad_missing_mean(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    return _np_ce(np.asarray(z), np.asarray(y))


@jax.custom_vjp
def _detached(z: jax.Array, y: jax.Array) -> jax.Array:
    return jnp.mean(_nll(z, y))


def _detached_fwd(z: jax.Array, y: jax.Array) -> tuple[jax.Array, Any]:
    return _detached(z, y), (jax.lax.stop_gradient(jax.nn.softmax(z, axis=-1)), y)


def _detached_bwd(res: Any, g: jax.Array) -> tuple[jax.Array, None]:
    p, y = res
    return g * (p - _onehot(y, p)) / y.shape[0], None


_detached.defvjp(_detached_fwd, _detached_bwd)


@broken(F, "second-order", "custom_vjp that saves stop_gradient(softmax) as its residual: first "
        "derivatives are right, Hessian-vector products come out zero", kind="categorical",
        reference="categorical_ce")
def vjp_detached_residual(z: jax.Array, y: jax.Array) -> jax.Array:
    return _detached(z, y)
