"""Argument validation for the public strategies (:mod:`lossguard.strategies`).

Each helper checks one argument when a strategy is built and raises
:class:`StrategyArgumentError` with a message ``"name=value: expected …; try …"``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from hypothesis.errors import InvalidArgument

from ._suggest import bad_value, did_you_mean
from .errors import SpecError
from .tolerance import DTYPES

__all__ = ["MAX_ELEMENTS", "StrategyArgumentError"]

#: Largest number of elements one drawn array may have (keeps draws and shrinking fast).
MAX_ELEMENTS = 10_000


class StrategyArgumentError(SpecError, InvalidArgument):
    """A strategy was given an invalid argument (a Hypothesis ``InvalidArgument`` too)."""

    __module__ = "lossguard.strategies"  # where users import it from (re-exported there)


def _fail(name: str, value: Any, expected: str, hint: str) -> StrategyArgumentError:
    return StrategyArgumentError(bad_value(name, value, expected, hint))


def _int(name: str, value: Any, low: int, hint: str, high: int | None = None) -> int:
    ok = isinstance(value, (int, np.integer)) and not isinstance(value, bool)
    if not ok or value < low or (high is not None and value > high):
        rng = f"an integer >= {low}" if high is None else f"an integer in [{low}, {high}]"
        raise _fail(name, value, rng, hint)
    return int(value)


def _flag(name: str, value: Any) -> bool:
    if not isinstance(value, bool):
        raise _fail(name, value, "True or False", f"try {name}=True")
    return value


def _dtype(value: Any) -> str:
    if str(value) not in DTYPES:
        raise _fail("dtype", value, "one of " + ", ".join(DTYPES), did_you_mean(str(value), DTYPES))
    return str(value)


def _one_shape(name: str, shape: Any) -> tuple[int, ...]:
    ok = isinstance(shape, (tuple, list)) and 1 <= len(shape) <= 3
    if not ok or not all(isinstance(s, (int, np.integer)) and not isinstance(s, bool) and s >= 1 for s in shape):
        raise _fail(name, shape, "a tuple of 1 to 3 positive integers", "try (8, 3)")
    if math.prod(shape) > MAX_ELEMENTS:
        raise _fail(name, shape, f"at most {MAX_ELEMENTS} elements", "try (8, 3)")
    return tuple(int(s) for s in shape)


def _shapes(name: str, value: Any, default: Sequence[tuple[int, ...]]) -> list[tuple[int, ...]]:
    """A fixed shape (tuple of ints) or a menu (list of such tuples); ``None`` is ``default``."""
    if value is None:
        return list(default)
    if isinstance(value, (tuple, list)) and value and all(isinstance(s, (tuple, list)) for s in value):
        return [_one_shape(name, s) for s in value]
    return [_one_shape(name, value)]


def _magnitude(name: str, value: Any, top: float) -> float:
    ok = isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)
    if not ok or not math.isfinite(float(value)) or not 0.0 <= float(value) <= top:
        raise _fail(name, value, f"a finite number in [0, {top:.6g}] (the dtype's largest finite)",
                    f"try {name}=1e4")
    return float(value)
