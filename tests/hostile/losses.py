"""Deliberately hostile or misused losses for tests/test_hostile.py (each says what it does wrong)."""

from __future__ import annotations

import time

import jax
import jax.numpy as jnp
import numpy as np


def good(z, y):
    """A correct categorical cross-entropy (JAX)."""
    return -jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1).mean()


def good_np(z, y):
    """A correct categorical cross-entropy (numpy, not traceable because of np.asarray)."""
    z = np.asarray(z)
    m = z.max(axis=-1, keepdims=True)
    lse = m[:, 0] + np.log(np.exp(z - m).sum(axis=-1))
    return float(np.mean(lse - z[np.arange(len(y)), np.asarray(y)]))


def good_np_grad_wrong_shape(z, y):
    """A gradient of shape (C,) instead of (N, C)."""
    return np.zeros(np.shape(z)[-1])


def sleeps(z, y):
    """Sleeps 30 s on every call."""
    time.sleep(30)
    return good(z, y)


def hangs_on_ten_classes(z, y):
    """Sleeps 30 s whenever it sees ten classes (the menu's second shape), else correct."""
    if z.shape[-1] == 10:
        time.sleep(30)
    return good(z, y)


def spins_on_ten_classes(z, y):
    """A pure-Python busy loop whenever it sees ten classes (no sleep to interrupt)."""
    if z.shape[-1] == 10:
        t = time.monotonic()
        while time.monotonic() - t < 30:
            pass
    return good(z, y)


def returns_none(z, y):
    """Forgets its return statement."""
    good(z, y)


def returns_string(z, y):
    return "0.5"


def returns_complex(z, y):
    return good(z, y) + 0j


def returns_complex_np(z, y):
    return np.complex128(1 + 2j)


def returns_int(z, y):
    return 0


def returns_int_array(z, y):
    return jnp.sum(y)


def returns_tuple(z, y):
    return good(z, y), jnp.zeros(())


def returns_dict(z, y):
    return {"loss": good(z, y)}


def returns_list(z, y):
    return [1.0, 2.0]


class Box:
    pass


def returns_object(z, y):
    return Box()


def returns_bool(z, y):
    return True


def shifts_in_place_np(z, y):
    """Subtracts the row max from its input in place (the caller's logits change)."""
    z -= z.max(axis=-1, keepdims=True)
    lse = np.log(np.exp(z).sum(axis=-1))
    return float(np.mean(lse - z[np.arange(len(y)), y]))


def shifts_in_place_np_grad(z, y):
    """The correct gradient of the mean cross-entropy (computed on a copy)."""
    z = np.array(z, dtype=np.float64)
    p = np.exp(z - z.max(axis=-1, keepdims=True))
    p /= p.sum(axis=-1, keepdims=True)
    p[np.arange(len(y)), y] -= 1.0
    return p / len(y)


def zeroes_labels_np(z, y):
    """Overwrites its labels in place."""
    out = good_np(z, y)
    y[...] = 0
    return out


def raises(z, y):
    raise RuntimeError("boom")


def negative(z, y):
    """A loss shifted below zero by a constant."""
    return good(z, y) - 1.0


def allocates(z, y):
    """Correct, for the memory tests (any class count)."""
    return good(z, y)


def one_argument(z):
    """Takes no targets."""
    return z.mean()


def per_class_vector(z, y):
    """Returns one value per class instead of a scalar or one per example."""
    return jnp.mean(jax.nn.log_softmax(z), axis=0)


NOT_CALLABLE = 3.0


def none_in_float16(z, y):
    """Correct, except that it returns None for float16 inputs (found only past the probe)."""
    if z.dtype == jnp.float16:
        return None
    return good(z, y)


def none_in_float64(z, y):
    """Correct, except that it returns None for float64 inputs (the probe calls in float32)."""
    if z.dtype == jnp.float64:
        return None
    return good(z, y)
