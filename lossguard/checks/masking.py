"""``masking``: −inf logits on classes that cannot occur leave value and gradient intact.

Notation and shapes: logits (K, N, C), class axis last; a mask (K, N, C) marks the entries set
to −inf. Categorical targets: never the label (an ignored row keeps class 0); distribution
targets: only classes whose target is exactly 0 (:func:`~lossguard.ladders.mask_non_targets`).
Each row masks between one and all of its eligible classes, on logits of random scale.

Wherever the true value with the mask is finite, the computed value and gradient must be finite
and the gradient at every masked entry exactly 0 (a finite limit as z_c → −inf forces
∂ℓ/∂z_c → 0; softmax gives p_c = e^(−inf) = 0 exactly). The true value comes from the declared
reference in float64 at the masked inputs or, without one, from the limit: the loss's own
float64 values with −inf replaced by min(z) − D for D = 1e2, 1e4, 1e8 are taken to converge when
their differences do not grow. A loss that puts target mass on a masked class (label smoothing)
has an infinite true value there; such cases are not judged. A fully masked row (every class
−inf, the label included) has no meaningful value: what the loss does with it is reported, not
failed. A few cases are also evaluated by plain calls without jit (in the dtype and at the shape
the battery's plain calls share, :data:`~lossguard.checks._base.EAGER_DTYPE` and
:attr:`~lossguard.checks._base.Context.eager_cell`), because a
compiler may rewrite onehot · log p into a gather and hide the 0 · (−inf) a training loop would
meet. Lower precisions use :meth:`~lossguard.checks._base.Context.cells_for`; large shapes get
fewer cases (:func:`lossguard._budget.case_count`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .._budget import case_count
from ..cases import CaseStack, Cell, concat
from ..evaluate import NoGradient
from ..ladders import mask_non_targets, sparse_simplex_rows
from ..result import CheckResult, Example
from ..tolerance import op_count, rounding_allowance
from ._base import EAGER_DTYPE, Check, Context, Judged, conclude, only, planned
from ._compare import replay
from ._finite_oracle import Outcome, own_float64, per_case_finite, reduced_fits
from ._reference_batch import reference_batch

__all__ = ["CHECK", "check_masking", "masked_cases", "DEPTHS"]

#: How far below the row's smallest finite logit the finite stand-ins of −inf sit (limit oracle).
DEPTHS = (1e2, 1e4, 1e8)
MASKED_CASES = 40
#: Masked cases also evaluated by plain (not jitted) calls in float32: one call per case.
EAGER_CASES = 8
#: How an example found by a plain call says so (its predicate makes plain calls too).
PLAIN = "(plain call, no jit)"


def masked_cases(ctx: Context, cell: Cell) -> tuple[CaseStack, np.ndarray]:
    """(stack, mask): :data:`MASKED_CASES` masked cases (fewer for large shapes), the last one
    with a fully masked row 0."""
    rng = ctx.rng(f"masking {cell}")
    base = ctx.random_cases(cell)
    count = case_count(MASKED_CASES, int(np.prod(cell.pred_shape())))
    take = base.take(np.arange(count) % len(base))
    z = take.predictions.copy()
    z[1::2] *= 100.0  # every other case at a confident scale, so masks meet saturated rows
    y = take.targets.copy()
    if ctx.spec.kind == "distribution":
        y = np.stack([sparse_simplex_rows(rng, cell.n, cell.c or 2) for _ in range(count)])
    mask = np.stack([mask_non_targets(rng, y[k], cell.c or 2, ignore_label=ctx.spec.ignore_label)
                     for k in range(count)])
    mask[-1, 0, :] = True  # the report-only case: row 0 loses every class
    z = np.where(mask, -np.inf, z)
    scale = np.max(np.abs(np.where(mask, 0.0, z)).reshape(count, -1), axis=1)
    notes = [f"masked {int(mask[k].sum())} of {mask[k].size} logits, scale {scale[k]:.3g}"
             for k in range(count)]
    notes[-1] = "row 0 fully masked (report only)"
    return CaseStack(z, y, cell, notes), mask


def _limit_oracle(ctx: Context, stack: CaseStack, mask: np.ndarray) -> np.ndarray:
    """Per case: does the loss converge as the masked logits go to −inf (no reference)."""
    k = len(stack)
    z = stack.predictions
    low = np.min(np.where(mask, np.inf, z).reshape(k, -1), axis=1).reshape((k,) + (1,) * (z.ndim - 1))
    deep = concat([stack.with_predictions(np.where(mask, low - d, z)) for d in DEPTHS])
    v, _ = own_float64(ctx, deep)
    v1, v2, v3 = (v[i * k:(i + 1) * k].reshape(k, -1) for i in range(3))
    n = op_count(stack.cell.n, stack.cell.c or 1)
    tol = rounding_allowance(np.abs(v3).max(axis=1), np.ones(k), dtype="float64", n_ops=n).atol
    with np.errstate(invalid="ignore"):
        # a finite limit: successive differences shrink (|v3 − v2| ≤ |v2 − v1| up to rounding)
        conv = np.abs(v3 - v2).max(axis=1) <= np.abs(v2 - v1).max(axis=1) + tol
    return conv & per_case_finite(v3, k)


def _true_finite(ctx: Context, stack: CaseStack, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, str]:
    """(true value finite per case, its float64 estimate, which oracle)."""
    if ctx.spec.reference is not None:
        with np.errstate(all="ignore"):
            v, _ = reference_batch(ctx, stack.predictions, stack.targets, grad=False)
        return per_case_finite(v, len(stack)), v, f"reference {ctx.spec.reference!r} in float64"
    limit = "the limit z_c → −inf of the loss's own float64 value"
    return _limit_oracle(ctx, stack, mask), np.zeros(len(stack)), limit


def _describe(a: np.ndarray) -> str:
    a = np.asarray(a, dtype=np.float64)
    if np.all(np.isfinite(a)):
        return "finite"
    return "nan" if np.any(np.isnan(a)) else "inf"


def _plain_calls(ctx: Context, stack: CaseStack, need: np.ndarray, worst: list[Example]) -> int:
    """A few judged cases by plain calls: the number whose value is not finite."""
    # compilers may rewrite onehot · log p into a gather and hide a 0 · (−inf); a plain call,
    # as a training loop without jit makes it, does not
    idx = np.flatnonzero(need)[:EAGER_CASES]
    if not idx.size:
        return 0
    plain = ctx.evaluator.values(stack.take(idx), EAGER_DTYPE, eager=True)
    bad = ~per_case_finite(plain, idx.size)
    for j in np.flatnonzero(bad)[:1]:
        i = int(idx[j])
        worst.append(Example(what=f"value in {EAGER_DTYPE} {PLAIN}", predictions=stack.predictions[i],
                             targets=stack.targets[i], got=plain[j], expected="finite", abs_err=float("inf"),
                             note=stack.note(i), dtype=EAGER_DTYPE,
                             replay=replay(ctx.spec, stack.predictions[i], stack.targets[i], EAGER_DTYPE)))
    return int(bad.sum())


HINT = ("a −inf logit met 0 · (−inf) = nan: gather the label's log-probability instead of multiplying "
        "by a one-hot, and where-guard terms of classes with zero target before the product")


@dataclass
class _Judged(Outcome):
    """One masked stack in one dtype: outputs and which cases broke value, gradient or the mask."""

    bad_g: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))

    def example(self, i: int) -> Example:
        s, d = self.stack, self.dtype
        what = "value" if self.bad_v[i] else "gradient" if self.bad_g[i] else "gradient at a masked class"
        got = self.vals[i] if self.bad_v[i] else self.grads[i]  # type: ignore[index]
        exp = "finite" if (self.bad_v[i] or self.bad_g[i]) else "exactly 0 at every masked (−inf) entry"
        return Example(what=f"{what} in {d}", predictions=s.predictions[i], targets=s.targets[i], got=got,
                       expected=exp, abs_err=float("inf"), note=s.note(i), dtype=d,
                       replay=replay(self.spec, s.predictions[i], s.targets[i], d))


def _judge(ctx: Context, stack: CaseStack, mask: np.ndarray, dtype: str, candidates: np.ndarray,
           ref_v: np.ndarray) -> _Judged:
    """Value and gradient of ``stack`` in ``dtype``; ``candidates``: the judged cases whose true
    value is finite (then it must fit ``dtype``, with a reference)."""
    ev, k = ctx.evaluator, len(stack)
    try:
        vals, grads = ev.value_and_grad(stack, dtype)
    except NoGradient:
        vals, grads = ev.values(stack, dtype), None
    vals, grads = vals[:k], None if grads is None else grads[:k]
    need = candidates & (reduced_fits(ctx, ref_v, k, dtype, stack.cell) if ctx.spec.reference else True)
    bad_v = need & ~per_case_finite(vals, k)
    bad_g = need & ~per_case_finite(grads, k) if grads is not None else np.zeros(k, bool)
    leak = np.zeros(k, bool)
    if grads is not None:
        with np.errstate(invalid="ignore"):
            leak = need & np.any((np.where(mask, grads, 0.0) != 0).reshape(k, -1), axis=1)
    return _Judged(ctx.spec, stack, dtype, vals, grads, bad_v, bad_v | bad_g | leak, bad_g)


def _still_fails(ctx: Context, example: Example, stack: CaseStack) -> Judged:
    """The same dtype and oracle on cut-down masked cases (−inf entries are the mask); plain calls
    when the example came from them. A case with a fully masked row is not judged."""
    mask = np.isneginf(stack.predictions)
    k = len(stack)
    judged = ~np.any(np.all(mask, axis=-1).reshape(k, -1), axis=1)
    fin, ref_v, _ = _true_finite(ctx, stack, mask)
    if PLAIN not in example.what:
        j = _judge(ctx, stack, mask, example.dtype, judged & fin, ref_v)
        return Judged(j.bad, j.example)
    found: list[Example] = []
    need = judged & fin & (reduced_fits(ctx, ref_v, k, EAGER_DTYPE, stack.cell) if ctx.spec.reference else True)
    idx = np.flatnonzero(need)
    bad = np.zeros(k, bool)
    if idx.size:
        bad[idx] = ~per_case_finite(ctx.evaluator.values(stack.take(idx), EAGER_DTYPE, eager=True), idx.size)

    def one(i: int) -> Example | None:
        found.clear()
        return found[0] if _plain_calls(ctx, stack.take([i]), np.ones(1, bool), found) else None

    return Judged(bad, one)


def check_masking(ctx: Context, dtypes: tuple[str, ...] | None = None) -> CheckResult:
    """The check on the given dtypes (default: float32 and float64 at quick effort, else all)."""
    spec, ev = ctx.spec, ctx.evaluator
    dtypes = ctx.judged_dtypes(dtypes or ctx.effort.masking_dtypes) or ("float64",)
    total = failed = skipped = 0
    worst: list[Example] = []
    oracle_name = ""
    full_row: dict[str, str] = {}
    for cell in ctx.cells:
        stack, mask = masked_cases(ctx, cell)
        judged = np.arange(len(stack)) < len(stack) - 1  # the fully masked case is report-only
        fin, ref_v, oracle_name = _true_finite(ctx, stack, mask)
        for dtype in dtypes:
            if cell not in ctx.cells_for(dtype):
                continue
            j = _judge(ctx, stack, mask, dtype, judged & fin, ref_v)
            vals, grads, bad = j.vals, j.grads, j.bad
            total += int(judged.sum())
            skipped += int((judged & ~fin).sum())
            failed += int(bad.sum())
            for i in np.flatnonzero(bad)[:1]:
                worst.append(j.example(int(i)))
            if dtype == "float64" or not full_row:
                full_row = {"value": _describe(vals[-1]),
                            "gradient": _describe(grads[-1]) if grads is not None else "n/a"}
        if cell == ctx.eager_cell and not failed:
            failed += _plain_calls(ctx, stack, judged & fin & (
                reduced_fits(ctx, ref_v, len(stack), EAGER_DTYPE, cell) if spec.reference else True), worst)
    full = (f"a fully masked row gives value {full_row.get('value')}, gradient {full_row.get('gradient')} "
            "(reported, not failed)")
    if failed:
        summary = (f"masked logits broke value or gradient on {failed} of {total} cases; first: {worst[0].what} "
                   f"[{worst[0].note}]; {full}")
    else:
        what = "value and gradient finite, masked gradients exactly 0," if ev.has_gradient else \
            "value finite (no gradient oracle)"
        summary = f"{what} on {total - skipped} judged cases ({', '.join(dtypes)}); {full}"
    if skipped:
        summary += f"; {skipped} cases not judged: the true value is infinite (target mass on a masked class)"
    allowance = f"exact: finite where the true value is (oracle: {oracle_name}); gradient exactly 0 at masked entries"
    return conclude("masking", summary=summary, cases=total, failed=failed, allowance=allowance, worst=worst,
                    hint=HINT, details={"fully_masked_row": full_row, "cases_not_judged": skipped,
                                        "dtypes": list(dtypes)})


def _run(ctx: Context) -> CheckResult:
    return check_masking(ctx)


CHECK = Check(
    name="masking",
    summary="−inf logits on impossible classes: value and gradient finite, masked gradients exactly 0",
    run=_run,
    applies=only("categorical", "distribution", inputs="logits"),
    skip_hint="skip if the loss is never given masked (−inf) logits",
    order=30,
    compiles=lambda ctx: planned(ctx.effort.masking_dtypes)(ctx),
    still_fails=_still_fails,
)
