"""The wrapper around every call of the user's loss (and declared ``grad``) during a battery.

The :class:`~lossguard.evaluate.Evaluator` hands the adapters the wrapped functions, so each call
— a plain call, or the tracing of a JAX loss (its own Python code, not XLA's compilation) —

- runs under the per-call time limit (:mod:`lossguard._deadline`); a (shape, dtype) that timed
  out once fails at once afterwards, so a loss that hangs on one shape costs one timeout;
- has its output checked (:func:`lossguard._outputs.output_problem`): ``None``, strings,
  complex, integer, tuple, dict … stop with one line naming the type and the fix;
- while :meth:`Guard.watching` is on, records any change the loss made to its input arrays
  (numpy arrays, torch tensors, JAX arrays' host copies), for the ``inputs-intact`` check.

Example:
    >>> g = Guard()
    >>> double = g.wrap(lambda z, y: z * 2.0, "loss", "double")
    >>> import numpy as np
    >>> float(double(np.ones(2), np.zeros(2)).sum())
    4.0
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ._deadline import CallTimeout, Limits, deadline
from ._outputs import BadOutput, dtype_name, output_problem
from .spec import LossSpec

__all__ = ["Guard", "Change"]

_ARGS = ("predictions", "targets")


@dataclass(frozen=True)
class Change:
    """An input the loss changed in place: which one, how many elements, the largest change,
    and the case shape and dtype of the call."""

    argument: str
    changed: int
    size: int
    largest: float
    shape: tuple[int, ...]
    dtype: str


def _host_copy(a: Any) -> np.ndarray | None:
    """A float64/int64 numpy copy of an input, or ``None`` for a JAX tracer (nothing to compare)."""
    if isinstance(a, np.ndarray):
        return a.copy()
    mod = type(a).__module__
    if mod.startswith("torch"):
        t = a.detach()
        return (t.double() if t.is_floating_point() else t).cpu().numpy().copy()
    if "Tracer" in type(a).__name__:
        return None
    try:
        return np.array(a)  # a concrete JAX array: its host copy
    except Exception:
        return None


def _differs(before: np.ndarray, after: np.ndarray) -> tuple[int, float]:
    """(elements that differ, largest |difference|), nan equal to nan."""
    if before.shape != after.shape:
        return before.size, float("inf")
    b = before.astype(np.float64, copy=False)
    a = after.astype(np.float64, copy=False)
    with np.errstate(all="ignore"):
        same = (a == b) | (np.isnan(a) & np.isnan(b))
        diff = np.abs(np.where(same, 0.0, a - b))
    return int((~same).sum()), float(np.nan_to_num(diff, nan=np.inf).max(initial=0.0))


class Guard:
    """Wraps a loss's calls with the time limit, the output check and the input watch.

    Attributes:
        limits: the time bounds (the runner sets them for each battery).
        check: the check running now, named in messages ("" outside a check).
        phase: what calls outside a check are for ("while probing the loss" …).
        changes: input changes recorded while :meth:`watching`.
    """

    def __init__(self, limits: Limits | None = None) -> None:
        self.limits = limits or Limits()
        self.check = ""
        #: what the calls outside a check are doing (the runner names its stages)
        self.phase = "while probing the loss"
        self.changes: list[Change] | None = None
        self._timed_out: dict[tuple[Any, ...], str] = {}

    def guarded_spec(self, spec: LossSpec) -> LossSpec:
        """``spec`` with its loss and grad wrapped (the declaration itself is unchanged)."""
        grad = self.wrap(spec.grad, "grad", getattr(spec.grad, "__qualname__", "grad")) if spec.grad else None
        return replace(spec, loss=self.wrap(spec.loss, "loss", spec.name), grad=grad)

    def wrap(self, fn: Callable[..., Any], who: str, name: str) -> Callable[..., Any]:
        @functools.wraps(fn)
        def guarded(*args: Any, **kwargs: Any) -> Any:
            return self._call(fn, who, name, args, kwargs)

        return guarded

    @contextmanager
    def watching(self) -> Iterator[list[Change]]:
        """Record input changes made by the calls inside the block."""
        self.changes = []
        try:
            yield self.changes
        finally:
            self.changes = None

    def _call(self, fn: Callable[..., Any], who: str, name: str, args: tuple[Any, ...], kwargs: dict[str, Any]) -> Any:
        z = args[0] if args else None
        shape, dtype = tuple(getattr(z, "shape", ())), dtype_name(z)
        key = (who, shape, dtype)
        secs = self.limits.call_seconds
        late = (f"{who}={name}: a call with predictions of shape {shape} in {dtype} did not return within "
                f"{secs:g} s (the per-call limit), {self.where()}")
        fix = "; try a larger --call-timeout if it is legitimately slow, or find why it hangs on this shape"
        if key in self._timed_out:  # one timeout per (shape, dtype): a hanging loss costs it once
            raise CallTimeout(f"{late} (it timed out {self._timed_out[key]}; not called again){fix}")
        before = [_host_copy(a) for a in args[:2]] if self.changes is not None else None
        try:
            with deadline(secs, lambda: CallTimeout(late + fix)):
                out = fn(*args, **kwargs)
        except CallTimeout:
            self._timed_out[key] = self.where()
            raise
        problem = output_problem(out, who)
        if problem is not None:
            raise BadOutput(f"{who}={name}: {problem}")
        if before is not None:
            self._compare(before, args[:2], shape, dtype)
        return out

    def where(self) -> str:
        """When the current call happens, for messages."""
        return f"in check {self.check}" if self.check else self.phase

    def _compare(self, before: list[np.ndarray | None], after: tuple[Any, ...], shape: tuple[int, ...], dtype: str) -> None:
        assert self.changes is not None
        for arg, old, new in zip(_ARGS, before, after):
            now = _host_copy(new) if old is not None else None
            if old is None or now is None:
                continue
            changed, largest = _differs(old, now)
            if changed:
                self.changes.append(Change(arg, changed, int(old.size), largest, shape, dtype))
