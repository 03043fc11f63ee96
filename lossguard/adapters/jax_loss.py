"""Adapter for losses written with ``jax.numpy``: vmapped, jitted, compiled once per shape.

The K cases of a stack are evaluated by ``jit(vmap(…))`` calls of one fixed size per shape
(:func:`lossguard._budget.call_size`: 128 cases for the menu's shapes, fewer for large ones): a
shorter stack is padded up to it and a longer one cut into calls of that size, so each
(operation, dtype, shape) compiles once, whatever the number of cases. Values are read from the
value-and-gradient function (its gradient discarded), so a battery needs one compiled function
per (dtype, shape), plus forward mode where the gradient check asks for it. float64 runs inside ``jax.enable_x64(True)``; lower precisions inside
``jax.enable_x64(False)``, so a loss's own constants keep the width they have in training.
Both are scoped and restored on exit.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .._budget import MAX_CALL_SIZE, call_size
from ..tolerance import dtype_of
from ._base import Capabilities, Planned, call_failed, per_case

__all__ = ["JaxAdapter", "Planned"]
#: Background threads compiling planned functions (XLA compiles without holding the GIL).
COMPILE_THREADS = 2


def compile_threads() -> int:
    """:data:`COMPILE_THREADS`, or 1 when pytest-xdist already runs a worker per core (read from
    the worker's environment, never set): more threads would only compete with the workers."""
    workers = os.environ.get("PYTEST_XDIST_WORKER_COUNT", "")
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cores = os.cpu_count() or 1
    if workers.isdigit() and int(workers) >= cores:
        return 1
    return COMPILE_THREADS


def _pad(a: np.ndarray, size: int) -> np.ndarray:
    if a.shape[0] == size:
        return a
    reps = np.repeat(a[:1], size - a.shape[0], axis=0)  # padding repeats case 0; results are sliced off
    return np.concatenate([a, reps], axis=0)


class JaxAdapter:
    """Evaluate a JAX-traceable loss; ``vectorised=False`` loops over cases (still jitted)."""

    def __init__(self, loss: Callable[..., Any], params: Mapping[str, Any], vectorised: bool = True) -> None:
        self.name = "jax" if vectorised else "jax (one case at a time)"
        self.capabilities = Capabilities(autodiff=True, forward_mode=True, second_order=True, batched=vectorised)
        self.notes: list[str] = []
        self._loss = loss
        self._params = dict(params)
        self.vectorised = vectorised
        self.calls = 0
        self._compiled: dict[tuple[str, bool], Any] = {}
        #: dtype of the loss's output for each requested input dtype (a loss may compute lower)
        self.out_dtypes: dict[str, str] = {}
        #: output shape per case, given the prediction shape (set by the evaluator's probe)
        self.out_shape: Callable[[tuple[int, ...]], tuple[int, ...]] | None = None
        self._values_by_vg = True
        #: compilations running in the background, by (op, dtype, stack shape): see prepare()
        self._pending: dict[tuple[str, str, tuple[int, ...]], Future[Any]] = {}
        self._prepared: set[tuple[str, str, tuple[int, ...]]] = set()

    def _cot_shape(self, z: np.ndarray) -> tuple[int, ...]:
        if self.out_shape is None:
            return ()
        return self.out_shape(tuple(z.shape[1:]))

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

    # -- compiling ahead -----------------------------------------------------------------------
    def _avals(self, op: str, dtype: str, pred: tuple[int, ...], targ: tuple[int, ...], y_float: bool) -> list[Any]:
        size = call_size(int(np.prod(pred)))
        x64 = dtype == "float64"
        dt = dtype_of(dtype)
        int_dt = np.int64 if x64 else np.int32
        avals = [jax.ShapeDtypeStruct((size,) + pred, dt),
                 jax.ShapeDtypeStruct((size,) + targ, dt if y_float else int_dt)]
        cot = (size,) + (self.out_shape(pred) if self.out_shape is not None else ())
        if op == "vg":
            avals.append(jax.ShapeDtypeStruct(cot, dt))
        elif op == "jvp":
            avals.append(jax.ShapeDtypeStruct((size,) + pred, dt))
        else:
            raise ValueError(op)
        return avals

    def output_shape(self, z: np.ndarray, y: np.ndarray) -> tuple[int, ...] | None:
        """One case's output shape for the stack ``z``, ``y`` of two cases (traced, not compiled)."""
        how = probe(self._loss, self._params, z, y)
        return None if how is None else how[1]

    def prepare(self, plan: Sequence[Planned]) -> None:
        """Start compiling the functions of ``plan`` in background threads.

        Tracing (which runs the user's Python code) happens here, on the calling thread and in
        plan order, so a loss with Python side effects sees its calls in the same order on every
        run; only XLA's compilation, which runs no user code, moves to the threads. A call that
        needs a function still compiling waits for it. Anything that fails here is left for the
        real call to raise and report. The JIT cache is shared, so the real call reuses the result.
        """
        if not self.vectorised:
            return
        jobs = []
        for op, dtype, pred, targ, y_float in plan:
            key = (op, dtype, (call_size(int(np.prod(pred))),) + tuple(pred))
            if key in self._prepared:
                continue
            self._prepared.add(key)
            try:
                with jax.enable_x64(dtype == "float64"):
                    lowered = self._get(op).lower(*self._avals(op, dtype, tuple(pred), tuple(targ), y_float))
            except Exception:
                continue  # the real call will raise it, with the user-facing message
            jobs.append((key, lowered))
        if not jobs:
            return
        pool = ThreadPoolExecutor(max_workers=compile_threads(), thread_name_prefix="lossguard-compile")
        for key, lowered in jobs:
            self._pending[key] = pool.submit(lowered.compile)
        pool.shutdown(wait=False)  # threads end when their queue is empty

    def cancel_pending(self) -> None:
        """Drop planned compilations that have not started (a battery that ended early, or ran
        fewer checks than planned); one already compiling finishes in its thread."""
        for key, fut in list(self._pending.items()):
            if fut.cancel():
                self._prepared.discard(key)  # may be planned again by a later battery
        self._pending.clear()

    def _await(self, op: str, dtype: str, shape: tuple[int, ...]) -> None:
        fut = self._pending.pop((op, dtype, shape), None)
        if fut is not None:
            fut.exception()  # wait; a failure is re-raised by the real call

    # -- running ---------------------------------------------------------------------------
    def _run(self, op: str, arrays: list[np.ndarray], dtype: str, float_mask: list[bool],
             pick: int | None = None) -> Any:
        """``op`` on K stacked cases in calls of the shape's fixed size; ``pick``: keep only that
        output (the others are not copied back, which matters for large gradients)."""
        k = arrays[0].shape[0]
        self.calls += k
        x64 = dtype == "float64"
        dt = dtype_of(dtype)
        fn = self._get(op)
        with jax.enable_x64(x64):
            int_dt = np.int64 if x64 else np.int32

            def cast(a: np.ndarray, is_float: bool) -> Any:
                # convert on the host and device_put: jnp.asarray compiles a staging function per shape
                return jax.device_put(np.asarray(a, dtype=dt if is_float else int_dt))

            def fetch(out: Any, m: int | None) -> Any:
                self._note_dtype(dtype, out)
                if pick is not None:
                    out = out[pick]
                return jax.tree_util.tree_map(lambda o: np.asarray(o, dtype=np.float64)[slice(m)] if m is not None
                                              else np.asarray(o, dtype=np.float64), out)

            if self.vectorised:
                size = call_size(int(np.prod(arrays[0].shape[1:])))
                outs = []
                for start in range(0, k, size):  # one compiled size per shape: pad the last call
                    part = [a[start:start + size] for a in arrays]
                    if self._pending:
                        self._await(op, dtype, (size,) + tuple(arrays[0].shape[1:]))
                    args = [cast(_pad(a, size), m) for a, m in zip(part, float_mask)]
                    outs.append(fetch(fn(*args), part[0].shape[0]))
            else:
                # one case per call; each result gets a leading case axis of length 1
                outs = [jax.tree_util.tree_map(lambda o: o[None], fetch(fn(*[cast(a[i], m) for a, m in
                                                                             zip(arrays, float_mask)]), None))
                        for i in range(k)]
            if len(outs) == 1:
                return outs[0]
            return jax.tree_util.tree_map(lambda *xs: np.concatenate(xs), *outs)

    def _note_dtype(self, dtype: str, out: Any) -> None:
        leaf = jax.tree_util.tree_leaves(out)[0]
        self.out_dtypes[dtype] = str(leaf.dtype)

    def _targets_float(self, y: np.ndarray) -> bool:
        return bool(np.issubdtype(y.dtype, np.floating))

    def values(self, z: np.ndarray, y: np.ndarray, dtype: str, *, eager: bool = False) -> np.ndarray:
        if eager:
            return self._eager_values(z, y, dtype)
        small = call_size(int(np.prod(z.shape[1:]))) == MAX_CALL_SIZE
        if self._values_by_vg and small:
            # at the menu's shapes the value-and-gradient function serves values too (no second
            # compilation); for large cases the arithmetic saved by a value function outweighs one
            try:
                cot = np.ones((z.shape[0],) + self._cot_shape(z), dtype=np.float64)
                return self._run("vg", [z, y, cot], dtype, [True, self._targets_float(y), True], pick=0)
            except Exception:
                self._values_by_vg = False  # not differentiable: compile the plain value function
                self.calls -= z.shape[0]
        try:
            return self._run("value", [z, y], dtype, [True, self._targets_float(y)])
        except Exception as exc:
            raise call_failed(exc, "values", z.shape[1:], dtype) from None

    def _eager_values(self, z: np.ndarray, y: np.ndarray, dtype: str) -> np.ndarray:
        """One plain call per case, no jit: what a training loop calling the loss sees."""
        dt = dtype_of(dtype)
        self.calls += z.shape[0]
        int_dt = np.int64 if dtype == "float64" else np.int32
        tdt = dt if self._targets_float(y) else int_dt

        def one(i: int) -> np.ndarray:  # inputs converted on the host (no conversion compiles)
            yy, zz = jax.device_put(np.asarray(y[i], dtype=tdt)), jax.device_put(np.asarray(z[i], dtype=dt))
            return np.asarray(self._f(zz, yy), dtype=np.float64)

        with jax.enable_x64(dtype == "float64"):
            return np.stack(per_case(one, z.shape[0], "values", z.shape[1:], dtype))

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
