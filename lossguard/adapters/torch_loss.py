"""Adapter for losses written with PyTorch (optional: used only when torch is importable).

Functions, ``nn.Module`` instances and ``nn.Module`` classes (built once with the declared
params as constructor arguments) run on CPU tensors of the dtype under test, modules in eval
mode unless ``train=True`` (said in the report header). Four operations, each by the tool
made for it:

    values      the loss under ``torch.no_grad()``;
    gradient    reverse mode, the VJP of the cotangent: ∇⟨c, f(z)⟩;
    forward     true forward mode (``torch.autograd.forward_ad`` dual numbers one case at a
                time, ``torch.func.jvp`` under vmap) — never the gradient dotted with the
                direction; a loss with no forward rule (a custom ``autograd.Function`` without
                ``jvp``) raises ``NotImplementedError`` and the comparison is reported as not made;
    hvp         reverse over reverse: H v = ∇(∇⟨c, f⟩ · v) (Pearlmutter, "Fast exact
                multiplication by the Hessian", Neural Computation, 1994).

Small cases (:data:`VMAP_ELEMENTS`) run all at once under ``torch.func.vmap``, large ones one at
a time (``batched=True``/``False`` forces either); a loss vmap cannot run (``.item()``, data-dependent control flow, in-place updates, custom
Functions without a vmap rule) falls back to one case at a time, once per loss, and the
fallback is noted in the report header. Thread count and module mode are scoped per call
(:mod:`lossguard.adapters._torch_scope`); grad mode only through scopes.
"""

from __future__ import annotations

import contextlib
import warnings
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np

from .._budget import call_size
from ..tolerance import dtype_of
from ._base import Capabilities, Planned, first_line, per_case
from ._torch_func import batched_op
from ._torch_scope import resolve, scoped, torch_module

__all__ = ["TorchAdapter", "probe", "torch_module", "BATCHED_DEFAULT", "VMAP_ELEMENTS"]

#: Cases of at most this many prediction elements go through ``torch.func.vmap`` together; larger
#: ones run one at a time. Measured here (best of 5 calls, float64, 128 cases of (16, 10)): a
#: value-and-gradient call took 1.1 ms under vmap against 38 ms case by case for a CE, 1.2 against
#: 98 ms for a focal loss written op by op; with 4 cases of (1024, 300) vmap took 34 against 17 ms
#: and 27 against 22 ms. The first vmap in a process imports torch.func's machinery (about 1.2 CPU
#: seconds, once). The rule reads only the shape, so the same seed gives the same bits.
#: ``benchmarks/torch_speed.py`` times whole batteries both ways.
VMAP_ELEMENTS = 1 << 14
#: ``None``: vmap by :data:`VMAP_ELEMENTS`; ``True``/``False``: always / never (benchmarks).
BATCHED_DEFAULT: bool | None = None

_WHAT = {"value": "values", "vg": "the gradient", "jvp": "a forward-mode derivative",
         "hvp": "a Hessian-vector product"}


def _torch() -> Any:
    import torch

    return torch


def to_tensor(a: np.ndarray, dtype: str, is_float: bool) -> Any:
    """A private copy of ``a`` as a CPU tensor (a loss that writes into its input changes only
    this copy), rounded once from float64 by numpy (torch's double → half goes through float,
    which can round twice); integer targets as int64."""
    torch = _torch()
    if not is_float:
        return torch.from_numpy(np.array(a, dtype=np.int64, order="C", copy=True))
    host = np.array(a, dtype=dtype_of(dtype), order="C", copy=True)
    if dtype == "bfloat16":  # numpy has no bfloat16 torch understands: pass the bits
        return torch.from_numpy(host.view(np.int16)).view(torch.bfloat16)
    return torch.from_numpy(host)


class TorchAdapter:
    """Evaluate a torch loss on the CPU; see the module docstring."""

    name = "torch"

    def __init__(self, loss: Callable[..., Any], params: Mapping[str, Any], *, train: bool = False,
                 batched: bool | None = None, autocast: str | None = None,
                 wrap: Callable[[Callable[..., Any]], Callable[..., Any]] | None = None) -> None:
        """``batched``: ``None`` vmaps cases of at most :data:`VMAP_ELEMENTS` elements,
        ``True``/``False`` always/never (``BATCHED_DEFAULT`` when not given); ``wrap`` wraps the
        callable the adapter calls (the evaluator's guard) once a module class is built."""
        self._fn, self._kw, self._module = resolve(loss, params)
        if wrap is not None:
            self._fn = wrap(self._fn)
        self.train = train
        self.batched = BATCHED_DEFAULT if batched is None else batched
        self.capabilities = Capabilities(autodiff=True, forward_mode=True, second_order=True,
                                         batched=self.batched is not False)
        self.calls = 0
        self.out_dtypes: dict[str, str] = {}
        self.notes: list[str] = []
        self.out_shape: Callable[[tuple[int, ...]], tuple[int, ...]] | None = None
        self._unbatched = ""  # why vmap could not run this loss (then every case runs alone)
        self.autocast = autocast
        if autocast is not None:
            self.notes.append(f"declared CPU autocast to {autocast}: float32 inputs judged at {autocast}'s "
                              "rounding (autocast leaves float64 alone, so float64 runs stay exact)")
        if self._module is not None:
            self.notes.append(f"torch module run in {'train' if train else 'eval'} mode"
                              + ("" if train else " (the default; declare train mode to judge that)"))

    def _f(self, z: Any, y: Any) -> Any:
        return self._fn(z, y, **self._kw)

    # -- one case at a time (autograd) ----------------------------------------------------------
    def _one(self, op: str, zt: Any, yt: Any, extra: list[Any]) -> tuple[Any, ...]:
        torch = _torch()
        if op == "value":
            with torch.no_grad():
                return (self._f(zt, yt),)
        if op == "jvp":
            import torch.autograd.forward_ad as fwd

            with torch.no_grad(), fwd.dual_level():
                dual = fwd.unpack_dual(self._f(fwd.make_dual(zt, extra[0].to(zt.dtype)), yt))
                tangent = dual.tangent if dual.tangent is not None else torch.zeros_like(dual.primal)
                return dual.primal, tangent
        with torch.enable_grad():
            zt.requires_grad_(True)
            out = self._f(zt, yt)
            phi = torch.sum(out * extra[0].to(out.dtype).reshape(out.shape))  # ⟨c, f(z)⟩: its gradient is the VJP
            if op == "vg":
                (g,) = torch.autograd.grad(phi, zt, allow_unused=True)
                return out, torch.zeros_like(zt) if g is None else g
            (g,) = torch.autograd.grad(phi, zt, create_graph=True, allow_unused=True)
            if g is None or not g.requires_grad:  # the gradient does not depend on z: H = 0 here
                return (torch.zeros_like(zt) if g is None else g), torch.zeros_like(zt)
            (hv,) = torch.autograd.grad(torch.sum(g * extra[1].to(g.dtype)), zt, allow_unused=True)
            return g, torch.zeros_like(zt) if hv is None else hv

    # -- running --------------------------------------------------------------------------------
    def _run(self, op: str, arrays: list[np.ndarray], dtype: str, float_mask: list[bool],
             eager: bool = False) -> tuple[np.ndarray, ...]:
        torch = _torch()
        k, shape = arrays[0].shape[0], tuple(arrays[0].shape[1:])
        self.calls += k
        elements = int(np.prod(shape))
        small = elements <= VMAP_ELEMENTS if self.batched is None else self.batched
        vmap = small and not eager and not self._unbatched
        chunk = call_size(elements) if vmap else 1
        with scoped(elements * chunk, self._module, self.train), self._autocast(), warnings.catch_warnings():
            # forward mode's first use scripts torch's jvp decompositions with the deprecated
            # torch.jit.script (seen with torch 2.13): torch's own warning, not the user's
            warnings.filterwarnings("ignore", "`torch.jit.script` is deprecated", DeprecationWarning)
            ts = [to_tensor(a, dtype, m) for a, m in zip(arrays, float_mask)]
            if vmap:
                try:
                    runs = [batched_op(op, self._f, [t[s:s + chunk] for t in ts]) for s in range(0, k, chunk)]
                    return self._host(dtype, tuple(_cat(parts) for parts in zip(*runs)))
                except Exception as exc:  # vmap cannot run it: one case at a time from now on
                    why = first_line(exc)
                    self._unbatched = why if len(why) <= 100 else why[:97] + "..."
            outs: list[np.ndarray] = []

            def one(i: int) -> None:  # each case's results go straight into float64 host arrays
                got = self._one(op, ts[0][i], ts[1][i], [t[i] for t in ts[2:]])
                if not outs:
                    self._note_dtype(dtype, got[0])
                    outs.extend(np.empty((k,) + tuple(t.shape)) for t in got)
                for o, t in zip(outs, got):
                    o[i] = t.detach().to(torch.float64).numpy()

            per_case(one, k, _WHAT[op], shape, dtype, passthrough=(NotImplementedError,) if op == "jvp" else ())
        if vmap:  # it failed under vmap and ran case by case: say so once
            self.notes.append(f"torch.func.vmap could not run this loss ({_WHAT[op]}: {self._unbatched}): "
                              "its cases ran one at a time")
        return tuple(outs)

    def _autocast(self) -> Any:
        torch = _torch()
        if self.autocast is None:
            return contextlib.nullcontext()
        return torch.autocast("cpu", dtype=getattr(torch, self.autocast))

    def _note_dtype(self, dtype: str, first: Any) -> None:
        self.out_dtypes[dtype] = str(first.dtype).replace("torch.", "")

    def _host(self, dtype: str, outs: tuple[Any, ...]) -> tuple[np.ndarray, ...]:
        self._note_dtype(dtype, outs[0])
        return tuple(o.detach().to(_torch().float64).numpy() for o in outs)

    @staticmethod
    def _floats(y: np.ndarray) -> bool:
        return bool(np.issubdtype(y.dtype, np.floating))

    def _ones(self, z: np.ndarray) -> np.ndarray:
        out = self.out_shape(tuple(z.shape[1:])) if self.out_shape is not None else ()
        return np.ones((z.shape[0],) + out)

    def values(self, z: np.ndarray, y: np.ndarray, dtype: str, *, eager: bool = False) -> np.ndarray:
        return self._run("value", [z, y], dtype, [True, self._floats(y)], eager=eager)[0]

    def value_and_grad(
        self, z: np.ndarray, y: np.ndarray, dtype: str, cotangent: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        cot = self._ones(z) if cotangent is None else cotangent
        vals, g = self._run("vg", [z, y, cot], dtype, [True, self._floats(y), True])
        return vals, g

    def jvp(self, z: np.ndarray, y: np.ndarray, v: np.ndarray, dtype: str) -> tuple[np.ndarray, np.ndarray]:
        try:
            vals, tangent = self._run("jvp", [z, y, v], dtype, [True, self._floats(y), True])
        except NotImplementedError as exc:
            raise NotImplementedError(f"torch has no forward-mode rule for this loss ({first_line(exc)})") from None
        return vals, tangent

    def hvp(
        self, z: np.ndarray, y: np.ndarray, v: np.ndarray, dtype: str, cotangent: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        g, hv = self._run("hvp", [z, y, cotangent, v], dtype, [True, self._floats(y), True, True])
        return g, hv

    def output_shape(self, z: np.ndarray, y: np.ndarray) -> tuple[int, ...] | None:
        """One case's output shape, from a plain call on the first case of ``z``, ``y``."""
        torch = _torch()
        with scoped(int(np.prod(z.shape[1:])), self._module, self.train), torch.no_grad():
            out = self._f(to_tensor(z[0], "float32", True), to_tensor(y[0], "float32", self._floats(y)))
        return tuple(out.shape) if isinstance(out, torch.Tensor) else None

    def prepare(self, plan: Sequence[Planned]) -> None:
        """Nothing compiles: torch runs eagerly."""

    def cancel_pending(self) -> None:
        """Nothing is ever pending."""


def _cat(parts: tuple[Any, ...]) -> Any:
    return parts[0] if len(parts) == 1 else _torch().cat(parts)


def probe(loss: Callable[..., Any], params: Mapping[str, Any], z: np.ndarray, y: np.ndarray,
          wrap: Callable[[Callable[..., Any]], Callable[..., Any]] | None = None) -> tuple[int, ...] | None:
    """The output shape if ``loss`` takes and returns torch tensors, else ``None``.

    ``z``/``y`` are one case; ``wrap`` as for :class:`TorchAdapter`. Only tried when torch is
    already importable.
    """
    try:
        torch = _torch()
    except ImportError:
        return None
    try:
        fn, kw, module = resolve(loss, params)
        fn = wrap(fn) if wrap is not None else fn
        with scoped(z.size, module), torch.no_grad():
            out = fn(to_tensor(z, "float32", True), to_tensor(y, "float32", TorchAdapter._floats(y)), **kw)
    except Exception:
        return None
    if not isinstance(out, torch.Tensor):
        return None
    return tuple(out.shape)
