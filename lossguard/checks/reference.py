"""``reference``: value and gradient equal the declared registry loss, in float64.

For every case of the battery (random and extreme-ladder cases of each shape), the loss's value
and gradient are compared with the registry reference's float64 value and hand-derived gradient,
with the same parameters, ignore label and reduction. The allowance is the rounding-error model
of :mod:`lossguard.tolerance` evaluated in the dtype the loss actually computed in.
"""

from __future__ import annotations

import time

import numpy as np

from ..evaluate import NoGradient
from .._cancelling import with_target_term
from ..references import evaluate_reference, get_reference
from ..result import CheckResult
from ..tolerance import op_count, rounding_allowance
from ._base import Check, Context, planned
from ._compare import examples_from, mismatch, over_allowance

__all__ = ["CHECK", "reference_stack_values", "case_scale", "gradient_term_scale"]


def case_scale(ctx: Context, predictions: np.ndarray) -> np.ndarray:
    """S per case: the largest |logit| (1 for probability inputs, whose values do not cancel)."""
    k = predictions.shape[0]
    if ctx.spec.inputs == "probabilities":
        return np.ones(k)
    flat = predictions.reshape(k, -1)
    return np.maximum(flat.max(axis=1), -flat.min(axis=1))  # max |z| without a |z| temporary


def gradient_term_scale(ctx: Context, targets: np.ndarray) -> np.ndarray:
    """G per case: the size of the gradient terms that cancel (p and y, scaled by the reduction).

    For a mean that is 1/N_eff (examples not ignored), times the spread of per-class parameters
    (largest over smallest), which scale individual rows; 1 for a sum or per-example output.
    """
    k = targets.shape[0]
    if ctx.evaluator.reduction != "mean":
        g = np.ones(k)
    elif ctx.spec.kind == "categorical" and ctx.spec.ignore_label is not None:
        g = 1.0 / np.maximum(np.sum(targets != ctx.spec.ignore_label, axis=1), 1)
    else:
        g = np.full(k, 1.0 / int(np.prod(targets.shape[1:2] if ctx.spec.kind != "binary" else targets.shape[1:])))
    for v in ctx.spec.params.values():
        if isinstance(v, (list, tuple)) and len(v) > 1:
            arr = np.abs(np.asarray(v, dtype=np.float64))
            if np.min(arr) > 0:
                g = g * float(np.max(arr) / np.min(arr))
    return g


def reference_stack_values(
    ctx: Context, predictions: np.ndarray, targets: np.ndarray, cotangent: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """The reference's float64 (values, gradients) for each case of a stack."""
    spec = ctx.spec
    ref = get_reference(spec.reference or "")
    vals, grads = [], []
    for k in range(predictions.shape[0]):
        with np.errstate(all="ignore"):  # a true gradient may overflow (−a/p at p ≈ 0): inf is the answer
            v, g = evaluate_reference(
                ref, predictions[k], targets[k], inputs=spec.inputs, ignore_label=spec.ignore_label,
                reduction=ctx.evaluator.reduction, params=dict(spec.params),
                cotangent=None if cotangent is None else cotangent[k],
            )
        vals.append(v)
        grads.append(g)
    return np.stack(vals), np.stack(grads)


def _run(ctx: Context) -> CheckResult:
    t0 = time.perf_counter()
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
        exp_v, exp_g = reference_stack_values(ctx, stack.predictions, stack.targets)
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
        verdict = "fail"
    else:
        summary = (f"{what} equal reference {spec.reference!r} on {total} cases "
                   f"(largest error {max_ratio:.2g} of its allowance)")
        verdict = "pass"
    return CheckResult(
        name="reference", verdict=verdict, summary=summary, cases=total, failed=failed,
        allowance="; ".join(sorted(rules)), worst=worst[:3],
        hint=("the loss and the reference disagree: a different formula, parameter convention or "
              "reduction, or an unstable evaluation at the extreme cases shown"),
        details={"max_abs_error": max_abs, "max_rel_error": max_rel, "max_error_over_allowance": max_ratio, "gradient_checked": grad_checked},
        seconds=time.perf_counter() - t0,
    )


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
