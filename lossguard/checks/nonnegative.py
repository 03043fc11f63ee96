"""``nonnegative``: the loss is never below zero (beyond rounding).

Notation and shapes: ``v`` the loss of a case (a scalar, or per-example values (N,) / the binary
predictions' shape); u the unit roundoff of the dtype the loss computed in.

Formula: every loss in the registry is a divergence or a negative log-probability, ℓ ≥ 0, with
ℓ = 0 only at a perfect prediction. A loss that goes negative usually subtracts a constant or an
entropy term that does not belong (ℓ − log C, −y log y without its partner), or has a sign error.

When it runs by default: when the declared reference is nonnegative (all current ones are), or
when no reference is declared (classification losses nearly always are; a loss that is not by
design, such as a log-likelihood ratio or a loss with a negative offset, skips it). A reference
not known to be nonnegative makes it optional (``expect``).

Error model: a correct evaluation may round a true 0 to −γ_n (|v| + max|z|) (the cancellation in
log-sum-exp(z) − z_y involves numbers of size max|z|), so the test is v ≥ −γ_n (|v| + max|z|)
per :mod:`lossguard.tolerance`, in float64 and (except at effort "quick") float32, the latter at
the shapes of ``ctx.cells_for("float32")``. Non-finite values are not judged (the ``finite``
check's job), except −inf, which is below zero.

Example:
    >>> import jax, jax.numpy as jnp
    >>> from lossguard import declare, run
    >>> def ce_minus_log_c(z, y):  # "normalised" cross-entropy: negative when confident
    ...     nll = jax.nn.logsumexp(z, -1) - jnp.take_along_axis(z, y[:, None], -1)[:, 0]
    ...     return (nll - jnp.log(z.shape[-1])).mean()
    >>> result = run(declare(ce_minus_log_c, kind="categorical"), effort="quick", only=["nonnegative"])
    >>> result.check("nonnegative").verdict
    'fail'
"""

from __future__ import annotations

import numpy as np

from ._property import Part, Tally, value_and_grad
from ..cases import CaseStack, Cell
from ..references import get_reference
from ..result import CheckResult, Example
from ..spec import LossSpec
from ..tolerance import op_count, rounding_allowance
from ._base import Check, Context, planned
from ._compare import replay
from ._scales import case_scale

__all__ = ["CHECK", "nonnegative_parts"]


HINT = (
    "the loss went below zero: a constant or entropy term subtracted (ℓ − log C, a KL written "
    "without its y·log y partner), a sign error, or a clamp that shifts the value. A loss that is "
    "not nonnegative by design (a log-likelihood ratio, a loss with a deliberate offset) may skip "
    "nonnegative"
)


def _dtypes(ctx: Context) -> tuple[str, ...]:
    return ctx.effort.nonnegative_dtypes  # quick skips float32 to save a compilation


def _dtypes_at(ctx: Context, cell: Cell) -> tuple[str, ...]:
    """The dtypes judged at ``cell``: float32 only at the shapes it is compiled for (``cells_for``)."""
    return tuple(d for d in _dtypes(ctx) if cell in ctx.cells_for(d))


def nonnegative_parts(ctx: Context, stack: CaseStack) -> tuple[list[Part], np.ndarray]:
    """v ≥ −allowance for each dtype; also which cases had a non-finite value (not judged)."""
    spec = ctx.spec
    k, cell = len(stack), stack.cell
    s = case_scale(ctx, stack.predictions)
    n_ops = op_count(cell.n, cell.c or cell.d or 1)
    parts, unjudged = [], np.zeros(k, bool)
    for dtype in _dtypes_at(ctx, cell):
        v, _ = value_and_grad(ctx, stack, dtype)
        a = rounding_allowance(v, s, dtype=ctx.evaluator.computed_dtype(dtype), n_ops=n_ops)
        with np.errstate(invalid="ignore"):
            below = (v < -a.atol) & ~np.isnan(v)  # −inf counts, nan is left to the finite check
        bad = np.any(below.reshape(k, -1), axis=1)
        unjudged |= np.any(np.isnan(v).reshape(k, -1), axis=1)
        depth = np.where(below, -v / a.atol, 0.0).reshape(k, -1).max(axis=1)
        ratio = np.where(np.isfinite(v), np.maximum(-v, 0.0) / a.atol, 0.0).reshape(k, -1).max(axis=1)
        what = f"value in {dtype}"

        def examples(most: int, v=v, bad=bad, a=a, depth=depth, what=what, dtype=dtype) -> list[Example]:
            out = []
            for i in np.flatnonzero(bad)[np.argsort(-depth[bad], kind="stable")][:most]:
                worst = float(np.min(v[i]))
                out.append(Example(
                    what=what, predictions=stack.predictions[i], targets=stack.targets[i], got=v[i],
                    expected=">= 0", abs_err=-worst, allowance=float(np.max(a.atol[i])), note=stack.note(int(i)),
                    replay=replay(spec, stack.predictions[i], stack.targets[i], dtype) + "\n# expected a value >= 0",
                ))
            return out

        parts.append(Part(what, bad, np.where(bad, depth, ratio), "v >= -" + a.rule, examples))
    return parts, unjudged


def _run(ctx: Context) -> CheckResult:
    tally = Tally("nonnegative")
    tally.sweep(ctx, lambda cell, stack: nonnegative_parts(ctx, stack), lambda one: nonnegative_parts(ctx, one)[0])
    return tally.result(
        passed=f"value >= 0 (within rounding) in {' and '.join(_dtypes(ctx))}",
        failed="the loss went below zero", hint=HINT,
    )


def _default(spec: LossSpec) -> bool:
    return spec.reference is None or "nonnegative" in get_reference(spec.reference).properties


CHECK = Check(
    name="nonnegative",
    summary="the value is never below zero beyond rounding (by default unless the reference is not nonnegative)",
    run=_run,
    default=_default,
    skip_hint="legitimate for a loss that is not nonnegative by design (a likelihood ratio, a deliberate offset)",
    order=38,
    compiles=lambda ctx: planned(_dtypes(ctx))(ctx),
)
