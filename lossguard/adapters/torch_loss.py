"""Adapter for losses written with PyTorch (optional: used only when torch is importable).

Each case is one eager call on CPU tensors of the dtype under test; gradients come from
autograd (``torch.autograd.grad`` with the cotangent as ``grad_outputs``), forward-mode
derivatives from the gradient (⟨∇f, v⟩ for scalar outputs). Autograd's global switches are
untouched: every call runs inside ``torch.enable_grad()`` / ``torch.no_grad()`` scopes.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from ._base import call_failed

__all__ = ["TorchAdapter", "probe"]

_TORCH_DTYPES = {"float16": "float16", "bfloat16": "bfloat16", "float32": "float32", "float64": "float64"}


def _torch() -> Any:
    import torch

    return torch


class TorchAdapter:
    """Evaluate a torch loss case by case on the CPU."""

    name = "torch"
    has_autodiff = True

    def __init__(self, loss: Callable[..., Any], params: Mapping[str, Any]) -> None:
        self._loss = loss
        self._params = dict(params)
        self.calls = 0
        self.out_dtypes: dict[str, str] = {}

    def _cast(self, z: np.ndarray, y: np.ndarray, dtype: str, grad: bool = False) -> tuple[Any, Any]:
        torch = _torch()
        dt = getattr(torch, _TORCH_DTYPES[dtype])
        zt = torch.tensor(np.asarray(z, dtype=np.float64), dtype=dt, requires_grad=grad)
        if np.issubdtype(y.dtype, np.floating):
            yt = torch.tensor(np.asarray(y, dtype=np.float64), dtype=dt)
        else:
            yt = torch.tensor(np.asarray(y, dtype=np.int64))
        return zt, yt

    def _np(self, t: Any, dtype: str) -> np.ndarray:
        self.out_dtypes[dtype] = str(t.dtype).replace("torch.", "")
        return t.detach().to(dtype=_torch().float64).numpy()

    def values(self, z: np.ndarray, y: np.ndarray, dtype: str, *, eager: bool = False) -> np.ndarray:
        torch = _torch()
        outs = []
        self.calls += z.shape[0]
        try:
            with torch.no_grad():
                for i in range(z.shape[0]):
                    zt, yt = self._cast(z[i], y[i], dtype)
                    outs.append(self._np(self._loss(zt, yt, **self._params), dtype))
        except Exception as exc:
            raise call_failed(exc, "values", z.shape[1:], dtype) from None
        return np.stack(outs)

    def value_and_grad(
        self, z: np.ndarray, y: np.ndarray, dtype: str, cotangent: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        torch = _torch()
        vals, grads = [], []
        self.calls += z.shape[0]
        try:
            with torch.enable_grad():
                for i in range(z.shape[0]):
                    zt, yt = self._cast(z[i], y[i], dtype, grad=True)
                    out = self._loss(zt, yt, **self._params)
                    cot = torch.ones_like(out) if cotangent is None else torch.tensor(
                        np.asarray(cotangent[i], dtype=np.float64), dtype=out.dtype).reshape(out.shape)
                    (g,) = torch.autograd.grad(out, zt, grad_outputs=cot, allow_unused=True)
                    vals.append(self._np(out, dtype))
                    grads.append(np.zeros(z.shape[1:]) if g is None else g.detach().to(torch.float64).numpy())
        except Exception as exc:
            raise call_failed(exc, "the gradient", z.shape[1:], dtype) from None
        return np.stack(vals), np.stack(grads)

    def jvp(self, z: np.ndarray, y: np.ndarray, v: np.ndarray, dtype: str) -> tuple[np.ndarray, np.ndarray]:
        vals, g = self.value_and_grad(z, y, dtype)
        if vals.ndim > 1:
            raise NotImplementedError("forward mode for per-example torch outputs is not wired")
        return vals, np.sum((g * v).reshape(z.shape[0], -1), axis=1)  # directional derivative = ⟨∇f, v⟩


def probe(loss: Callable[..., Any], params: Mapping[str, Any], z: np.ndarray, y: np.ndarray) -> tuple[int, ...] | None:
    """The output shape if ``loss`` takes and returns torch tensors, else ``None``.

    ``z``/``y`` are one case. Only tried when torch is already importable.
    """
    try:
        torch = _torch()
    except ImportError:
        return None
    adapter = TorchAdapter(loss, params)
    try:
        zt, yt = adapter._cast(z, y, "float32")
        with torch.no_grad():
            out = loss(zt, yt, **params)
    except Exception:
        return None
    if not isinstance(out, torch.Tensor):
        return None
    return tuple(out.shape)
