"""``finite``: value and gradient stay finite over extreme inputs, in every float dtype.

Notation and shapes: stacks of K cases of one menu shape (class axis last, see
:mod:`lossguard.cases`). For each dtype of :data:`~lossguard.tolerance.DTYPES` and each shape of
``ctx.cells_for(dtype)`` the check builds one stack, rounded to that dtype:

- the extreme-logit ladder of :func:`~lossguard.ladders.wide_magnitudes`: magnitudes 0, 1e-3 …
  1e4 on to the dtype's largest finite value, in rows confidently right, confidently wrong, all
  equal, with one huge logit, and of very different scales in one batch;
- for probability inputs, the exact endpoints 0 and 1 and the values just inside them that the
  dtype holds (:func:`~lossguard.ladders.probability_edges`);
- targets hard and soft (binary), one-hot and with exact zeros (distribution), as drawn by
  :func:`~lossguard.cases.draw_targets`; the battery's random cases fill the stack up to its
  compiled call size (:func:`fill_to`).

At the menu's shapes every (pattern, magnitude) pair is a case of its own. Once a case is large
(:func:`~lossguard._budget.case_count`; a (4096, 1000) case holds 4096 rows) the pairs are
packed (:func:`~lossguard.cases.ladder_stack` with ``order="loss"``), :data:`LEAST_CASES` cases
per dtype at the largest shapes: the pairs whose loss, or whose share of a batch sum, may
overflow the dtype (:func:`~lossguard.checks._extremes.overflow_bound`: confidently wrong at the
top of the range, a huge logit near it) share one case, exempt as a whole where its true value
does not fit; the others, ordered by the size of their loss, fill the rest and are judged at
every magnitude. Every pair still appears; packing gives up naming one pair per failing case.

A non-finite value (gradient) fails wherever the true value (gradient) is finite and
representable in the dtype; which ones are is decided by the finiteness oracle
(:mod:`lossguard.checks._finite_oracle`, rules 1–4), consulted only for the cases whose value or
gradient came out non-finite.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..cases import CaseStack
from ..evaluate import NoGradient
from ..result import CheckResult, Example
from ..tolerance import DTYPES
from ._base import Check, Context, Judged, conclude, planned, within
from ._compare import replay
from ._extremes import ACCUMULATOR, LEAST_CASES, STACK_SIZE, extreme_stack, fill_to, on_grid
from ._finite_oracle import (ASSUMED_FINITE_UP_TO, Need, Outcome, expected_finite, finite_oracle, own_float64,
                             per_case_finite, reduced_fits)
from ._reference_batch import reference_batch, reference_rows

__all__ = ["CHECK", "STACK_SIZE", "ASSUMED_FINITE_UP_TO", "ACCUMULATOR", "Need", "expected_finite",
           "finite_oracle", "check_finite", "extreme_stack", "fill_to", "on_grid", "own_float64",
           "per_case_finite", "reduced_fits", "reference_batch", "reference_rows", "LEAST_CASES"]

DTYPES_CHECKED = DTYPES


HINT = ("an intermediate overflowed or a log met 0: use log-sum-exp with max subtraction, "
        "log_softmax, log σ(x) = −softplus(−x), and where-guards that keep both branches finite")


@dataclass
class _Judged(Outcome):
    """One stack in one dtype: outputs, which cases failed (value, or either), oracle bookkeeping
    (per case: not judged, judged but its true value not representable)."""

    rules: set[str] = field(default_factory=set)
    unjudged: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))
    exempt: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))

    def example(self, i: int) -> Example:
        s, d = self.stack, self.dtype
        which = "value" if self.bad_v[i] else "gradient"
        return Example(what=f"{which} in {d}", predictions=s.predictions[i], targets=s.targets[i],
                       got=self.vals[i] if which == "value" else self.grads[i],  # type: ignore[index]
                       expected=f"finite (the true {which} is finite and representable in {d})",
                       abs_err=float("inf"), note=s.note(i), dtype=d,
                       replay=replay(self.spec, s.predictions[i], s.targets[i], d))


def _judge(ctx: Context, stack: CaseStack, dtype: str) -> _Judged:
    """Evaluate ``stack`` (rounded to ``dtype``) and ask the oracle about its non-finite cases."""
    ev = ctx.evaluator
    try:
        vals, grads = ev.value_and_grad(stack, dtype)
    except NoGradient:
        vals, grads = ev.values(stack, dtype), None
    k = len(stack)
    fin_v, fin_g = per_case_finite(vals, k), per_case_finite(grads, k)
    # a finite result needs no oracle: ask it only about the cases that came out non-finite
    idx = np.flatnonzero(~(fin_v & fin_g))
    bad_v, bad = np.zeros(k, bool), np.zeros(k, bool)
    j = _Judged(ctx.spec, stack, dtype, vals, grads, bad_v, bad, set(), np.zeros(k, bool), np.zeros(k, bool))
    if idx.size:
        need = finite_oracle(ctx, stack.take(idx), dtype)
        j.rules |= need.rules
        bad_v[idx] = need.value & ~fin_v[idx]
        bad[idx] = bad_v[idx] | (need.grad & ~fin_g[idx])
        j.unjudged[idx] = ~need.judged
        j.exempt[idx] = need.judged & ~need.value
    return j


def _still_fails(ctx: Context, example: Example, stack: CaseStack) -> Judged:
    """The same dtype, the same oracle, inside the declared range: is a value or gradient still
    non-finite where it must not be?"""
    j = _judge(ctx, stack, example.dtype)
    return Judged(j.bad & ctx.beyond().inside(ctx.reach(stack.predictions)), j.example)


def check_finite(ctx: Context, dtypes: tuple[str, ...] = DTYPES_CHECKED) -> CheckResult:
    """The check on the given dtypes (the battery uses all four; tests may name one)."""
    ev = ctx.evaluator
    total = failed = unjudged = exempt = 0
    per_dtype: dict[str, int] = {}
    found: dict[str, list[Example]] = {}
    rules: set[str] = set()
    saw_grad = ev.has_gradient
    beyond = ctx.beyond()
    left_out = [d for d in dtypes if d not in ctx.judged_dtypes(dtypes)]
    dtypes = ctx.judged_dtypes(dtypes)
    for dtype in dtypes:
        for cell in ctx.cells_for(dtype):
            stack = extreme_stack(ctx, cell, dtype)
            j = _judge(ctx, stack, dtype)
            saw_grad &= j.grads is not None
            rules |= j.rules
            vals, grads, bad_v, bad, k = j.vals, j.grads, j.bad_v, j.bad, len(stack)
            inside = beyond.inside(ctx.reach(stack.predictions))
            unjudged += int((j.unjudged & inside).sum())
            exempt += int((j.exempt & inside).sum())
            # past the declared |logit| a break is information, not a failure
            beyond.add(dtype, ctx.reach(stack.predictions), bad,
                       [_cause(vals[i], None if grads is None else grads[i], bad_v[i]) if bad[i] else ""
                        for i in range(k)])
            bad_v &= inside
            bad &= inside
            total += int(inside.sum())
            failed += int(bad.sum())
            per_dtype[dtype] = per_dtype.get(dtype, 0) + int(bad.sum())
            for i in np.flatnonzero(bad)[:1]:
                found.setdefault(dtype, []).append(j.example(int(i)))
    order = ("float64", "float32", "bfloat16", "float16")
    worst = [e for d in order for e in found.get(d, [])]
    what = "value and gradient" if saw_grad else "value (no gradient oracle)"
    if failed:
        counts = ", ".join(f"{d} {n}" for d, n in per_dtype.items() if n)
        first = worst[0]
        summary = (f"non-finite {what} on {failed} of {total} cases where the true value is finite and "
                   f"representable ({counts}); first: {first.what} at {first.note}")
    else:
        summary = f"finite {what} on all {total - unjudged} judged cases ({', '.join(dtypes)}{within(ctx)})"
    if unjudged:
        summary += f"; {unjudged} cases had no oracle (declare a reference to judge them)"
    if left_out:
        summary += f"; {', '.join(left_out)} not declared (dtypes=), not tried"
    if beyond.note():
        summary += "; " + beyond.note()
    allowance = ("exact: finite wherever the true value is finite and representable; "
                 + ("; ".join(sorted(rules)) or "every result was finite, so no oracle was consulted"))
    return conclude("finite", summary=summary, cases=total, failed=failed, judged=total - unjudged,
                    allowance=allowance, worst=worst, most=4, hint=HINT,
                    details={"failed_per_dtype": per_dtype, "cases_without_oracle": unjudged,
                             "cases_where_true_value_not_representable": exempt, "beyond_range": beyond.to_dict()})


def _cause(value: np.ndarray, grad: np.ndarray | None, in_value: bool) -> str:
    """What came out non-finite, in a few words: "value is inf", "gradient has nan"."""
    a = np.asarray(value if in_value or grad is None else grad, dtype=np.float64)
    kind = "nan" if np.isnan(a).any() else "inf"
    return f"value is {kind}" if in_value else f"gradient has {kind}"


def _run(ctx: Context) -> CheckResult:
    return check_finite(ctx)


CHECK = Check(
    name="finite",
    summary="value and gradient finite over extreme logits and probabilities, in every float dtype",
    run=_run,
    skip_hint="never legitimately skipped for a loss used in training",
    order=20,
    compiles=planned(DTYPES),
    still_fails=_still_fails,
)
