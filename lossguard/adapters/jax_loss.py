"""Adapter for losses written with ``jax.numpy``: vmapped, jitted, compiled once per shape.

The K cases of a stack are evaluated by one ``jit(vmap(…))`` call. Stacks are padded to a
power-of-two bucket (at least 8) so that a battery compiles a handful of functions, not one per
stack size. float64 runs inside ``jax.enable_x64(True)``; lower precisions inside
``jax.enable_x64(False)``, so a loss's own constants keep the width they have in training.
Both are scoped and restored on exit.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..tolerance import dtype_of
from ._base import call_failed

__all__ = ["JaxAdapter", "bucket"]


def bucket(k: int) -> int:
    """The padded stack size: the next power of two, at least 8."""
    b = 8
    while b < k:
        b *= 2
    return b


def _pad(a: np.ndarray, size: int) -> np.ndarray:
    if a.shape[0] == size:
        return a
    reps = np.repeat(a[:1], size - a.shape[0], axis=0)  # padding repeats case 0; results are sliced off
    return np.concatenate([a, reps], axis=0)


class JaxAdapter:
    """Evaluate a JAX-traceable loss; ``vectorised=False`` loops over cases (still jitted)."""

    has_autodiff = True

    def __init__(self, loss: Callable[..., Any], params: Mapping[str, Any], vectorised: bool = True) -> None:
        self.name = "jax" if vectorised else "jax (one case at a time)"
        self._loss = loss
        self._params = dict(params)
        self.vectorised = vectorised
        self.calls = 0
        self._compiled: dict[tuple[str, bool], Any] = {}
        #: dtype of the loss's output for each requested input dtype (a loss may compute lower)
        self.out_dtypes: dict[str, str] = {}

    # -- the three functions, built once and jitted (JAX caches per shape and dtype) --------
    def _f(self, z: Any, y: Any) -> Any:
        return self._loss(z, y, **self._params)

    def _build(self, op: str) -> Any:
        f = self._f

        if op == "value":
            one = f
        elif op == "vg":

            def one(z: Any, y: Any, cot: Any) -> Any:
                def scalar(zz: Any) -> Any:
                    out = f(zz, y)
                    return jnp.sum(out * cot.astype(out.dtype)), out  # ⟨cot, f(z)⟩: its gradient is the VJP

                (_, out), g = jax.value_and_grad(scalar, has_aux=True)(z)
                return out, g

        elif op == "jvp":

            def one(z: Any, y: Any, v: Any) -> Any:
                return jax.jvp(lambda zz: f(zz, y), (z,), (v,))

        elif op == "hvp":

            def one(z: Any, y: Any, cot: Any, v: Any) -> Any:
                def scalar(zz: Any) -> Any:
                    out = f(zz, y)
                    return jnp.sum(out * cot.astype(out.dtype))

                def slope(zz: Any) -> Any:
                    g = jax.grad(scalar)(zz)
                    return jnp.sum(g * v.astype(g.dtype)), g

                # reverse over reverse: ∇(∇φ · v) = H v (works for custom_vjp losses too)
                hv, g = jax.grad(slope, has_aux=True)(z)
                return g, hv

        else:  # pragma: no cover - internal
            raise ValueError(op)
        return jax.jit(jax.vmap(one)) if self.vectorised else jax.jit(one)

    def _get(self, op: str) -> Any:
        key = (op, self.vectorised)
        if key not in self._compiled:
            self._compiled[key] = self._build(op)
        return self._compiled[key]

    # -- running ---------------------------------------------------------------------------
    def _run(self, op: str, arrays: list[np.ndarray], dtype: str, float_mask: list[bool]) -> Any:
        k = arrays[0].shape[0]
        self.calls += k
        x64 = dtype == "float64"
        dt = dtype_of(dtype)
        fn = self._get(op)
        with jax.enable_x64(x64):
            int_dt = jnp.int64 if x64 else jnp.int32

            def cast(a: np.ndarray, is_float: bool) -> Any:
                return jnp.asarray(a, dtype=dt if is_float else int_dt)

            if self.vectorised:
                size = bucket(k)
                args = [cast(_pad(a, size), m) for a, m in zip(arrays, float_mask)]
                out = fn(*args)
                self._note_dtype(dtype, out)
                return jax.tree_util.tree_map(lambda o: np.asarray(o, dtype=np.float64)[:k], out)
            outs = []
            for i in range(k):
                args = [cast(a[i], m) for a, m in zip(arrays, float_mask)]
                raw = fn(*args)
                self._note_dtype(dtype, raw)
                outs.append(jax.tree_util.tree_map(lambda o: np.asarray(o, dtype=np.float64), raw))
            return jax.tree_util.tree_map(lambda *xs: np.stack(xs), *outs)

    def _note_dtype(self, dtype: str, out: Any) -> None:
        leaf = jax.tree_util.tree_leaves(out)[0]
        self.out_dtypes[dtype] = str(leaf.dtype)

    def _targets_float(self, y: np.ndarray) -> bool:
        return bool(np.issubdtype(y.dtype, np.floating))

    def values(self, z: np.ndarray, y: np.ndarray, dtype: str, *, eager: bool = False) -> np.ndarray:
        if eager:
            return self._eager_values(z, y, dtype)
        try:
            return self._run("value", [z, y], dtype, [True, self._targets_float(y)])
        except Exception as exc:
            raise call_failed(exc, "values", z.shape[1:], dtype) from None

    def _eager_values(self, z: np.ndarray, y: np.ndarray, dtype: str) -> np.ndarray:
        """One plain call per case, no jit: what a training loop calling the loss sees."""
        dt = dtype_of(dtype)
        outs = []
        self.calls += z.shape[0]
        try:
            with jax.enable_x64(dtype == "float64"):
                int_dt = jnp.int64 if dtype == "float64" else jnp.int32
                for i in range(z.shape[0]):
                    yy = jnp.asarray(y[i], dtype=dt if self._targets_float(y) else int_dt)
                    outs.append(np.asarray(self._f(jnp.asarray(z[i], dtype=dt), yy), dtype=np.float64))
        except Exception as exc:
            raise call_failed(exc, "values", z.shape[1:], dtype) from None
        return np.stack(outs)

    def value_and_grad(
        self, z: np.ndarray, y: np.ndarray, dtype: str, cotangent: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        if cotangent is None:
            cotangent = np.ones((z.shape[0],), dtype=np.float64)
        try:
            return self._run("vg", [z, y, cotangent], dtype, [True, self._targets_float(y), True])
        except Exception as exc:
            raise call_failed(exc, "the gradient", z.shape[1:], dtype) from None

    def jvp(self, z: np.ndarray, y: np.ndarray, v: np.ndarray, dtype: str) -> tuple[np.ndarray, np.ndarray]:
        try:
            return self._run("jvp", [z, y, v], dtype, [True, self._targets_float(y), True])
        except Exception as exc:
            raise call_failed(exc, "a forward-mode derivative", z.shape[1:], dtype) from None

    def hvp(
        self, z: np.ndarray, y: np.ndarray, v: np.ndarray, dtype: str, cotangent: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """(gradient, Hessian-vector product H v) of ⟨cotangent, output⟩ per case, by reverse
        mode over reverse mode (``cotangent`` as in :meth:`value_and_grad`)."""
        try:
            return self._run("hvp", [z, y, cotangent, v], dtype, [True, self._targets_float(y), True, True])
        except Exception as exc:
            raise call_failed(exc, "a Hessian-vector product", z.shape[1:], dtype) from None


def probe(loss: Callable[..., Any], params: Mapping[str, Any], z: np.ndarray, y: np.ndarray) -> tuple[str, tuple[int, ...]] | None:
    """How this loss traces: ``("vmap", out_shape)``, ``("jit", out_shape)`` or ``None``.

    ``z``/``y`` are a stack of two cases. Shapes only: nothing is compiled.
    """
    f = lambda a, b: loss(a, b, **params)  # noqa: E731
    yt = jax.ShapeDtypeStruct(y.shape, jnp.float32 if np.issubdtype(y.dtype, np.floating) else jnp.int32)
    zt = jax.ShapeDtypeStruct(z.shape, jnp.float32)
    with jax.enable_x64(False):
        try:
            out = jax.eval_shape(jax.vmap(f), zt, yt)
            return "vmap", tuple(out.shape[1:])
        except Exception:
            pass
        try:
            out = jax.eval_shape(f, jax.ShapeDtypeStruct(z.shape[1:], jnp.float32),
                                 jax.ShapeDtypeStruct(y.shape[1:], yt.dtype))
            return "jit", tuple(out.shape)
        except Exception:
            return None
