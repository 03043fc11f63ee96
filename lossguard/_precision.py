"""The precision a loss really computes in, read from its outputs rather than from its dtype.

A loss handed float64 inputs may compute in float32 — a ``.float()`` or ``astype(float32)``
inside, or JAX code run with 64-bit mode off behind a ``float(...)`` that hides it — and return
either float32 or a float64 holding float32 numbers. Judged as float64 it looks wrong by 1e-7
against allowances of 1e-14; judged as float32 it is right. Two readings:

1. the output dtype the adapter records (``out_dtypes``): a float32 output from float64 inputs;
2. a probe of its rounding: every finite nonzero value and gradient entry the loss returns for
   random float64 inputs lies on a coarser format's grid. For a float64 computation each such
   entry lands on the float32 grid with probability about 2^-29 (29 of its 52 fraction bits
   must be zero), so :data:`EVIDENCE` entries all on it are proof beyond reasonable doubt.

The lower of the two precisions, and of the dtype asked for, is what allowances are built from
(:func:`lower`); the report names the downcast (:func:`describe`).

Example:
    >>> import numpy as np
    >>> grid_of(np.float32(np.random.default_rng(0).standard_normal(20)).astype(np.float64))
    'float32'
    >>> grid_of(np.random.default_rng(0).standard_normal(20)) is None
    True
"""

from __future__ import annotations

import numpy as np

from ._formats import round_to
from .tolerance import DTYPES, unit_roundoff

__all__ = ["EVIDENCE", "FLOOR", "grid_of", "lower", "judged_precision", "describe", "why_not_traced"]

#: The lowest precision a downcast is judged at when the caller asked for FLOOR or better:
#: computing a loss in float32 under mixed precision is common practice, so a loss given float64
#: that computes in float32 is judged by float32's rounding (and the downcast named); one that
#: drops to 16 bits keeps float32's allowance, so the accuracy it loses is reported as a failure.
FLOOR = "float32"

#: Finite nonzero entries needed before a grid is believed (each lands on the float32 grid by
#: chance with probability ≈ 2^-29 when computed in float64).
EVIDENCE = 8


def grid_of(*arrays: np.ndarray | None) -> str | None:
    """The coarsest of float16, bfloat16, float32 whose grid holds every finite nonzero entry of
    ``arrays`` (at least :data:`EVIDENCE` of them), or ``None`` (float64, or too little evidence).

    Entries beyond a format's range do not count against it only if none is (a float16 grid
    holds nothing above 65504).
    """
    parts = [np.asarray(a, dtype=np.float64).ravel() for a in arrays if a is not None]
    if not parts:
        return None
    x = np.concatenate(parts)
    with np.errstate(invalid="ignore"):
        x = x[np.isfinite(x) & (x != 0.0)]
    if x.size < EVIDENCE:
        return None
    found = None
    for dtype in ("float32", "bfloat16", "float16"):  # coarser and coarser: keep the last that holds
        if np.array_equal(round_to(x, dtype), x):
            found = dtype
    return found


def lower(*dtypes: str | None) -> str:
    """The lowest precision (largest unit roundoff) among ``dtypes`` known to :data:`DTYPES`."""
    known = [d for d in dtypes if d in DTYPES]
    return max(known, key=unit_roundoff) if known else "float64"


def judged_precision(asked: str, computed: str) -> str:
    """The precision allowances use: ``computed``, but never below :data:`FLOOR` for a caller
    that asked for FLOOR or better."""
    if unit_roundoff(asked) <= unit_roundoff(FLOOR) < unit_roundoff(computed):
        return FLOOR
    return computed


def describe(computed: dict[str, str], reason: str = "") -> list[str]:
    """Phrases for the report header: "given float64, computes in float32 (a silent downcast)"."""
    out = []
    for asked, got in computed.items():
        if got != asked and unit_roundoff(got) > unit_roundoff(asked):
            judged = judged_precision(asked, got)
            how = (f"judged at {got}'s precision" if judged == got
                   else f"judged at {judged}'s precision, so the accuracy lost below it counts")
            out.append(f"given {asked}, computes in {got} (a silent downcast: {how})")
    if reason:
        out.append(reason)
    return out



def why_not_traced(loss, params, z: np.ndarray, y: np.ndarray) -> str:  # type: ignore[no-untyped-def]
    """One line: the exception JAX raised tracing ``loss`` on one case (shapes only, nothing
    compiled), for the report of a loss that fell back to plain numpy calls."""
    import jax

    from .adapters._base import first_line

    yt = jax.ShapeDtypeStruct(y.shape, "float32" if np.issubdtype(y.dtype, np.floating) else "int32")
    try:
        with jax.enable_x64(False):
            jax.eval_shape(lambda a, b: loss(a, b, **params), jax.ShapeDtypeStruct(z.shape, "float32"), yt)
    except Exception as exc:  # the loss's own exception, reported in one line
        return first_line(exc)
    return "it traced, but its output was not a JAX array"
