"""``dtypes``: the same inputs in float16, bfloat16, float32 and float64 give consistent results.

Notation and shapes: one stack per shape of ``ctx.cells_for(dtype)`` (class axis last; below
float64 the menu's last shape unless the effort is thorough) — the extreme-logit ladder up to
|z| = 1e4, filled with the battery's random cases up to its compiled call size
(:func:`~lossguard.checks.finite.fill_to`) — moved onto values every dtype holds exactly
(:func:`~lossguard.ladders.common_grid`), so the dtypes see identical inputs and differ only in
their arithmetic. At large shapes the ladder is packed into few cases, rows taking the (pattern,
magnitude) pairs in turn, nearby magnitudes together (:func:`~lossguard.cases.ladder_stack`).

Formula: with v*, g* the oracle (the declared reference in float64 or, without one, the loss's
own float64 value and gradient at the same inputs), a result in dtype d passes when it is finite
wherever v* fits d (for a batch mean, with its sum held in float32 for float16 and bfloat16) and

    |v − v*| ≤ 2 γ_n (|v*| + S),   ‖g − g*‖∞ ≤ 2 γ_n (1 + S)(‖g*‖∞ + G),   γ_n = n u_d/(1 − n u_d)

(:func:`lossguard.tolerance.rounding_allowance`, with u_d the unit roundoff of the dtype the loss
computed in). A large batch (:data:`LARGE_BATCH` examples, each confidently wrong by 16 so its
loss is about 32) is run in float16 once: the sum of the per-example losses exceeds float16's
largest value 65504 while their mean does not, which exposes a mean taken as sum-then-divide in
float16. There the error model's bound is vacuous (γ_n = 1 for n > 2048), so finiteness is what
it tests.

References:
    N. J. Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., SIAM, 2002 (γ_n).
    IEEE 754-2008 (binary16); the bfloat16 format as implemented by ml_dtypes.
"""

from __future__ import annotations

import numpy as np

from ..cases import PATTERNS, CaseStack, Cell, concat, ladder_case_count, ladder_stack, to_inputs
from ..evaluate import NoGradient
from ..ladders import magnitudes
from ..result import CheckResult, Example
from ..tolerance import DTYPES, op_count, rounding_allowance
from .._cancelling import with_target_term
from .._range import Beyond, split_rungs
from ._base import Check, Context, conclude, planned, within
from ._compare import examples_from, mismatch
from ._extremes import fill_to, on_grid
from ._finite_oracle import own_float64, per_case_finite, reduced_fits
from ._reference_batch import reference_batch
from ._scales import case_scale, gradient_term_scale

__all__ = ["CHECK", "LARGE_BATCH", "check_dtypes", "common_stack", "large_batch"]

#: Examples in the large-batch case (per-example loss ≈ 32, so the sum ≈ 131072 > 65504).
LARGE_BATCH = 4096
BATCH_MARGIN = 16.0


def common_stack(ctx: Context, cell: Cell) -> CaseStack:
    """Ladder (|z| ≤ 1e4) and random cases on the grid shared by every dtype."""
    mags = magnitudes("float16")
    if ladder_case_count(cell, len(mags) * len(PATTERNS)) >= len(mags) * len(PATTERNS):
        ladder = ladder_stack(ctx.spec, cell, ctx.rng(f"dtypes ladder {cell}"), mags=mags,
                              domain=ctx.domain, dtypes=["float16"])
    else:  # packed: rungs inside and beyond the declared |logit| never share a case
        ladder = concat([ladder_stack(ctx.spec, cell, ctx.rng(f"dtypes ladder {cell}" + " beyond" * i), mags=part,
                                      domain=ctx.domain, dtypes=["float16"])
                         for i, part in enumerate(split_rungs(mags, ctx.spec.max_logit)) if part.size])
    return on_grid(fill_to(ladder, lambda: ctx.random_cases(cell)), DTYPES)


def large_batch(ctx: Context) -> CaseStack:
    """Two cases of :data:`LARGE_BATCH` examples: every one wrong by 16, and at random scale."""
    spec, cell0 = ctx.spec, ctx.cells[0]
    rng = ctx.rng("dtypes large batch")
    cell = Cell(LARGE_BATCH, cell0.c, None)
    if spec.kind == "binary":
        y = rng.integers(0, 2, size=(2, LARGE_BATCH)).astype(np.float64)
        z = np.stack([-(2 * y[0] - 1) * 2 * BATCH_MARGIN, rng.standard_normal(LARGE_BATCH) * 4])
    else:
        c = cell0.c or 2
        labels = rng.integers(0, c, size=(2, LARGE_BATCH))
        z = rng.standard_normal((2, LARGE_BATCH, c)) * 4
        idx = np.arange(LARGE_BATCH)
        z[0] = 0.0
        z[0, idx, labels[0]] = -BATCH_MARGIN  # −16 on the label, +16 on another class: loss ≈ 32
        z[0, idx, (labels[0] + 1) % c] = BATCH_MARGIN
        y = labels if spec.kind == "categorical" else np.eye(c)[labels]
    z = to_inputs(spec, z)
    notes = [f"large batch: {LARGE_BATCH} examples, each with loss ≈ {2 * BATCH_MARGIN:g} (sum > 65504)",
             f"large batch: {LARGE_BATCH} examples at random scale"]
    return on_grid(CaseStack(z, y, cell, notes), DTYPES)


def _oracle(ctx: Context, stack: CaseStack) -> tuple[np.ndarray, np.ndarray | None, str]:
    if ctx.spec.reference is not None:
        with np.errstate(all="ignore"):
            v, g = reference_batch(ctx, stack.predictions, stack.targets)
        return v, g, f"reference {ctx.spec.reference!r} in float64"
    v, g = own_float64(ctx, stack)
    return v, g, "the loss's own float64 value"


def _compare(ctx: Context, stack: CaseStack, dtype: str, exp_v: np.ndarray, exp_g: np.ndarray | None,
             beyond: Beyond | None = None) -> tuple[np.ndarray, list[Example], str]:
    """Per case failed?, the worst examples, and the rule used (cases whose true value does not
    fit the dtype are not judged; cases past the declared |logit| go to ``beyond``)."""
    ev, k = ctx.evaluator, len(stack)
    try:
        got_v, got_g = ev.value_and_grad(stack, dtype)
    except NoGradient:
        got_v, got_g = ev.values(stack, dtype), None
    comp = ev.computed_dtype(dtype)
    fits = reduced_fits(ctx, exp_v, k, dtype, stack.cell) & per_case_finite(exp_v, k)
    reach = ctx.reach(stack.predictions)
    inside = np.ones(k, bool) if beyond is None else beyond.inside(reach)
    scale = case_scale(ctx, stack.predictions)
    n = op_count(stack.cell.n, stack.cell.c or stack.cell.d or 1)
    scale_v, extra = with_target_term(scale, stack.targets, ctx.spec.kind)  # KL's Σ y log y cancels
    a_v = rounding_allowance(exp_v, scale_v, dtype=comp, n_ops=n)
    m_v = mismatch(got_v, exp_v, a_v.atol)
    m_v.case_bad &= fits
    broke = m_v.case_bad.copy()
    m_v.case_bad &= inside
    bad = m_v.case_bad.copy()
    found = examples_from(m_v, ctx.spec, stack, f"value in {dtype}", dtype=dtype)
    rule = f"value: {a_v.rule}{extra}"
    if got_g is not None and exp_g is not None:
        a_g = rounding_allowance(exp_g, scale, dtype=comp, n_ops=n, normwise=True,
                                 grad_scale=gradient_term_scale(ctx, stack.targets))
        m_g = mismatch(got_g, exp_g, a_g.atol)
        m_g.case_bad &= fits & per_case_finite(exp_g, k)
        broke |= m_g.case_bad
        m_g.case_bad &= inside
        bad |= m_g.case_bad
        found += examples_from(m_g, ctx.spec, stack, f"gradient in {dtype}", dtype=dtype)
        rule += f"; gradient: {a_g.rule}"
    if beyond is not None:
        beyond.add(dtype, reach, broke, ["beyond the error model"] * k)
    return bad, found, rule


def check_dtypes(ctx: Context, dtypes: tuple[str, ...] = DTYPES, large: bool = True) -> CheckResult:
    """The check on the given dtypes, with or without the float16 large batch."""
    spec = ctx.spec
    total = failed = 0
    per_dtype: dict[str, int] = {}
    worst: list[Example] = []
    rules: set[str] = set()
    oracle = ""
    low = tuple(d for d in ctx.judged_dtypes(dtypes) if spec.reference is not None or d != "float64")
    left_out = [d for d in dtypes if d not in ctx.judged_dtypes(dtypes)]
    large = large and "float16" in ctx.spec.dtypes
    beyond = ctx.beyond()
    if not low and not large:
        return CheckResult(name="dtypes", verdict="skip",
                           summary=(f"nothing to judge: no declared dtype below float64 "
                                    f"(dtypes={','.join(ctx.spec.dtypes)}) and no reference for float64"))
    for cell in ctx.cells:
        here = [d for d in low if cell in ctx.cells_for(d)]
        if not here:
            continue
        stack = common_stack(ctx, cell)
        exp_v, exp_g, oracle = _oracle(ctx, stack)
        for dtype in here:
            bad, found, rule = _compare(ctx, stack, dtype, exp_v, exp_g, beyond)
            rules.add(rule)
            total += int(beyond.inside(ctx.reach(stack.predictions)).sum())
            failed += int(bad.sum())
            per_dtype[dtype] = per_dtype.get(dtype, 0) + int(bad.sum())
            worst += found[:1]
    if large:
        big = large_batch(ctx)
        big_v, big_g, _ = _oracle(ctx, big)
        bad, found, _ = _compare(ctx, big, "float16", big_v, big_g)
        total += len(big)
        failed += int(bad.sum())
        per_dtype["float16 large batch"] = int(bad.sum())
        worst = found[:1] + worst if bad.any() else worst
    if failed:
        counts = ", ".join(f"{d} {n}" for d, n in per_dtype.items() if n)
        summary = (f"results beyond the dtype's error model on {failed} of {total} cases ({counts}); "
                   f"first: {worst[0].what} [{worst[0].note}]")
    else:
        summary = (f"{', '.join(low)} agree with {oracle} on {total} cases{within(ctx)}"
                   + (f", including a {LARGE_BATCH}-example batch in float16" if large else ""))
    if left_out:
        summary += f"; {', '.join(left_out)} not declared (dtypes=), not tried"
    if beyond.note("within the error model"):
        summary += "; " + beyond.note("within the error model")
    only64 = failed and all(d == "float64" for d, n in per_dtype.items() if n)
    return conclude("dtypes", summary=summary, cases=total, failed=failed,
                    allowance=f"oracle: {oracle}; " + "; ".join(sorted(rules)), worst=worst, most=4,
                    hint=_HINT_FLOAT64 if only64 else _HINT_LOW,
                    details={"failed_per_dtype": per_dtype, "large_batch": LARGE_BATCH,
                             "beyond_range": beyond.to_dict()})


_HINT_LOW = ("low precision broke where float64 did not: accumulate sums in float32 (jnp.mean does), "
             "keep clipping constants representable in the dtype (1 − 1e-7 is 1 in bfloat16), and "
             "work in log space")
_HINT_FLOAT64 = ("float64 itself is off the reference by more than rounding explains: a formula that "
                 "differs from the reference by a small term, constants held in float32 inside a float64 "
                 "call, or a convention that differs (declare the reference the loss really implements)")


def _run(ctx: Context) -> CheckResult:
    return check_dtypes(ctx)


def _compiles(ctx: Context) -> list[tuple[str, str, Cell]]:
    """The shapes of the common stacks in every dtype, and the large batch in float16."""
    c0 = ctx.cells[0]
    big = [("vg", "float16", Cell(LARGE_BATCH, c0.c, None))] if "float16" in ctx.spec.dtypes else []
    return planned(DTYPES)(ctx) + big


CHECK = Check(
    name="dtypes",
    summary="float16, bfloat16, float32 agree with float64 within the dtype's error model, large batch included",
    run=_run,
    skip_hint="skip only if the loss never runs below float32",
    order=40,
    compiles=_compiles,
)
