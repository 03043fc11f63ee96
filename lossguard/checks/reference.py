"""``reference``: value and gradient equal the declared registry loss, in float64.

For every case of the battery (random and extreme-ladder cases of each shape), the loss's value
and gradient are compared with the registry reference's float64 value and hand-derived gradient,
with the same parameters, ignore label and reduction. The allowance is the rounding-error model
of :mod:`lossguard.tolerance` evaluated in the dtype the loss actually computed in.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..evaluate import NoGradient
from .._cancelling import with_target_term
from ..cases import CaseStack
from ..result import CheckResult, Example
from ..tolerance import op_count, rounding_allowance
from ._base import Check, Context, Judged, conclude, planned
from ._compare import Mismatch, examples_from, mismatch, over_allowance
from ._reference_batch import reference_batch
from ._scales import case_scale, gradient_term_scale

__all__ = ["CHECK"]


HINT = ("the loss and the reference disagree: a different formula, parameter convention or "
        "reduction, or an unstable evaluation at the extreme cases shown")


@dataclass
class _Stack:
    """One stack compared with the reference: failing cases, both mismatches, the rules."""

    bad: np.ndarray
    m_v: Mismatch
    m_g: Mismatch | None
    rules: list[str]


def _judge(ctx: Context, stack: CaseStack, grad_checked: bool) -> _Stack:
    """Value (and gradient, when ``grad_checked``) of ``stack`` against the reference in float64."""
    ev = ctx.evaluator
    if grad_checked:
        got_v, got_g = ev.value_and_grad(stack, "float64")
    else:
        got_v = ev.values(stack, "float64")
    exp_v, exp_g = reference_batch(ctx, stack.predictions, stack.targets)
    scale = case_scale(ctx, stack.predictions)
    cell = stack.cell
    n = op_count(cell.n, cell.c or cell.d or 1)
    dtype = ev.computed_dtype("float64")
    scale_v, extra = with_target_term(scale, stack.targets, ctx.spec.kind)  # KL's Σ y log y cancels
    a_v = rounding_allowance(exp_v, scale_v, dtype=dtype, n_ops=n)
    m_v = mismatch(got_v, exp_v, a_v.atol)
    out = _Stack(m_v.case_bad.copy(), m_v, None, ["value: " + a_v.rule + extra])
    if grad_checked:
        a_g = rounding_allowance(exp_g, scale, dtype=dtype, n_ops=n, normwise=True,
                                 grad_scale=gradient_term_scale(ctx, stack.targets))
        out.m_g = mismatch(got_g, exp_g, a_g.atol)
        out.bad |= out.m_g.case_bad
        out.rules.append("gradient: " + a_g.rule)
    return out


def _run(ctx: Context) -> CheckResult:
    spec, ev = ctx.spec, ctx.evaluator
    total = failed = 0
    worst = []
    rules: set[str] = set()
    max_abs = max_rel = 0.0
    max_ratio = 0.0
    grad_checked = ev.has_gradient
    for cell in ctx.cells:
        stack = ctx.standard_cases(cell)
        try:
            j = _judge(ctx, stack, grad_checked)
        except NoGradient:
            grad_checked = False
            j = _judge(ctx, stack, grad_checked)
        rules.update(j.rules)
        worst += examples_from(j.m_v, spec, stack, "value")
        max_abs, max_rel = max(max_abs, j.m_v.max_abs()), max(max_rel, j.m_v.max_rel())
        max_ratio = max(max_ratio, float(np.max(j.m_v.case_ratio)))
        if j.m_g is not None:
            max_ratio = max(max_ratio, float(np.max(j.m_g.case_ratio)))
            worst += examples_from(j.m_g, spec, stack, "gradient")
        total += len(stack)
        failed += int(j.bad.sum())
    worst.sort(key=lambda e: -(e.abs_err / e.allowance if e.allowance > 0 else np.inf))
    what = "value and gradient" if grad_checked else "value (no gradient oracle)"
    if failed:
        summary = (f"{what} differ from reference {spec.reference!r} on {failed} of {total} cases; "
                   f"the worst is {over_allowance(max_ratio)}")
    else:
        summary = (f"{what} equal reference {spec.reference!r} on {total} cases "
                   f"(largest error {max_ratio:.2g} of its allowance)")
    return conclude("reference", summary=summary, cases=total, failed=failed, allowance="; ".join(sorted(rules)),
                    worst=worst, hint=HINT, details={"max_abs_error": max_abs, "max_rel_error": max_rel,
                                                     "max_error_over_allowance": max_ratio,
                                                     "gradient_checked": grad_checked})


def _still_fails(ctx: Context, example: Example, stack: CaseStack) -> Judged:
    """The same comparison on cut-down cases: the example's quantity (value or gradient) differs."""
    what = "gradient" if example.what.startswith("gradient") else "value"
    j = _judge(ctx, stack, what == "gradient")
    m = j.m_g if what == "gradient" and j.m_g is not None else j.m_v

    def one(k: int) -> Example:
        sub = Mismatch(m.got[k:k + 1], m.expected[k:k + 1], m.atol[k:k + 1])
        return examples_from(sub, ctx.spec, stack.take([k]), what, only_failed=False, most=1)[0]

    return Judged(m.case_bad, one)


def _applies(spec) -> str | None:  # type: ignore[no-untyped-def]
    return None if spec.reference else "no reference declared"


CHECK = Check(
    name="reference",
    summary="value and gradient equal the declared registry loss (float64, error-model tolerance)",
    run=_run,
    applies=_applies,
    skip_hint="skip only if the loss is meant to differ from the reference",
    order=10,
    compiles=planned(("float64",)),
    still_fails=_still_fails,
)
