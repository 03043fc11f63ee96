"""What an adapter does: evaluate one framework's loss on stacked cases, in a given dtype."""

from __future__ import annotations

from typing import Protocol

import numpy as np

from ..errors import LossCallError

__all__ = ["Adapter", "first_line", "call_failed"]


class Adapter(Protocol):
    """Evaluate a user's loss on a stack of K cases of one shape.

    Inputs are float64 (predictions) and int64/float64 (targets) numpy arrays with a leading
    case axis; each method casts them to ``dtype`` and returns float64 numpy arrays with the
    same leading axis. ``calls`` counts loss evaluations (one per case per pass).
    """

    name: str
    has_autodiff: bool
    calls: int

    def values(self, z: np.ndarray, y: np.ndarray, dtype: str, *, eager: bool = False) -> np.ndarray: ...

    def value_and_grad(
        self, z: np.ndarray, y: np.ndarray, dtype: str, cotangent: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]: ...

    def jvp(self, z: np.ndarray, y: np.ndarray, v: np.ndarray, dtype: str) -> tuple[np.ndarray, np.ndarray]: ...


def first_line(exc: BaseException) -> str:
    """``Type: first line of the message`` — JAX errors run to many lines."""
    msg = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {msg[0] if msg else ''}".strip()


def call_failed(exc: BaseException, what: str, shape: tuple[int, ...], dtype: str) -> LossCallError:
    """The one-line error for a user's loss that raised inside an evaluation."""
    return LossCallError(
        f"loss raised {first_line(exc)} while computing {what} for predictions of shape "
        f"{shape} in {dtype}; fix the loss, or skip the check that needs it"
    )
