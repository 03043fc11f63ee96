"""Adapter for losses JAX cannot trace (plain numpy, Python control flow on values).

Each case is one plain call with numpy arrays of the dtype under test, inside a scoped
``np.errstate`` so the user's process keeps its own error settings. Gradients come only from a
declared closed-form ``grad``; finite differences over :meth:`values` are the other oracle.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np

from ..tolerance import dtype_of
from ._base import Capabilities, Planned, call_failed, per_case

__all__ = ["NumpyAdapter"]


class NumpyAdapter:
    """Evaluate a loss case by case with numpy inputs; gradients from ``grad`` if declared."""

    name = "numpy"

    def __init__(
        self,
        loss: Callable[..., Any],
        params: Mapping[str, Any],
        grad: Callable[..., Any] | None = None,
    ) -> None:
        self._loss = loss
        self._params = dict(params)
        self._grad = grad
        self.capabilities = Capabilities(autodiff=False, forward_mode=False, second_order=False, batched=False)
        self.calls = 0
        self.out_dtypes: dict[str, str] = {}
        self.notes: list[str] = []
        self.out_shape: Callable[[tuple[int, ...]], tuple[int, ...]] | None = None

    def _cast(self, z: np.ndarray, y: np.ndarray, dtype: str) -> tuple[np.ndarray, np.ndarray]:
        dt = dtype_of(dtype)
        yy = y.astype(dt) if np.issubdtype(y.dtype, np.floating) else y
        return z.astype(dt), yy

    def values(self, z: np.ndarray, y: np.ndarray, dtype: str, *, eager: bool = False) -> np.ndarray:
        self.calls += z.shape[0]

        def one(i: int) -> np.ndarray:
            raw = self._loss(*self._cast(z[i], y[i], dtype), **self._params)
            self.out_dtypes[dtype] = str(getattr(raw, "dtype", "float64"))
            return np.asarray(raw, dtype=np.float64)

        with np.errstate(all="ignore"):
            return np.stack(per_case(one, z.shape[0], "values", z.shape[1:], dtype))

    def value_and_grad(
        self, z: np.ndarray, y: np.ndarray, dtype: str, cotangent: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        if self._grad is None:
            raise NotImplementedError("no gradient: the loss is not JAX-traceable and no grad was declared")
        vals = self.values(z, y, dtype)

        def one(i: int) -> np.ndarray:
            zi, yi = self._cast(z[i], y[i], dtype)
            g = np.asarray(self._grad(zi, yi, **self._params), dtype=np.float64)
            if cotangent is not None and vals.ndim > 1:
                # grad is declared for the sum of per-example outputs; scale row i by cot_i
                c = np.asarray(cotangent[i], dtype=np.float64)
                return g * c.reshape(c.shape + (1,) * (g.ndim - c.ndim))
            if cotangent is not None:
                return g * float(np.asarray(cotangent[i]).reshape(-1)[0])
            return g

        with np.errstate(all="ignore"):
            return vals, np.stack(per_case(one, z.shape[0], "the declared grad", z.shape[1:], dtype))

    def jvp(self, z: np.ndarray, y: np.ndarray, v: np.ndarray, dtype: str) -> tuple[np.ndarray, np.ndarray]:
        vals, g = self.value_and_grad(z, y, dtype)
        if vals.ndim > 1:
            raise NotImplementedError("forward mode needs autodiff for per-example outputs")
        return vals, np.sum((g * v).reshape(z.shape[0], -1), axis=1)

    def hvp(
        self, z: np.ndarray, y: np.ndarray, v: np.ndarray, dtype: str, cotangent: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        raise NotImplementedError("Hessian-vector products need autodiff: the loss is not JAX-traceable and "
                                  "not a torch loss")

    def output_shape(self, z: np.ndarray, y: np.ndarray) -> tuple[int, ...] | None:
        """One case's output shape, from a plain call on the first case of ``z``, ``y``."""
        with np.errstate(all="ignore"):
            return tuple(np.shape(np.asarray(self._loss(z[0], y[0], **self._params))))

    def prepare(self, plan: Sequence[Planned]) -> None:
        """Nothing compiles for plain calls."""

    def cancel_pending(self) -> None:
        """Nothing is ever pending."""
