"""``finite``: value and gradient stay finite over the extreme-logit ladder.

Every ladder case (confidently right and wrong, ties, one huge logit, rows of mixed scale, at
magnitudes from 0 to 1e4) and the random cases are evaluated in float32 and float64. A non-finite
value or gradient is a failure wherever the true value is finite and representable in the dtype:
an ``inf`` where the exact loss itself is infinite (a probability input of exactly 0 on the
target class) is not a bug. The true value comes from the declared reference in float64 when
there is one; otherwise logits losses are expected finite everywhere, and probability losses
wherever no prediction is exactly 0 or 1.
"""

from __future__ import annotations

import time

import numpy as np

from ..cases import CaseStack
from ..evaluate import NoGradient
from ..ladders import largest_finite
from ..result import CheckResult, Example
from ..tolerance import dtype_of
from ._base import Check, Context
from ._compare import replay

__all__ = ["CHECK", "expected_finite"]

DTYPES_CHECKED = ("float32", "float64")


def expected_finite(ctx: Context, stack: CaseStack, dtype: str) -> tuple[np.ndarray, np.ndarray]:
    """Per case: (true value finite and representable, true gradient finite and representable)."""
    k = len(stack)
    top = largest_finite(dtype)
    z = stack.predictions.astype(dtype_of(dtype)).astype(np.float64)
    if ctx.spec.reference is not None:
        from .reference import reference_stack_values

        with np.errstate(all="ignore"):
            v, g = reference_stack_values(ctx, z, stack.targets)
        v_ok = np.all((np.abs(v) <= top).reshape(k, -1), axis=1)
        g_ok = np.all((np.abs(g) <= top).reshape(k, -1), axis=1)
        return v_ok, g_ok
    if ctx.spec.inputs == "probabilities":
        edge = np.any(((z == 0.0) | (z == 1.0)).reshape(k, -1), axis=1)
        return ~edge, ~edge
    return np.ones(k, bool), np.ones(k, bool)


def _run(ctx: Context) -> CheckResult:
    t0 = time.perf_counter()
    spec, ev = ctx.spec, ctx.evaluator
    total = failed = 0
    worst: list[Example] = []
    exempt = 0
    saw_grad = False
    for dtype in DTYPES_CHECKED:
        for cell in ctx.cells:
            stack = ctx.standard_cases(cell)
            try:
                vals, grads = ev.value_and_grad(stack, dtype)
            except NoGradient:
                vals, grads = ev.values(stack, dtype), None
            v_ok, g_ok = expected_finite(ctx, stack, dtype)
            k = len(stack)
            v_fin = np.all(np.isfinite(vals.reshape(k, -1)), axis=1)
            bad_v = v_ok & ~v_fin
            bad = bad_v.copy()
            if grads is not None:
                saw_grad = True
                g_fin = np.all(np.isfinite(grads.reshape(k, -1)), axis=1)
                bad |= g_ok & ~g_fin
            exempt += int(np.sum(~v_ok))
            total += k
            failed += int(bad.sum())
            for i in np.flatnonzero(bad)[:2]:
                which = "value" if bad_v[i] else "gradient"
                worst.append(Example(
                    what=f"{which} in {dtype}",
                    predictions=stack.predictions[i], targets=stack.targets[i],
                    got=vals[i] if which == "value" else grads[i],  # type: ignore[index]
                    expected="finite (the true value is finite and representable in " + dtype + ")",
                    abs_err=float("inf"), note=stack.note(int(i)),
                    replay=replay(spec, stack.predictions[i], stack.targets[i], dtype),
                ))
    worst.sort(key=lambda e: 0 if "float64" in e.what else 1)
    verdict = "fail" if failed else "pass"
    summary = (f"non-finite value or gradient on {failed} of {total} cases where the true value is finite"
               if failed else f"finite {'value and gradient' if saw_grad else 'value (no gradient oracle)'}"
               f" on all {total} cases (float32, float64)")
    return CheckResult(
        name="finite", verdict=verdict, summary=summary, cases=total, failed=failed,
        allowance="exact: finite wherever the true value is finite and representable",
        worst=worst[:3],
        hint=("an intermediate overflowed or a log met 0: use log-sum-exp with max subtraction, "
              "log_softmax, log σ(x) = −softplus(−x), and where-guards that keep both branches finite"),
        details={"cases_where_true_value_not_representable": exempt},
        seconds=time.perf_counter() - t0,
    )


CHECK = Check(
    name="finite",
    summary="value and gradient finite over an extreme-logit ladder wherever the true value is",
    run=_run,
    skip_hint="never legitimately skipped for a loss used in training",
    order=20,
)
