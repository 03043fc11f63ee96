"""How a replay line calls the loss: in the loss's own framework, with the dtype it was run in.

A replay line must give the reported value when pasted into a fresh Python session. A JAX loss
given float64 numpy arrays computes in float32 unless 64-bit mode is on, so its line wraps the
loss in ``jax.enable_x64(True)`` (used as a decorator: scoped to that one call, an expression
that can be assigned) — or ``jax.enable_x64(False)`` for lower precisions, as the battery runs
them. A torch loss gets ``torch.tensor`` arguments of the dtype. The runner says which framework
the battery's loss uses (:func:`framework`); a line built outside a battery is plain numpy.

Example:
    >>> with framework("jax"):
    ...     call("[1.0, 2.0]", "[1]", "float64", True, "")
    "jax.enable_x64(True)(loss)(np.array([1.0, 2.0], dtype='float64'), np.array([1]))"
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar

__all__ = ["framework", "call", "imports"]

_FRAMEWORK: ContextVar[str] = ContextVar("lossguard_replay_framework", default="numpy")


@contextmanager
def framework(adapter_name: str) -> Iterator[None]:
    """Replay lines built inside the block call the loss as ``adapter_name``'s adapter does
    (``"jax"``, ``"jax (one case at a time)"``, ``"torch"``, ``"numpy"``)."""
    token = _FRAMEWORK.set(adapter_name.split()[0] if adapter_name else "numpy")
    try:
        yield
    finally:
        _FRAMEWORK.reset(token)


def imports() -> str:
    """The imports a pasted line needs besides the loss itself."""
    return {"jax": "import numpy as np, jax", "torch": "import numpy as np, torch"}.get(_FRAMEWORK.get(),
                                                                                       "import numpy as np")


def call(z: str, y: str, dtype: str, y_int: bool, params: str) -> str:
    """The call expression for arrays ``z`` and ``y`` — Python list text, or names of arrays —
    in ``dtype``."""
    how = _FRAMEWORK.get()
    if how == "torch":
        ydt = "" if y_int else f", dtype=torch.{dtype}"
        return f"loss(torch.tensor({z}, dtype=torch.{dtype}), torch.tensor({y}{ydt}){params})"
    ydt = "" if y_int else f", dtype='{dtype}'"
    make = "np.asarray" if z.isidentifier() else "np.array"  # named arrays are passed as they are when they fit
    args = f"({make}({z}, dtype='{dtype}'), {make}({y}{ydt}){params})"
    if how == "jax":  # the battery's own scope: 64-bit mode exactly when the dtype is float64
        return f"jax.enable_x64({dtype == 'float64'})(loss){args}"
    return f"loss{args}"
