"""Closeness assertions shared by the reference tests."""

from __future__ import annotations

import numpy as np


def close(actual: object, expected: object, rtol: float, atol: float = 0.0) -> bool:
    """|a − e| ≤ atol + rtol·|e| everywhere (equal infinities pass, any nan fails)."""
    a, e = np.asarray(actual, np.float64), np.asarray(expected, np.float64)
    if a.shape != e.shape:
        return False
    with np.errstate(invalid="ignore"):
        ok = (a == e) | (np.abs(a - e) <= atol + rtol * np.abs(e))
    return bool(np.all(ok))


def assert_close(actual: object, expected: object, rtol: float, atol: float = 0.0) -> None:
    shown = f"\nactual   {np.asarray(actual)!r}\nexpected {np.asarray(expected)!r}"
    assert close(actual, expected, rtol, atol), shown
