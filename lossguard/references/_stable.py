"""Numerically stable float64 primitives shared by the reference losses, with JAX twins.

Notation and shapes: ``x`` is any float array; functions with an ``axis`` reduce over it (the
class axis is last by default). Labels ``y`` are integer arrays with the shape of ``x`` minus its
last axis.

Every line whose accuracy depends on an algebraic rearrangement carries a comment naming the
identity it relies on. The numpy functions work in float64 and are accurate to a few ULP in
relative terms over the whole finite range, including logits of magnitude 1e4 and beyond; the
``j_``-prefixed twins are written with ``jax.numpy`` so that JAX can differentiate them, and
follow the same identities where JAX's own primitives do not already.

Example:
    >>> import numpy as np
    >>> float(softplus(np.array(-40.0)))  # naive log(1 + exp(-40)) would round to 0
    4.248354255291589e-18
    >>> float(log_softmax(np.array([40.0, 0.0]))[0])
    -4.248354255291589e-18

References:
    Mächler, M., "Accurately Computing log(1 − exp(−|a|)) Assessed by the Rmpfr package",
    R package vignette, 2012 (the switch at −log 2 used by :func:`log1mexp`).
    Goldberg, D., "What Every Computer Scientist Should Know About Floating-Point Arithmetic",
    ACM Computing Surveys 23(1), 1991 (why ``log1p``/``expm1`` keep relative accuracy near 0).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
from numpy.typing import ArrayLike

__all__ = [
    "f64",
    "softplus",
    "log_sigmoid",
    "sigmoid",
    "logsumexp",
    "log_softmax",
    "label_log_softmax",
    "softmax",
    "log1m_softmax_at",
    "take_label",
    "onehot",
    "xlogy",
    "xlog1py",
    "log1mexp",
    "pow_from_log",
    "j_softplus",
    "j_log_sigmoid",
    "j_log_softmax",
    "j_log1m_softmax_at",
    "j_take_label",
    "j_xlogy",
    "j_pow_from_log",
]

_LOG_HALF = -0.6931471805599453  # log(1/2), the log1mexp switch point


def f64(x: ArrayLike) -> np.ndarray:
    """``x`` as a float64 numpy array (a copy only when needed)."""
    return np.asarray(x, dtype=np.float64)


# --------------------------------------------------------------------------- binary primitives


def softplus(x: ArrayLike) -> np.ndarray:
    """log(1 + eˣ), accurate for every finite x.

    Shapes: elementwise. Formula: softplus(x) = max(x, 0) + log1p(e^(−|x|)).

    Args:
        x: any float array.
    Returns:
        float64 array, shape of ``x``.

    Example:
        >>> float(softplus(np.array(1e4)))
        10000.0
    """
    x = f64(x)
    # log(1 + eˣ) = max(x, 0) + log1p(e^(−|x|)); the exponent is ≤ 0 so it never overflows
    return np.maximum(x, 0.0) + np.log1p(np.exp(-np.abs(x)))


def log_sigmoid(x: ArrayLike) -> np.ndarray:
    """log σ(x), accurate for every finite x.

    Shapes: elementwise. Formula: log σ(x) = −softplus(−x); also log(1 − σ(x)) = log σ(−x).

    Args:
        x: any float array.
    Returns:
        float64 array ≤ 0, shape of ``x``.

    Example:
        >>> float(log_sigmoid(np.array(-1e4)))
        -10000.0
    """
    # log σ(x) = −log(1 + e^(−x)) = −softplus(−x)
    return -softplus(-f64(x))


def sigmoid(x: ArrayLike) -> np.ndarray:
    """σ(x) = 1 / (1 + e^(−x)) with full relative accuracy in both tails.

    Shapes: elementwise. Formula: σ(x) = 1/(1 + e^(−x)) for x ≥ 0, eˣ/(1 + eˣ) for x < 0.

    Args:
        x: any float array.
    Returns:
        float64 array in [0, 1], shape of ``x``.

    Example:
        >>> float(sigmoid(np.array(-700.0))) > 0
        True
    """
    x = f64(x)
    e = np.exp(-np.abs(x))  # e^(−|x|) ∈ (0, 1], never overflows
    # σ(x) = 1/(1 + e^(−x)) for x ≥ 0 and σ(x) = eˣ/(1 + eˣ) for x < 0 (same value, no overflow)
    return np.where(x >= 0, 1.0 / (1.0 + e), e / (1.0 + e))


# ---------------------------------------------------------------------- categorical primitives


def _shifted_exp(x: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(m, x − m, e, s): m the max along ``axis``, e = e^(x − m) and s = Σ_{c ≠ argmax} e_c.

    ``e`` is returned whole (its argmax entry put back after the sum), so callers that need the
    exponentials do not take them twice; full-size temporaries are few, as at (4096, 1000)
    logits each one costs milliseconds.
    """
    m = np.max(x, axis=axis, keepdims=True)
    finite_m = np.where(np.isfinite(m), m, 0.0)
    with np.errstate(over="ignore"):  # −big − big → −inf: the correctly rounded log-probability
        d = x - finite_m  # shift by the max: logsumexp(x) = m + logsumexp(x − m)
    e = np.exp(d)
    k = np.expand_dims(np.argmax(x, axis=axis), axis)
    top = np.take_along_axis(e, k, axis=axis)  # e⁰ = 1 when m is finite
    np.put_along_axis(e, k, 0.0, axis=axis)  # drop the max term, which is exactly e⁰ = 1
    s = np.sum(e, axis=axis, keepdims=True)
    np.put_along_axis(e, k, top, axis=axis)
    return m, d, e, s


def _shifted(x: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(m, x − m, s) with m the max along ``axis`` and s = Σ_{c ≠ argmax} e^(x_c − m)."""
    m, d, _, s = _shifted_exp(x, axis)
    return m, d, s


def logsumexp(x: ArrayLike, axis: int = -1, keepdims: bool = False) -> np.ndarray:
    """log Σ_c e^(x_c) along ``axis``, shifted by the max and finished with log1p.

    Shapes: ``x`` (…, C) → (…) (or (…, 1) with ``keepdims``).
    Formula: m + log1p(Σ_{c ≠ argmax} e^(x_c − m)), m = max_c x_c.

    Args:
        x: float array; axis: reduction axis; keepdims: keep it as length 1.
    Returns:
        float64 array.

    Example:
        >>> float(logsumexp(np.array([1e4, 1e4])))  # 1e4 + ln 2
        10000.69314718056
    """
    x = f64(x)
    m, _, s = _shifted(x, axis)
    # log Σ e^(x_c) = m + log(1 + Σ_{c≠k} e^(x_c − m)) with k the argmax; log1p keeps small sums
    out = np.where(np.isfinite(m), m + np.log1p(s), m)
    return out if keepdims else np.squeeze(out, axis=axis)


def log_softmax(x: ArrayLike, axis: int = -1) -> np.ndarray:
    """log softmax(x) along ``axis``, accurate in relative terms even at the argmax.

    Shapes: (…, C) → (…, C).
    Formula: (x_c − m) − log1p(Σ_{c' ≠ argmax} e^(x_c' − m)).

    Args:
        x: float array (finite); axis: class axis.
    Returns:
        float64 array ≤ 0.

    Example:
        >>> log_softmax(np.array([0.0, 0.0])).tolist()
        [-0.6931471805599453, -0.6931471805599453]
    """
    x = f64(x)
    _, d, s = _shifted(x, axis)
    # log softmax_c = (x_c − m) − log Σ e^(x − m); the argmax entry is then exactly −log1p(s)
    return np.subtract(d, np.log1p(s), out=d)  # d is a fresh array: reuse it


def softmax(x: ArrayLike, axis: int = -1) -> np.ndarray:
    """softmax(x) along ``axis``.

    Shapes: (…, C) → (…, C). Formula: e^(x_c − m) / (1 + Σ_{c' ≠ argmax} e^(x_c' − m)).

    Args:
        x: float array (finite); axis: class axis.
    Returns:
        float64 array of probabilities summing to 1 along ``axis``.

    Example:
        >>> softmax(np.array([0.0, 0.0])).tolist()
        [0.5, 0.5]
    """
    x = f64(x)
    _, _, e, s = _shifted_exp(x, axis)
    # softmax is invariant to subtracting m; the denominator Σ e^(x − m) equals 1 + s exactly
    return np.divide(e, 1.0 + s, out=e)  # e is a fresh array: reuse it


def label_log_softmax(x: ArrayLike, y: ArrayLike) -> np.ndarray:
    """log softmax(x)_y row by row: ``take_label(log_softmax(x), y)`` without the full-size result.

    Shapes: ``x`` (…, C), labels ``y`` (…) → (…).
    Formula: (x_y − m) − log1p(Σ_{c ≠ argmax} e^(x_c − m)), the same arithmetic as
    :func:`log_softmax`, entry for entry.

    Example:
        >>> label_log_softmax(np.array([[0.0, 0.0]]), np.array([1])).tolist()
        [-0.6931471805599453]
    """
    x = f64(x)
    _, d, s = _shifted(x, -1)
    return take_label(d, y) - np.log1p(s[..., 0])


def onehot(y: ArrayLike, classes: int) -> np.ndarray:
    """Integer labels (…) → float64 one-hot rows (…, C).

    Example:
        >>> onehot(np.array([1]), 3).tolist()
        [[0.0, 1.0, 0.0]]
    """
    return (np.asarray(y)[..., None] == np.arange(classes)).astype(np.float64)


def take_label(x: np.ndarray, y: ArrayLike) -> np.ndarray:
    """x[..., y] row by row: (…, C) and labels (…) → (…)."""
    y = np.asarray(y, dtype=np.int64)
    return np.take_along_axis(x, y[..., None], axis=-1)[..., 0]


def log1m_softmax_at(ls: np.ndarray, y: ArrayLike) -> np.ndarray:
    """log(1 − p_y) from log-softmax rows ``ls`` (…, C) and labels ``y`` (…).

    Formula: log(1 − p_y) = logsumexp_{c ≠ y} ls_c (sum of the other classes' probabilities),
    which keeps full relative accuracy when p_y → 1, where 1 − p_y would cancel.

    Returns:
        float64 (…), −inf when every other class has probability exactly 0.

    Example:
        >>> float(log1m_softmax_at(log_softmax(np.array([50.0, 0.0])), np.array(0)))
        -50.0
    """
    ls = f64(ls)
    mask = onehot(y, ls.shape[-1]) > 0
    # 1 − p_y = Σ_{c≠y} p_c, so log(1 − p_y) = logsumexp over the other classes of log p_c
    return logsumexp(np.where(mask, -np.inf, ls), axis=-1)


# ----------------------------------------------------------------------------- log conventions


def xlogy(x: ArrayLike, y: ArrayLike) -> np.ndarray:
    """x · log y with 0 · log 0 = 0 (and 0 · log y = 0 for any y ≥ 0).

    Example:
        >>> float(xlogy(0.0, 0.0))
        0.0
    """
    x, y = f64(x), f64(y)
    with np.errstate(divide="ignore", invalid="ignore"):
        # 0 · log 0 = 0: the limit of t log t as t → 0⁺ (the convention of entropy)
        return np.where(x == 0, 0.0, x * np.log(np.where(x == 0, 1.0, y)))


def xlog1py(x: ArrayLike, y: ArrayLike) -> np.ndarray:
    """x · log(1 + y) with 0 · log 0 = 0; used as (1 − t) log(1 − p) = xlog1py(1 − t, −p).

    Example:
        >>> float(xlog1py(0.0, -1.0))
        0.0
    """
    x, y = f64(x), f64(y)
    with np.errstate(divide="ignore", invalid="ignore"):
        # log(1 + y) through log1p keeps relative accuracy for small |y| (log(1 − p) for p ≈ 0)
        return np.where(x == 0, 0.0, x * np.log1p(np.where(x == 0, 0.0, y)))


def log1mexp(a: ArrayLike) -> np.ndarray:
    """log(1 − eᵃ) for a ≤ 0 (Mächler's switch at a = −log 2).

    Formula: log(−expm1(a)) for −log 2 < a ≤ 0, log1p(−eᵃ) for a ≤ −log 2.

    Args:
        a: float array with entries ≤ 0.
    Returns:
        float64, −inf at a = 0.

    Example:
        >>> float(log1mexp(np.array(-1e-20)))
        -46.051701859880914

    References:
        Mächler, "Accurately Computing log(1 − exp(−|a|))", R vignette, 2012.
    """
    a = f64(a)
    with np.errstate(divide="ignore"):
        # near 0, 1 − eᵃ = −expm1(a) without cancellation; far from 0, log(1 − u) = log1p(−u)
        return np.where(a > _LOG_HALF, np.log(-np.expm1(a)), np.log1p(-np.exp(a)))


def pow_from_log(gamma: float, logx: ArrayLike) -> np.ndarray:
    """x^γ from log x, with x⁰ = 1 even where x = 0 (log x = −inf).

    Example:
        >>> float(pow_from_log(0.0, np.array(-np.inf)))
        1.0
    """
    logx = f64(logx)
    if gamma == 0:
        return np.ones_like(logx)  # x⁰ = 1, including 0⁰ = 1 (IEEE-754 pow(0, 0) = 1)
    with np.errstate(over="ignore"):  # γ · log x → −inf only when x^γ underflows to 0 anyway
        return np.exp(gamma * logx)  # x^γ = e^(γ log x), and e^(−inf) = 0 gives 0^γ = 0 for γ > 0


# --------------------------------------------------------------------------------- JAX twins


def j_softplus(x: jax.Array) -> jax.Array:
    """JAX twin of :func:`softplus` (same identity; differentiable)."""
    # log(1 + eˣ) = logaddexp(x, 0); written with max and |x| its autodiff would give 0, not
    # σ(0) = 1/2, at x = 0 (the subgradients of max and |·| at 0 do not combine to the derivative)
    return jnp.logaddexp(x, 0.0)


def j_log_sigmoid(x: jax.Array) -> jax.Array:
    """JAX twin of :func:`log_sigmoid`."""
    return -j_softplus(-x)  # log σ(x) = −softplus(−x)


def j_log_softmax(x: jax.Array) -> jax.Array:
    """JAX twin of :func:`log_softmax` over the last axis."""
    m = jax.lax.stop_gradient(jnp.max(x, axis=-1, keepdims=True))
    d = x - m  # logsumexp(x) = m + logsumexp(x − m); m is a constant for the derivative
    return d - jnp.log(jnp.sum(jnp.exp(d), axis=-1, keepdims=True))


def j_take_label(x: jax.Array, y: jax.Array) -> jax.Array:
    """JAX twin of :func:`take_label`."""
    return jnp.take_along_axis(x, jnp.asarray(y)[..., None], axis=-1)[..., 0]


def j_log1m_softmax_at(ls: jax.Array, y: jax.Array) -> jax.Array:
    """JAX twin of :func:`log1m_softmax_at`."""
    mask = jnp.asarray(y)[..., None] == jnp.arange(ls.shape[-1])
    others = jnp.where(mask, -jnp.inf, ls)
    alive = jnp.any(others > -jnp.inf, axis=-1)
    # double-where: a row whose competitors are all −inf gets finite stand-ins, so the unused
    # branch's derivative stays finite; its value is log(1 − p_y) = log 0 = −inf
    safe = jnp.where(alive[..., None], others, 0.0)
    # 1 − p_y = Σ_{c≠y} p_c  ⇒  log(1 − p_y) = logsumexp_{c≠y} log p_c
    return jnp.where(alive, jax.nn.logsumexp(safe, axis=-1), -jnp.inf)


def j_xlogy(x: jax.Array, y: jax.Array) -> jax.Array:
    """JAX twin of :func:`xlogy` (differentiable in ``y`` where x > 0)."""
    safe = jnp.where(x == 0, 1.0, y)  # double-where: keep log's derivative finite on masked entries
    return jnp.where(x == 0, 0.0, x * jnp.log(safe))  # 0 · log 0 = 0


def j_pow_from_log(gamma: float, logx: jax.Array) -> jax.Array:
    """JAX twin of :func:`pow_from_log`."""
    if gamma == 0:
        return jnp.ones_like(logx)  # x⁰ = 1
    return jnp.exp(gamma * logx)  # x^γ = e^(γ log x)
