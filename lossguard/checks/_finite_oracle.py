"""The finiteness oracle: which cases must come out finite in a dtype.

Shared by the ``finite``, ``masking`` and ``dtypes`` checks and the stability profile. Notation and
shapes: stacks of K cases of one menu shape, class axis last (:mod:`lossguard.cases`).

A non-finite value (gradient) fails wherever the true value (gradient) is finite and
representable in the dtype: an inf where the exact loss overflows is not a bug, an inf from an
intermediate overflow is. The true value is decided by the first rule that applies:

1. a declared reference, in float64 at the same rounded inputs; where float64 overflows too, the
   case's true reduced value from mpmath on the examples whose float64 value overflowed only,
   the others entering exactly as float64 gave them (:func:`lossguard._mp_oracle.settle_value`:
   O(C) per such example, stopping once the case cannot fit, instead of dual numbers, O(C²), on
   all N), and gradients only where the value fits (mpmath only for rows float64 left non-finite);
2. below float64: the loss's own float64 value at the same inputs, when that is finite;
3. probability inputs at an exact 0 or 1: the limit from inside, read from the loss's own
   float64 values with the endpoint moved inward by 2^-13, 2^-26 and 2^-52: taken finite when
   the differences do not grow (a log or a power diverges with growing differences);
4. float64 itself: logits no larger than :data:`ASSUMED_FINITE_UP_TO`, or probabilities in
   [tiny, 1), are assumed to have a finite loss (true of every classification loss we know in
   logits — an exponential-type loss is the exception; declare a reference or skip).

Otherwise there is no oracle: the case is not judged, and the count is reported. The rules are
consulted only for the cases whose value or gradient came out non-finite (a finite result is
never a failure), so the counts of cases without an oracle and of cases whose true value is not
representable are counts among those.

"Representable" means: the true value fits the dtype and, for a batch mean, so does the sum it
divides, held in float32 for float16 and bfloat16 (the accumulator JAX uses) and in the dtype
itself above that. A gradient is judged only where the value is (where the exact loss overflows,
the chain rule multiplies by its overflowing factors). A case holding values subnormal in the
dtype is judged both as given and with them flushed to zero, since XLA on CPU flushes denormals:
it must be finite only where both readings say so.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .._mp_oracle import mp_available, settle_grad_rows, settle_value
from ..cases import CaseStack, Cell, concat
from ..evaluate import NoGradient
from ..spec import LossSpec
from ..ladders import EDGE_STEPS, approach, flush_subnormals, has_subnormals, largest_finite, smallest_normal
from ..tolerance import op_count, rounding_allowance
from ._base import Context
from ._extremes import ACCUMULATOR, fill_to, on_grid
from ._reference_batch import reduce_rows, reference_rows

__all__ = ["ASSUMED_FINITE_UP_TO", "Need", "Outcome", "expected_finite", "finite_oracle", "own_float64",
           "per_case_finite", "reduced_fits"]

#: Rule 4: largest |logit| at which a loss in logits is assumed to have a finite float64 value.
ASSUMED_FINITE_UP_TO = 1e4


def per_case_finite(a: np.ndarray | None, k: int, top: float | None = None) -> np.ndarray:
    """Per case: every entry finite (and, with ``top``, no larger in magnitude than ``top``)."""
    if a is None:
        return np.ones(k, bool)
    flat = np.asarray(a, dtype=np.float64).reshape(k, -1)
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(flat) & (np.abs(flat) <= top if top is not None else True)
    return np.all(ok, axis=1)


def own_float64(ctx: Context, stack: CaseStack) -> tuple[np.ndarray, np.ndarray | None]:
    """The loss's own float64 (values, gradients); gradients ``None`` without a gradient oracle."""
    try:
        return ctx.evaluator.value_and_grad(stack, "float64")
    except NoGradient:
        return ctx.evaluator.values(stack, "float64"), None


@dataclass
class Outcome:
    """A stack evaluated in one dtype by a check that asks for finite results (``finite``,
    ``masking``): the outputs, and per case whether the value, or anything, failed."""

    spec: LossSpec
    stack: CaseStack
    dtype: str
    vals: np.ndarray
    grads: np.ndarray | None
    bad_v: np.ndarray
    bad: np.ndarray


@dataclass
class Need:
    """Per case: must the value / gradient be finite, and was the case judged at all."""

    value: np.ndarray
    grad: np.ndarray
    judged: np.ndarray
    rules: set[str] = field(default_factory=set)


def reduced_fits(ctx: Context, v: np.ndarray, k: int, dtype: str, cell: Cell | None = None) -> np.ndarray:
    """Per case: the true output fits ``dtype`` and, for a batch mean, so does the sum it divides.

    The sum is held in float32 for float16 and bfloat16 inputs (the accumulator JAX and the
    mixed-precision recipes use: common practice) and in the dtype itself above that.
    """
    ok = per_case_finite(v, k, largest_finite(dtype))
    ev = ctx.evaluator
    if ev.output == "scalar" and ev.reduction == "mean":
        shape = (cell or ctx.cells[0]).pred_shape()
        count = int(np.prod(shape)) if ctx.spec.kind == "binary" else shape[0]
        acc = ACCUMULATOR.get(dtype, dtype)
        with np.errstate(over="ignore", invalid="ignore"):
            ok &= per_case_finite(np.asarray(v, dtype=np.float64).reshape(k) * count, k, largest_finite(acc))
    return ok


def _examples(ctx: Context, stack: CaseStack, i: int) -> tuple[np.ndarray, np.ndarray]:
    """Case ``i`` as M examples: predictions (M, C) (binary: (M, 1)) and targets (M, …)."""
    if ctx.spec.kind == "binary":
        return stack.predictions[i].reshape(-1, 1), stack.targets[i].reshape(-1)
    return stack.predictions[i], stack.targets[i]


def _reference_need(ctx: Context, stack: CaseStack, dtype: str) -> Need:
    """Rule 1: values first; gradients only for the cases whose true value is representable."""
    k, top, spec, ev = len(stack), largest_finite(dtype), ctx.spec, ctx.evaluator
    ell, _, w = reference_rows(ctx, stack.predictions, stack.targets, grad=False)
    v, _ = reduce_rows(ctx, stack.predictions.shape, stack.targets.shape, ell, None, w)
    rules = {f"rule 1: reference {spec.reference!r} in float64"}
    over = ~per_case_finite(v, k)
    settle = over.any() and mp_available()
    if settle:  # float64 overflowed: ask mpmath, on the examples that overflowed only
        shape = stack.cell.pred_shape()
        count = int(np.prod(shape)) if spec.kind == "binary" else shape[0]
        # past this the value, or for a batch mean the sum it divides, fits no dtype (reduced_fits)
        beyond = largest_finite("float64") / (count if ev.output == "scalar" and ev.reduction == "mean" else 1)
        v = v.copy()
        for i in np.flatnonzero(over):
            exact = settle_value(spec, *_examples(ctx, stack, int(i)), ell[i], reduction=ev.reduction, beyond=beyond)
            v[i] = np.reshape(exact, np.shape(v[i]))  # per-example outputs: back to the case's shape
        rules.add("rule 1: mpmath on the examples where float64 overflowed")
    value = reduced_fits(ctx, v, k, dtype, stack.cell)
    grad = np.zeros(k, bool)
    idx = np.flatnonzero(value)  # where the value does not fit, the gradient is not judged
    if idx.size:
        sub = stack.take(idx)
        ell_s, grad_s, w_s = reference_rows(ctx, sub.predictions, sub.targets)
        _, g = reduce_rows(ctx, sub.predictions.shape, sub.targets.shape, ell_s, grad_s, w_s)
        assert g is not None and grad_s is not None
        if settle:
            for j in np.flatnonzero(over[idx]):
                rows, rows_g = settle_grad_rows(spec, *_examples(ctx, sub, int(j)), grad_s[j], reduction=ev.reduction)
                if rows.size:
                    g[j].reshape(ell_s.shape[1], -1)[rows] = rows_g.reshape(rows.size, -1)
        grad[idx] = per_case_finite(g, idx.size, top)
    return Need(value, grad, np.ones(k, bool), rules)


def _limit_need(ctx: Context, stack: CaseStack, idx: np.ndarray, dtype: str) -> tuple[np.ndarray, np.ndarray]:
    """Rule 3 for the cases ``idx``: (value limit finite and fits, gradient limit finite and fits)."""
    sub = stack.take(idx)
    moved = [sub.with_predictions(approach(sub.predictions, s)) for s in EDGE_STEPS]
    both = fill_to(concat(moved), moved[0])
    v, g = own_float64(ctx, both)
    m, top = len(idx), largest_finite(dtype)
    n = op_count(stack.cell.n, stack.cell.c or stack.cell.d or 1)

    def converges(a: np.ndarray | None) -> np.ndarray:
        if a is None:
            return np.zeros(m, bool)
        a1, a2, a3 = (a[i * m:(i + 1) * m].reshape(m, -1) for i in range(3))
        tol = rounding_allowance(np.abs(a3).max(axis=1), np.ones(m), dtype="float64", n_ops=n).atol
        with np.errstate(invalid="ignore"):
            # a finite limit: successive differences shrink (|a3 − a2| ≤ |a2 − a1| up to rounding)
            shrink = np.abs(a3 - a2).max(axis=1) <= np.abs(a2 - a1).max(axis=1) + tol
        return shrink & per_case_finite(a3, m)

    return converges(v) & reduced_fits(ctx, v[2 * m:3 * m], m, dtype, stack.cell), converges(g) & per_case_finite(
        None if g is None else g[2 * m:3 * m], m, top)


def finite_oracle(ctx: Context, stack: CaseStack, dtype: str,
                  own: tuple[np.ndarray, np.ndarray | None] | None = None) -> Need:
    """Which cases must come out finite in ``dtype`` (rules 1–4 of the module docstring).

    A case holding values subnormal in ``dtype`` is judged twice, as given and with them flushed
    to zero (XLA on CPU flushes denormals), and must be finite only where both readings say so.

    Args:
        ctx: the battery context. stack: cases already rounded to ``dtype``.
        dtype: the dtype the loss is evaluated in.
        own: the loss's own float64 (values, gradients) on ``stack``, if already computed.
    """
    need = _oracle(ctx, stack, dtype, own)
    sub = has_subnormals(stack.predictions, dtype)
    if np.issubdtype(stack.targets.dtype, np.floating):
        sub |= has_subnormals(stack.targets, dtype)
    if sub.any():
        idx = np.flatnonzero(sub)
        part = stack.take(idx)
        y = part.targets
        if np.issubdtype(y.dtype, np.floating):
            y = flush_subnormals(y, dtype)
        flushed = _oracle(ctx, fill_to(CaseStack(flush_subnormals(part.predictions, dtype), y, part.cell,
                                                 part.notes), part), dtype, None)
        need.value[idx] &= flushed.value[:idx.size]
        need.grad[idx] &= flushed.grad[:idx.size]
        need.judged[idx] &= flushed.judged[:idx.size]
        need.rules |= flushed.rules | {"subnormal inputs judged as given and flushed to zero"}
    need.grad &= need.value  # where the exact loss overflows, chain-rule factors overflow with it
    return need


def _oracle(ctx: Context, stack: CaseStack, dtype: str,
            own: tuple[np.ndarray, np.ndarray | None] | None) -> Need:
    k, top, spec = len(stack), largest_finite(dtype), ctx.spec
    if spec.reference is not None:
        return _reference_need(ctx, stack, dtype)
    need = Need(np.zeros(k, bool), np.zeros(k, bool), np.zeros(k, bool))
    if dtype != "float64":
        ov, og = own if own is not None else own_float64(ctx, stack)
        fin = per_case_finite(ov, k)
        g_fin = per_case_finite(og, k) if og is not None else np.zeros(k, bool)
        need.value = fin & reduced_fits(ctx, ov, k, dtype, stack.cell)
        need.grad = fin & g_fin & per_case_finite(og, k, top)
        need.judged = fin
        need.rules.add("rule 2: the loss's own float64 value")
    z = stack.predictions.reshape(k, -1)
    if spec.inputs == "probabilities":
        edge = np.any((z == 0.0) | (z == 1.0), axis=1) & ~need.judged
        if edge.any():
            idx = np.flatnonzero(edge)
            need.value[idx], need.grad[idx] = _limit_need(ctx, stack, idx, dtype)
            need.judged[idx] = True
            need.rules.add("rule 3: the limit from inside at exact 0 or 1")
    if dtype == "float64":
        if spec.inputs == "logits":
            assumed = np.max(np.abs(z), axis=1) <= ASSUMED_FINITE_UP_TO
        else:
            assumed = np.all((z >= smallest_normal("float64")) & (z < 1.0), axis=1)
        assumed &= ~need.judged
        need.value |= assumed
        need.grad |= assumed & ctx.evaluator.has_gradient
        need.judged |= assumed
        if assumed.any():
            need.rules.add(f"rule 4: assumed finite (no reference; |z| <= {ASSUMED_FINITE_UP_TO:g} or p in [tiny, 1))")
    return need


def expected_finite(ctx: Context, stack: CaseStack, dtype: str) -> tuple[np.ndarray, np.ndarray]:
    """Per case: (true value finite and representable, true gradient finite and representable).

    ``stack`` is rounded to ``dtype`` first; unjudged cases come back False (nothing required).
    """
    need = finite_oracle(ctx, on_grid(stack, [dtype]), dtype)
    return need.value, need.grad
