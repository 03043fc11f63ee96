"""What a loss (and a declared ``grad``) may return, checked on every call it makes.

A loss must return a real floating-point array (numpy, JAX or torch) or a Python/numpy float:
a scalar, or one value per example. Anything else — ``None`` (a forgotten ``return``), a string,
a complex or integer value, a tuple, list or dict, another object — is not a wrong number but a
wrong kind of answer, and judging it as numbers gives misleading verdicts (a ``None`` read as
``nan``, nine conversion errors). :func:`output_problem` names the type and the fix in one line;
:class:`BadOutput` carries it out of the adapters (see :mod:`lossguard._deadline` for why it is a
``BaseException``).

Example:
    >>> output_problem(None)
    'returned None; expected a real floating-point array (the loss value); try adding the missing return statement'
    >>> output_problem(0.5, "loss") is None
    True
"""

from __future__ import annotations

from typing import Any

from ._deadline import Stopped

__all__ = ["BadOutput", "output_problem", "dtype_name", "grad_shape_problem", "check_grad"]

class BadOutput(Stopped):
    """The loss (or its declared grad) returned something that is not a real float array."""


def dtype_name(x: Any) -> str:
    """``float32``, ``complex64``, ``int64`` … for numpy, JAX and torch values alike."""
    return str(getattr(x, "dtype", type(x).__name__)).replace("torch.", "")


def output_problem(out: Any, who: str = "loss") -> str | None:
    """``None`` when ``out`` is a usable output, else the one-line reason and fix.

    Args:
        out: what the call returned (a JAX tracer during tracing).
        who: ``"loss"`` or ``"grad"`` (for the message, which the caller prefixes with the name).
    """
    what = "the gradient" if who == "grad" else "the loss value"
    fix = f"expected a real floating-point array ({what})"
    if out is None:
        return f"returned None; {fix}; try adding the missing return statement"
    if isinstance(out, (str, bytes)):
        return f"returned a string ({str(out)[:20]!r}); {fix}; try returning the number, not its text"
    if isinstance(out, dict):
        key = next(iter(out), "loss")
        return (f"returned a dict with keys {sorted(map(str, out))[:4]}; {fix}; try declaring a "
                f"wrapper that returns one entry, e.g. lambda z, y: {who}(z, y)[{key!r}]")
    if isinstance(out, (tuple, list)):
        return (f"returned a {type(out).__name__} of {len(out)} items; {fix}; try declaring a wrapper "
                f"that returns the loss alone, e.g. lambda z, y: {who}(z, y)[0], or an array of them")
    if isinstance(out, bool):
        return f"returned a bool ({out}); {fix}; try returning the float value"
    if isinstance(out, int):
        return (f"returned the int {out}, the same for every input; {fix}; try computing it "
                f"from the predictions in floating point")
    if isinstance(out, complex):
        return f"returned a complex number; {fix}; try returning its real part if it is real"
    if isinstance(out, float):
        return None
    if not (hasattr(out, "dtype") and hasattr(out, "shape")):
        return f"returned a {type(out).__qualname__} object; {fix}; try returning an array"
    name = dtype_name(out)
    if "complex" in name:
        return f"returned complex values ({name}); {fix}; try jnp.real or dropping the complex arithmetic"
    if "int" in name or "bool" in name:
        return (f"returned {name} values, which have no gradient; {fix}; try computing it in "
                f"floating point (cast the labels or counts with .astype(float))")
    if "float" not in name:
        return f"returned values of dtype {name}; {fix}; try returning a float array"
    return None


def grad_shape_problem(got: tuple[int, ...], pred_shape: tuple[int, ...], name: str) -> str | None:
    """The one line for a declared ``grad`` whose output is not shaped like the predictions."""
    if tuple(got) == tuple(pred_shape):
        return None
    return (f"grad={name}: returned shape {tuple(got)} for predictions of shape {tuple(pred_shape)}; "
            f"expected the predictions' shape {tuple(pred_shape)} (the gradient of the reduced loss "
            f"with respect to every prediction); try returning one value per prediction")


def check_grad(spec: Any, stack: Any) -> None:
    """Call a declared ``grad`` once on the first case of ``stack`` (float64) and raise
    :class:`~lossguard.errors.LossCallError` if its output is not shaped like the predictions."""
    if spec.grad is None:
        return
    import numpy as np

    from .errors import LossCallError

    z, y = stack.predictions[0], stack.targets[0]
    try:
        with np.errstate(all="ignore"):
            got = np.shape(spec.grad(z.copy(), y.copy(), **spec.params))
    except Stopped:
        raise
    except Exception:
        return  # the gradient checks call it again and report what it raises
    problem = grad_shape_problem(got, z.shape, getattr(spec.grad, "__qualname__", "grad"))
    if problem is not None:
        raise LossCallError(problem)
