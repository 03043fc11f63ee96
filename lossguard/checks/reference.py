"""``reference``: value and gradient equal the declared registry loss, in float64.

For every case of the battery (random and extreme-ladder cases of each shape), the loss's value
and gradient are compared with the registry reference's float64 value and hand-derived gradient,
with the same parameters, ignore label and reduction. The allowance is the rounding-error model
of :mod:`lossguard.tolerance` evaluated in the dtype the loss actually computed in.
"""

from __future__ import annotations

import numpy as np

from ..evaluate import NoGradient
from .._cancelling import with_target_term
from ..result import CheckResult
from ..tolerance import op_count, rounding_allowance
from ._base import Check, Context, conclude, planned
from ._compare import examples_from, mismatch, over_allowance
from ._reference_batch import reference_batch
from ._scales import case_scale, gradient_term_scale

__all__ = ["CHECK"]


HINT = ("the loss and the reference disagree: a different formula, parameter convention or "
        "reduction, or an unstable evaluation at the extreme cases shown")


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
        if grad_checked:
            try:
                got_v, got_g = ev.value_and_grad(stack, "float64")
            except NoGradient:
                grad_checked = False
        if not grad_checked:
            got_v = ev.values(stack, "float64")
        exp_v, exp_g = reference_batch(ctx, stack.predictions, stack.targets)
        scale = case_scale(ctx, stack.predictions)
        n = op_count(cell.n, cell.c or cell.d or 1)
        dtype = ev.computed_dtype("float64")
        scale_v, extra = with_target_term(scale, stack.targets, spec.kind)  # KL's Σ y log y cancels
        a_v = rounding_allowance(exp_v, scale_v, dtype=dtype, n_ops=n)
        m_v = mismatch(got_v, exp_v, a_v.atol)
        bad = m_v.case_bad.copy()
        rules.add("value: " + a_v.rule + extra)
        found = examples_from(m_v, spec, stack, "value")
        max_abs, max_rel = max(max_abs, m_v.max_abs()), max(max_rel, m_v.max_rel())
        max_ratio = max(max_ratio, float(np.max(m_v.case_ratio)))
        if grad_checked:
            a_g = rounding_allowance(exp_g, scale, dtype=dtype, n_ops=n, normwise=True,
                                     grad_scale=gradient_term_scale(ctx, stack.targets))
            m_g = mismatch(got_g, exp_g, a_g.atol)
            bad |= m_g.case_bad
            max_ratio = max(max_ratio, float(np.max(m_g.case_ratio)))
            rules.add("gradient: " + a_g.rule)
            found += examples_from(m_g, spec, stack, "gradient")
        total += len(stack)
        failed += int(bad.sum())
        worst += found
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
)
