"""``inputs-intact``: the loss leaves the arrays it was given as they were.

Notation and shapes: a few cases (z, y) of the menu's first shape, float64, each passed to one
plain call of the loss in its own framework's arrays (numpy arrays, torch tensors, JAX arrays
made from host buffers), as a training loop passes them.

Procedure: every call is wrapped (:class:`lossguard._guard.Guard`): before it, the predictions
and targets are copied on the host; after it, compared with the copies element by element (nan
equal to nan). Any element that differs is a failure: a loss that writes into its inputs
(``z -= z.max(axis=-1, keepdims=True)``, an in-place softmax, labels overwritten) hands the
caller back different logits or labels, which the rest of a training step then uses silently.

Error model: none — an input is either unchanged or not. JAX arrays cannot be written in place,
so a JAX loss passes by construction unless it writes through a host buffer.

Example:
    >>> import numpy as np
    >>> from lossguard import declare, run
    >>> def shifts(z, y):   # the row-max shift done in place
    ...     z -= z.max(axis=-1, keepdims=True)
    ...     return float(np.mean(np.log(np.exp(z).sum(-1)) - z[np.arange(len(y)), y]))
    >>> run(declare(shifts, kind="categorical"), effort="quick", only=["inputs-intact"]).check("inputs-intact").verdict
    'fail'
"""

from __future__ import annotations

from ..result import CheckResult, Example
from ._base import EAGER_DTYPE, Check, Context, conclude
from ._compare import replay

__all__ = ["CHECK", "CASES"]

#: Cases called (random ones first, then the ladder's last: extreme values change most).
CASES = 3

HINT = (
    "the loss wrote into an input array: whoever called it (the training step, a metric after it) "
    "now sees changed logits or labels. Work on a copy (z = z - z.max(axis=-1, keepdims=True), not "
    "z -= …; no out= into an input; no in-place tensor methods such as sub_). Skipping is "
    "legitimate only if no caller ever reuses the arrays it passes"
)


def _run(ctx: Context) -> CheckResult:
    ev, spec = ctx.evaluator, ctx.spec
    stack = ctx.standard_cases(ctx.eager_cell)
    picks = sorted({*range(min(CASES - 1, len(stack))), len(stack) - 1})
    worst: list[Example] = []
    failed = 0
    for i in picks:
        with ev.guard.watching() as changes:
            ev.values(stack.take([i]), EAGER_DTYPE, eager=True)
        if not changes:
            continue
        failed += 1
        for ch in changes[:1]:
            worst.append(Example(
                what=f"{ch.argument} changed in place", predictions=stack.predictions[i],
                targets=stack.targets[i],
                got=f"{ch.changed} of {ch.size} elements changed (largest change {ch.largest:.3g})",
                expected=f"the {ch.argument} unchanged", note=stack.note(i),
                replay=replay(spec, stack.predictions[i], stack.targets[i], EAGER_DTYPE)
                + "\n# then compare the arrays you passed with copies taken before the call"))
    what = f"predictions and targets unchanged by a plain call ({ev.adapter.name} arrays, {EAGER_DTYPE})"
    args = " and ".join(sorted({w.what.split()[0] for w in worst}))
    summary = (f"the loss changed its {args} in place on {failed} of {len(picks)} cases; expected {what}" if failed
               else f"{what} on {len(picks)} cases")
    return conclude(CHECK.name, summary=summary, cases=len(picks), failed=failed,
                    allowance="none: any changed element fails", worst=worst, hint=HINT, details={"cases": picks})


CHECK = Check(
    name="inputs-intact",
    summary="the loss leaves its input arrays (predictions, targets) unchanged",
    run=_run,
    skip_hint=HINT,
    order=39,
)
