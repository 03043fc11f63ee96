"""Facts of the IEEE 754 formats a battery tries, and rounding onto them.

Largest and smallest values, spacing (ULP), rounding to one dtype or onto values every dtype of a
set holds: the grid of representable values of the IEEE 754-2008 binary formats, and the bfloat16
layout of ml_dtypes (8 exponent bits, 8 significand bits). The ladders (:mod:`lossguard.ladders`)
and the checks build on these; they are re-exported there.
"""

from __future__ import annotations

from collections.abc import Sequence

import ml_dtypes
import numpy as np

from .tolerance import dtype_of

__all__ = ["largest_finite", "smallest_subnormal", "smallest_normal", "next_below_one", "round_to",
           "flush_subnormals", "has_subnormals", "common_grid", "round_down", "ulp"]


def largest_finite(dtype: str | np.dtype) -> float:
    """The largest finite value of ``dtype`` (IEEE 754: (2 − 2^(1−p))·2^emax)."""
    return float(ml_dtypes.finfo(dtype_of(dtype)).max)


def smallest_subnormal(dtype: str | np.dtype) -> float:
    """The smallest positive value of ``dtype``: tiny · ε, the spacing of the subnormals (IEEE 754)."""
    f = ml_dtypes.finfo(dtype_of(dtype))
    return float(f.tiny) * float(f.eps)


def smallest_normal(dtype: str | np.dtype) -> float:
    """The smallest positive normal value of ``dtype`` (``tiny``): below it spacing is absolute."""
    return float(ml_dtypes.finfo(dtype_of(dtype)).tiny)


def next_below_one(dtype: str | np.dtype) -> float:
    """The largest value of ``dtype`` below 1: 1 − ε/2 (the spacing halves just below a power of 2)."""
    return 1.0 - float(ml_dtypes.finfo(dtype_of(dtype)).eps) / 2.0


def round_to(x: np.ndarray | float, dtype: str | np.dtype) -> np.ndarray:
    """``x`` rounded to the nearest value of ``dtype`` (ties to even), returned as float64.

    Values beyond the dtype's range become ±inf, as a cast in a training loop would make them.
    """
    with np.errstate(over="ignore"):
        return np.asarray(x, dtype=np.float64).astype(dtype_of(dtype)).astype(np.float64)


def flush_subnormals(x: np.ndarray, dtype: str | np.dtype) -> np.ndarray:
    """``x`` with the dtype's subnormal values replaced by (signed) 0, as a platform that flushes
    denormals sees them (XLA on CPU does, for float32, bfloat16 and float64 arithmetic)."""
    x = np.asarray(x, dtype=np.float64)
    return np.where(np.abs(x) < smallest_normal(dtype), np.copysign(0.0, x), x)


def has_subnormals(x: np.ndarray, dtype: str | np.dtype) -> np.ndarray:
    """Per leading index: does ``x`` hold a nonzero value below the dtype's smallest normal?"""
    a = np.abs(np.asarray(x, dtype=np.float64)).reshape(np.shape(x)[0], -1)
    return np.any((a > 0) & (a < smallest_normal(dtype)), axis=1)


def common_grid(x: np.ndarray | float, dtypes: Sequence[str]) -> np.ndarray:
    """``x`` moved onto values exactly representable in every dtype of ``dtypes``.

    Rounds through each dtype in turn until nothing changes (twice suffices for the formats in
    :data:`~lossguard.tolerance.DTYPES`: a bfloat16 value inside float16's normal range has at
    most 8 significant bits, which float16's 11 hold). Entries that still move (deep in
    float16's subnormals) are flushed to 0, which every dtype holds. Callers keep ``x`` inside
    the smallest range of ``dtypes``.

    Example:
        >>> float(common_grid(np.array(1.0 + 2.0**-10), ["float16", "bfloat16"]))
        1.0
    """
    out = np.asarray(x, dtype=np.float64)
    if len(dtypes) == 1:
        return round_to(out, dtypes[0])  # rounding to one dtype is idempotent: once is a fixed point
    for _ in range(3):
        prev = out
        for d in dtypes:
            out = round_to(out, d)
        if np.array_equal(out.view(np.uint64), prev.view(np.uint64)):  # bit for bit: nothing moved
            return out
    stable = np.ones(out.shape, bool)
    for d in dtypes:
        stable &= round_to(out, d) == out
    return np.where(stable, out, 0.0)


def round_down(x: float, dtypes: Sequence[str]) -> float:
    """The largest value ≤ ``x`` (≥ 0, finite) that every dtype of ``dtypes`` holds exactly.

    Used for ladder rungs near a range end: float16's largest value 65504 is not a bfloat16
    value (it would round up to 65536, beyond float16), so the common rung is 65280.

    Example:
        >>> round_down(65504.0, ["float16", "bfloat16"])
        65280.0
    """
    out = float(x)
    for _ in range(4):
        prev = out
        for d in dtypes:
            dt = dtype_of(d)
            with np.errstate(over="ignore"):
                r = np.asarray(out).astype(dt)
            if not np.isfinite(float(r)) or float(r) > out:
                r = np.nextafter(r, np.asarray(0, dtype=dt))  # one step toward zero in that dtype
            out = float(r)
        if out == prev:
            break
    return out


def ulp(x: np.ndarray | float, dtype: str | np.dtype) -> np.ndarray:
    """The spacing of ``dtype`` at |x|: 2^⌊log2|x|⌋ · ε for normal |x|, tiny · ε below.

    Shapes: elementwise, float64. Non-finite or beyond-range |x| get the spacing at the largest
    finite value.

    Example:
        >>> float(ulp(1.0, "bfloat16")), float(ulp(3.0, "float16"))
        (0.0078125, 0.001953125)
    """
    f = ml_dtypes.finfo(dtype_of(dtype))
    a = np.abs(np.asarray(x, dtype=np.float64))
    a = np.where(np.isfinite(a), np.minimum(a, float(f.max)), float(f.max))
    a = np.maximum(a, float(f.tiny))  # below tiny the spacing is constant: tiny · ε (IEEE 754)
    _, e = np.frexp(a)  # a = m · 2^e with m ∈ [0.5, 1), so ⌊log2 a⌋ = e − 1
    return np.ldexp(float(f.eps), e - 1)
