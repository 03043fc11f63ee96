"""What an adapter does: evaluate one framework's loss on stacked cases, in a given dtype.

Every adapter implements the whole :class:`Adapter` protocol and declares what it can do in a
:class:`Capabilities`; callers (the evaluator, and through it the checks) read the capabilities
and never test an adapter's type. An operation an adapter cannot do for a particular loss
raises ``NotImplementedError`` with the reason in one line (the evaluator turns it into
:class:`lossguard.evaluate.NoGradient`, which checks report as "not made, because …").
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Protocol, runtime_checkable

import numpy as np

from ..errors import LossCallError

__all__ = ["Adapter", "Capabilities", "Planned", "ADAPTER_MEMBERS", "first_line", "call_failed", "per_case"]

#: One function a battery will need: (operation, dtype, predictions shape of one case, targets
#: shape of one case, targets are floats). Operations: ``"vg"`` (value and gradient), ``"jvp"``.
Planned = tuple[str, str, tuple[int, ...], tuple[int, ...], bool]


@dataclass(frozen=True)
class Capabilities:
    """What an adapter can compute for the loss it wraps.

    Attributes:
        autodiff: gradients come from automatic differentiation (not only a declared ``grad``).
        forward_mode: directional derivatives come from a forward-mode pass of their own, not
            from the reverse-mode gradient dotted with the direction; only then is comparing
            forward with reverse mode a check.
        second_order: Hessian-vector products by differentiating the gradient.
        batched: all cases of a stack go through the loss in one vectorised call.
    """

    autodiff: bool
    forward_mode: bool
    second_order: bool
    batched: bool


@runtime_checkable
class Adapter(Protocol):
    """Evaluate a user's loss on a stack of K cases of one shape.

    Inputs are float64 (predictions) and int64/float64 (targets) numpy arrays with a leading
    case axis; each method casts them to ``dtype`` and returns float64 numpy arrays with the
    same leading axis. ``calls`` counts loss evaluations (one per case per pass);
    ``out_dtypes`` maps each requested dtype to the dtype the loss's output came back in;
    ``notes`` are one-line remarks for the report header (say, a fallback taken once);
    ``out_shape`` gives the output shape of one case for a case's prediction shape (set by the
    evaluator after its probe); ``output_shape(z, y)`` asks the loss itself, for a stack of two
    cases, as cheaply as its framework allows (``None`` when the call fails there).
    """

    name: str
    capabilities: Capabilities
    calls: int
    out_dtypes: dict[str, str]
    notes: list[str]
    out_shape: Callable[[tuple[int, ...]], tuple[int, ...]] | None

    def values(self, z: np.ndarray, y: np.ndarray, dtype: str, *, eager: bool = False) -> np.ndarray: ...

    def value_and_grad(
        self, z: np.ndarray, y: np.ndarray, dtype: str, cotangent: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]: ...

    def jvp(self, z: np.ndarray, y: np.ndarray, v: np.ndarray, dtype: str) -> tuple[np.ndarray, np.ndarray]: ...

    def hvp(
        self, z: np.ndarray, y: np.ndarray, v: np.ndarray, dtype: str, cotangent: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]: ...

    def prepare(self, plan: Sequence[Planned]) -> None: ...

    def output_shape(self, z: np.ndarray, y: np.ndarray) -> tuple[int, ...] | None: ...

    def cancel_pending(self) -> None: ...


#: The members every adapter class must define (checked by tests/test_adapter_protocol.py).
ADAPTER_MEMBERS = ("name", "capabilities", "calls", "out_dtypes", "notes", "out_shape", "values", "value_and_grad", "jvp",
                   "hvp", "prepare", "cancel_pending", "output_shape")


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


def per_case(one: Callable[[int], Any], k: int, what: str, shape: tuple[int, ...], dtype: str,
             passthrough: tuple[type[BaseException], ...] = ()) -> list[Any]:
    """``[one(0), …, one(k - 1)]``; a loss that raises becomes :func:`call_failed`'s error,
    except for the exception types in ``passthrough`` (an operation the adapter reports as
    unavailable rather than failed).

    The loop every adapter runs when it calls the loss one case at a time.
    """
    try:
        return [one(i) for i in range(k)]
    except passthrough:
        raise
    except Exception as exc:
        raise call_failed(exc, what, shape, dtype) from None
