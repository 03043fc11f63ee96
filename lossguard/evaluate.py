"""Evaluation: one object per declared loss that every check asks for values and gradients.

It probes the loss once (without compiling) to pick an adapter — vmapped JAX, JAX one case at a
time, torch, or plain numpy — and to read the reduction from the output's shape. It keeps the
compiled functions for the whole battery, so checks share compilations, and counts loss
evaluations. This is the one module outside ``adapters/`` that knows the concrete adapters;
checks read :attr:`Evaluator.capabilities` instead.
"""

from __future__ import annotations

import sys
from typing import Any

import numpy as np

from ._deadline import Stopped
from ._guard import Guard
from ._outputs import check_grad
from .adapters import jax_loss
from .adapters._base import Adapter, Capabilities, first_line
from .adapters.numpy_loss import NumpyAdapter
from .cases import CaseStack, Cell, random_stack, shape_menu
from ._suggest import bad_value
from .errors import LossCallError, SpecError
from .spec import LossSpec
from ._shapes import survey
from ._precision import EVIDENCE, describe, grid_of, judged_precision, lower, why_not_traced
from .tolerance import DTYPES, unit_roundoff

__all__ = ["Evaluator", "NoGradient"]


class NoGradient(Exception):
    """The loss has no gradient oracle here (not traceable by JAX and no declared ``grad``)."""


class Evaluator:
    """Values and gradients of the declared loss on stacked cases.

    Attributes:
        spec: the declaration.
        adapter: the chosen adapter (``adapter.name`` says which).
        output: ``"scalar"`` or ``"per_example"``.
        reduction: ``"mean"``, ``"sum"`` (scalar outputs) or ``"none"`` (per-example).
    """

    def __init__(self, spec: LossSpec, guard: Guard | None = None) -> None:
        #: every call of the loss and grad goes through the guard (time limit, output check)
        self.guard = guard or Guard()
        self._declared_loss = spec.loss  # as declared: a torch module class is built from it
        self.spec = self.guard.guarded_spec(spec)
        self.adapter: Adapter
        self.output = "scalar"
        self.reduction = spec.reduction
        self._user_grad: NumpyAdapter | None = None
        #: why JAX could not trace the loss (one line), when it fell back to plain calls
        self.untraced = ""
        self._grid: str | None | bool = False  # the rounding probe's answer; False: not yet probed
        self._left_out: dict[Cell, str] | None = None  # None: the shapes not yet surveyed
        try:
            self._prepare()
        except Stopped as exc:
            raise LossCallError(str(exc)) from None

    # -- probing -----------------------------------------------------------------------------
    def _probe_stack(self) -> CaseStack:
        cell = shape_menu(self.spec, "quick")[0]
        return random_stack(self.spec, cell, np.random.default_rng(0), 2)

    def _prepare(self) -> None:
        spec = self.spec
        stack = self._probe_stack()
        how = None if self._torch_module() else jax_loss.probe(spec.loss, spec.params, stack.predictions,
                                                                stack.targets)
        if how is not None:
            mode, out_shape = how
            self.adapter = jax_loss.JaxAdapter(spec.loss, spec.params, vectorised=(mode == "vmap"))
        elif (torch_shape := self._probe_torch(stack)) is not None:
            from .adapters.torch_loss import TorchAdapter

            self.adapter, out_shape = TorchAdapter(self._declared_loss, spec.params, wrap=self._guarded, train=spec.train,
                                                   autocast=spec.autocast), torch_shape
        else:
            self.adapter = NumpyAdapter(spec.loss, spec.params, spec.grad)
            out_shape = self._probe_plain(stack)
            self.untraced = why_not_traced(spec.loss, spec.params, stack.predictions[0], stack.targets[0])
        self._torch_only(spec)
        if spec.grad is not None and self.adapter.capabilities.autodiff:
            self._user_grad = NumpyAdapter(spec.loss, spec.params, spec.grad)
        self._read_output(out_shape, stack)
        check_grad(self.spec, stack)
        self.adapter.out_shape = self._out_shape

    def _torch_only(self, spec: LossSpec) -> None:
        """``train`` and ``autocast`` are torch declarations: refuse them for other losses."""
        for name, value, default in (("train", spec.train, False), ("autocast", spec.autocast, None)):
            if value != default and self.adapter.name != "torch":
                raise SpecError(bad_value(name, value, f"a torch loss (this one runs on {self.adapter.name})",
                                          f"try dropping {name}"))

    def _torch_module(self) -> bool:
        """An ``nn.Module`` (instance or class) goes straight to the torch adapter."""
        if "torch" not in sys.modules:
            return False
        from .adapters.torch_loss import torch_module

        return torch_module(self._declared_loss)

    def _out_shape(self, pred_shape: tuple[int, ...]) -> tuple[int, ...]:
        """The loss's output shape per case for predictions of ``pred_shape``."""
        if self.output == "scalar":
            return ()
        return pred_shape if self.spec.kind == "binary" else pred_shape[:1]

    def _probe_torch(self, stack: CaseStack) -> tuple[int, ...] | None:
        """Torch is tried only when the loss's process already imported it (no import cost)."""
        if "torch" not in sys.modules:
            return None
        from .adapters import torch_loss

        return torch_loss.probe(self._declared_loss, self.spec.params, stack.predictions[0], stack.targets[0],
                                wrap=self._guarded)

    def _guarded(self, fn: Any) -> Any:
        """``fn`` (a torch loss as the adapter calls it: a built module, or the function) behind the
        guard; the declared loss itself is not wrapped, so a module class can still be built."""
        return self.guard.wrap(fn, "loss", self.spec.name)

    def _probe_plain(self, stack: CaseStack) -> tuple[int, ...]:
        z, y = stack.predictions[0], stack.targets[0]
        try:
            with np.errstate(all="ignore"):
                out = self.spec.loss(z.astype(np.float32), y if not np.issubdtype(y.dtype, np.floating)
                                     else y.astype(np.float32), **self.spec.params)
            return tuple(np.shape(np.asarray(out)))
        except Exception as exc:
            raise LossCallError(
                f"loss={self.spec.name}: raised {first_line(exc)} on a plain call with predictions "
                f"of shape {z.shape}; check the kind ({self.spec.kind!r}) and the signature "
                f"loss(predictions, targets, **params)"
            ) from None

    def _read_output(self, out_shape: tuple[int, ...], stack: CaseStack) -> None:
        pred_shape = stack.cell.pred_shape()
        per_example = pred_shape if self.spec.kind == "binary" else pred_shape[:1]
        if out_shape == ():
            self.output, self.reduction = "scalar", self.spec.reduction
        elif out_shape == per_example:
            self.output, self.reduction = "per_example", "none"
        else:
            raise LossCallError(
                f"loss={self.spec.name}: returned shape {out_shape} for predictions of shape "
                f"{pred_shape}; expected a scalar or one value per example {per_example}; "
                f"try returning the batch mean"
            )

    # -- evaluation ----------------------------------------------------------------------------
    @property
    def capabilities(self) -> Capabilities:
        """What the adapter can compute for this loss (forward mode, second order, …)."""
        return self.adapter.capabilities

    @property
    def has_gradient(self) -> bool:
        return self.capabilities.autodiff or self.spec.grad is not None

    @property
    def has_autodiff(self) -> bool:
        return self.capabilities.autodiff

    @property
    def calls(self) -> int:
        return self.adapter.calls + (self._user_grad.calls if self._user_grad else 0)

    def values(self, stack: CaseStack, dtype: str = "float64", *, eager: bool = False) -> np.ndarray:
        """Loss outputs, float64, shape (K,) or (K, per-example shape)."""
        return self.adapter.values(stack.predictions, stack.targets, dtype, eager=eager)

    def cotangent_shape(self, stack: CaseStack) -> tuple[int, ...]:
        return self._out_shape(stack.cell.pred_shape())

    def value_and_grad(
        self, stack: CaseStack, dtype: str = "float64", cotangent: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """(values, gradient of ⟨cotangent, output⟩ w.r.t. predictions) per case.

        ``cotangent`` has shape (K,) + output shape; ones when ``None``.
        """
        if not self.has_gradient:
            raise NoGradient(self.spec.name)
        if cotangent is None:
            cotangent = np.ones((len(stack),) + self.cotangent_shape(stack))
        try:
            return self.adapter.value_and_grad(stack.predictions, stack.targets, dtype, cotangent)
        except NotImplementedError as exc:
            raise NoGradient(str(exc)) from None

    def grads(self, stack: CaseStack, dtype: str = "float64", cotangent: np.ndarray | None = None) -> np.ndarray:
        return self.value_and_grad(stack, dtype, cotangent)[1]

    def user_grads(self, stack: CaseStack, dtype: str = "float64") -> np.ndarray | None:
        """The declared closed-form ``grad`` per case, or ``None`` if none was declared."""
        if self.spec.grad is None:
            return None
        if self._user_grad is None:  # numpy adapter: its gradient *is* the declared one
            return self.grads(stack, dtype)
        return self._user_grad.value_and_grad(stack.predictions, stack.targets, dtype)[1]

    def jvp(self, stack: CaseStack, directions: np.ndarray, dtype: str = "float64") -> tuple[np.ndarray, np.ndarray]:
        """(values, directional derivatives along ``directions``): by a forward-mode pass where
        ``capabilities.forward_mode``, else from the gradient (then no independent check)."""
        if not self.has_gradient:
            raise NoGradient(self.spec.name)
        try:
            return self.adapter.jvp(stack.predictions, stack.targets, directions, dtype)
        except NotImplementedError as exc:
            raise NoGradient(str(exc)) from None

    def hvp(
        self, stack: CaseStack, directions: np.ndarray, dtype: str = "float64",
        cotangent: np.ndarray | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """(gradient, Hessian-vector product along ``directions``) of ⟨cotangent, output⟩ per
        case, by autodiff (reverse over reverse); :class:`NoGradient` where the adapter has none."""
        if not self.capabilities.second_order:
            raise NoGradient(f"{self.spec.name}: Hessian-vector products need autodiff (a JAX-traceable or "
                             "torch loss)")
        if cotangent is None:
            cotangent = np.ones((len(stack),) + self.cotangent_shape(stack))
        try:
            return self.adapter.hvp(stack.predictions, stack.targets, directions, dtype, cotangent)
        except NotImplementedError as exc:
            raise NoGradient(str(exc)) from None

    def computed_dtype(self, dtype: str) -> str:
        """The precision the loss actually computed in for ``dtype`` inputs (the lower of the
        two): a loss that casts to float32 is judged by float32's rounding."""
        out = self.adapter.out_dtypes.get(dtype, dtype)
        judged = judged_precision(dtype, lower(dtype, out, self.rounding_grid()))
        if self.spec.autocast is not None and dtype == "float32":
            # declared: the loss runs under CPU autocast, so float32 inputs get that dtype's rounding
            return max((judged, self.spec.autocast), key=unit_roundoff)
        return judged

    def rounding_grid(self) -> str | None:
        """The coarser grid every value and gradient of a float64 call lies on (``None``: float64
        rounding), probed once on random cases (:func:`lossguard._precision.grid_of`)."""
        if self._grid is False:
            self._grid = None  # probed once: a probe the battery's budget interrupts is not retried
            stack = random_stack(self.spec, shape_menu(self.spec, "quick")[0], np.random.default_rng(1), EVIDENCE)
            try:
                if self.has_gradient:
                    self._grid = grid_of(*self.value_and_grad(stack, "float64"))
                else:
                    self._grid = grid_of(self.values(stack, "float64"))
            except (Exception, Stopped):  # a loss that cannot be called (in time) here: the checks say so
                self._grid = None
        return self._grid  # type: ignore[return-value]

    @property
    def left_out(self) -> dict[Cell, str]:
        """Menu shapes left out of the battery, with the reason: those whose output does not read
        as :attr:`output` (:func:`lossguard._shapes.survey`), surveyed once on first use."""
        if self._left_out is None:
            self._left_out = {}  # surveyed once: a survey the battery's budget interrupts is not retried
            self._left_out = survey(self)
        return self._left_out

    def prepare(self, plan: list[tuple[str, str, Cell]]) -> None:
        """Start compiling what a battery will ask for — (operation, dtype, shape) with operation
        ``"vg"`` or ``"jvp"`` — in the background (a no-op for adapters that compile nothing)."""
        kind = self.spec.kind
        jobs = []
        for op, dtype, cell in plan:
            pred = cell.pred_shape()
            targ = pred[:1] if kind == "categorical" else pred
            jobs.append((op, dtype, pred, targ, kind != "categorical"))
        self.adapter.prepare(jobs)

    def settle(self) -> None:
        """Cancel background compilations that no check has asked for (the battery is over)."""
        self.adapter.cancel_pending()

    def describe(self) -> dict[str, Any]:
        self.rounding_grid()  # before reading out_dtypes: the probe adds to them
        asked = [d for d in list(self.adapter.out_dtypes) if d in DTYPES]
        computed = {d: lower(d, self.adapter.out_dtypes[d], self.rounding_grid()) for d in asked}
        computed["float64"] = lower("float64", computed.get("float64"), self.rounding_grid())
        return {"adapter": self.adapter.name, "output": self.output, "reduction": self.reduction,
                "computed_in": computed, "untraced": self.untraced,
                "notes": list(self.adapter.notes)
                + describe(computed, f"not traced by JAX ({self.untraced}): run as plain calls" if self.untraced else "")
                + [f"{why}: that shape is left out" for why in self.left_out.values()]}
