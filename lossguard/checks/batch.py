"""``batch``: the batch is a set of independent examples — order, company and size do not matter.

Notation and shapes: a case X has N examples on axis 0 (predictions (N, C), (N,) or (N, D));
A and B are its first and second halves (h = N/2 rows each); X' is another case of the same
shape with halves A', B'; π a permutation of the rows; w_i an example's weight (1, or 0 when its
label is the ignore label, or the reference's class weight of its label) and W(X) = Σ_i w_i;
T(X) = W(X)·L(X) for a mean, L(X) for a sum: the total over the batch.

Formulas (each must hold up to rounding):

- order: L(πX) = L(X) (per-example outputs: L(πX) = π L(X)); ∇L(πX) = π ∇L(X);
- company: T([A; B']) + T([A'; B]) = T(X) + T(X') — each example contributes the same total
  whichever examples share its batch; gradient rows W·∇ of A in [A; B'] equal those in X
  (per-example outputs: the values and gradient rows of A are equal outright);
- size: T(X) = T(A) + T(B), with A and B evaluated as batches of h rows (the halves of the
  largest menu shape; one extra shape is compiled), and W·∇ rows of X equal those of A and B.

Which examples count in W is read from the loss: examples that are not ignored first, all rows
(ignored included) when only that convention fits — whether ignored rows may count is the
``padding`` check's question, not this one's. A loss normalised by something else (the number of
positives, a running statistic) is not batch-additive; the failure says so.

Error model: each total carries the rounding of its loss, γ_n (|T| + W·max|z|) (module
:mod:`lossguard.tolerance`), summed over the totals compared; gradient rows the normwise rule
scaled by W. A side whose values are not finite agrees only with a side that is not finite
either (an example that overflows only in some company depends on that company).

Example:
    >>> import jax
    >>> from lossguard import declare, run
    >>> def focal_after_mean(z, y):  # focal factor applied to the batch mean, not per example
    ...     ce = (jax.nn.logsumexp(z, -1) - jax.numpy.take_along_axis(z, y[:, None], -1)[:, 0]).mean()
    ...     return (1 - jax.numpy.exp(-ce)) ** 2 * ce
    >>> run(declare(focal_after_mean, kind="categorical"), effort="quick", only=["batch"]).check("batch").verdict
    'fail'
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ._property import Part, Tally, mismatch_examples, single, value_and_grad
from .._budget import large_case
from ..cases import CaseStack, Cell, halves, join, split_cell, take_rows
from ..references import get_reference
from ..result import CheckResult
from ..strategies import cases
from ..tolerance import op_count, rounding_allowance
from ._base import Check, Context, planned
from ._compare import mismatch
from ._reference_batch import example_weights
from ._scales import case_scale, gradient_term_scale

__all__ = ["CHECK", "row_weights"]

HINT = (
    "the loss is not a sum or mean of independent per-example terms: its value depends on the order "
    "of examples, on which other examples share the batch, or on the batch size (a normaliser "
    "cached from an earlier call, a class count read from the batch axis, a nonlinearity applied "
    "after the batch mean, a shift by a batch-wide statistic). A loss normalised by something "
    "other than its examples (the number of positives, a running statistic, or the summed class "
    "weights when no reference declares them) is not batch-additive by design: skip batch for it, "
    "or declare the reference whose weights it uses"
)


def row_weights(ctx: Context, stack: CaseStack, convention: str) -> np.ndarray:
    """w (K, M): how much each of a case's M examples counts in a mean under ``convention``
    (``"all rows"``: every one, ignored or not, weighs 1; ``"examples"``: as the reference counts)."""
    w = example_weights(ctx, stack.targets)
    return np.ones_like(w) if convention == "all rows" else w


@dataclass
class _Evals:
    """Every evaluation the comparisons need, for one stack X and its partner X'."""

    calls: dict[str, CaseStack]
    v: dict[str, np.ndarray] = field(default_factory=dict)
    g: dict[str, np.ndarray | None] = field(default_factory=dict)
    perm: np.ndarray | None = None
    h: int = 0


def evaluate(ctx: Context, x: CaseStack, x2: CaseStack, rng: np.random.Generator, with_halves: bool,
             partner: np.ndarray | None = None) -> _Evals:
    """Evaluate X, X', πX, [A; B'], [A'; B] and (``with_halves``) A and B alone.

    ``partner``: when X' is X's own cases reordered (``x2 = x.take(partner)``), X' is not
    evaluated again: its results are X's, reordered.
    """
    k, n = len(x), x.cell.n
    h = n // 2
    perm = np.argsort(rng.random((k, n)), axis=1)
    top, bottom = np.arange(h)[None].repeat(k, 0), np.arange(h, n)[None].repeat(k, 0)
    ha, hb = Cell(h, x.cell.c, x.cell.d), Cell(n - h, x.cell.c, x.cell.d)
    a, b, a2, b2 = (take_rows(s, i, c) for s, i, c in ((x, top, ha), (x, bottom, hb), (x2, top, ha), (x2, bottom, hb)))
    calls = {"X": x, "X2": x2, "P": take_rows(x, perm), "M1": join(a, b2, x.cell), "M2": join(a2, b, x.cell)}
    if with_halves:
        calls.update(A=a, B=b)
    e = _Evals(calls=calls, perm=perm, h=h)
    for name, s in calls.items():
        if name == "X2" and partner is not None:
            continue
        e.v[name], e.g[name] = value_and_grad(ctx, s)
    if partner is not None:  # the same cases, already evaluated as X
        gx = e.g["X"]
        e.v["X2"], e.g["X2"] = e.v["X"][partner], None if gx is None else gx[partner]
    return e


def _nan_unless_finite(a: np.ndarray) -> np.ndarray:
    return np.where(np.isfinite(a), a, np.nan)


def compare(ctx: Context, e: _Evals, convention: str) -> list[Part]:
    """The order, company and size comparisons of ``e`` under a weight ``convention``."""
    spec, ev = ctx.spec, ctx.evaluator
    x = e.calls["X"]
    k, cell, h = len(x), x.cell, e.h
    dtype = ev.computed_dtype("float64")
    n_ops = op_count(cell.n, cell.c or cell.d or 1)
    s = np.maximum(case_scale(ctx, x.predictions), case_scale(ctx, e.calls["X2"].predictions))
    per_example = ev.output == "per_example"
    parts: list[Part] = []
    n_note = lambda label: "; A, B: the halves of X as batches of their own" if label == "size" else ""  # noqa: E731

    def add(what: str, got: np.ndarray, expected: np.ndarray, atol: np.ndarray, rule: str,
            names: list[str], relation: str, judged: np.ndarray | None = None) -> None:
        m = mismatch(got, expected, atol)
        if judged is not None:
            m.case_bad &= judged
        ratio = m.case_ratio if judged is None else np.where(judged, m.case_ratio, 0.0)
        calls = [(nm, e.calls[nm]) for nm in names]
        parts.append(Part(what, m.case_bad, ratio, rule,
                          lambda most: mismatch_examples(spec, m, what, calls, relation, most=most)))

    def grad_atol(g: np.ndarray, stack: CaseStack, scale_w: np.ndarray) -> tuple[np.ndarray, str]:
        terms = gradient_term_scale(ctx, stack.targets) * scale_w
        a = rounding_allowance(g, s, dtype=dtype, n_ops=n_ops, normwise=True, grad_scale=terms)
        return a.atol, "gradient: " + a.rule

    v, g, perm = e.v, e.g, e.perm
    assert perm is not None
    # -- order ------------------------------------------------------------------------------
    a_v = rounding_allowance(v["X"], s, dtype=dtype, n_ops=n_ops)
    expected = v["X"][np.arange(k)[:, None], perm] if per_example else v["X"]
    add("value after reordering examples", v["P"], expected, a_v.atol, "value: " + a_v.rule, ["X", "P"],
        "the value of P (X with its examples reordered) to equal X's" + (", reordered" if per_example else ""))
    if g["X"] is not None and g["P"] is not None:
        atol, rule = grad_atol(g["X"], x, np.ones(k))
        add("gradient after reordering examples", g["P"], g["X"][np.arange(k)[:, None], perm], atol, rule,
            ["X", "P"], "the gradient rows of P to be X's rows, reordered")
    # -- company and size: (piece, its first row, whole, the same examples' first row, rows) ----
    w = {nm: np.sum(row_weights(ctx, stk, convention), axis=1) for nm, stk in e.calls.items()}
    rest = cell.n - h
    groups = [("company", ["X", "X2"], ["M1", "M2"],
               [("M1", 0, "X", 0, h), ("M1", h, "X2", h, rest), ("M2", 0, "X2", 0, h), ("M2", h, "X", h, rest)])]
    if "A" in e.calls:
        groups.append(("size", ["X"], ["A", "B"], [("A", 0, "X", 0, h), ("B", 0, "X", h, rest)]))
    mean = ev.reduction == "mean"
    for label, lhs, rhs, pieces in groups:
        judged = np.all([w[nm] > 0 for nm in lhs + rhs], axis=0)  # a mean over no example is undefined
        if not per_example:
            tot = {nm: v[nm] * (w[nm] if mean else 1.0) for nm in lhs + rhs}
            left = _nan_unless_finite(sum(tot[nm] for nm in lhs))
            right = _nan_unless_finite(sum(tot[nm] for nm in rhs))
            mags = sum(np.where(np.isfinite(tot[nm]), np.abs(tot[nm]), 0.0) for nm in lhs + rhs)
            # each total T = W·L is within γ_n (|T| + W·max|z|); the errors of the totals add up
            a_t = rounding_allowance(mags, sum(w[nm] for nm in lhs + rhs) * s, dtype=dtype, n_ops=n_ops)
            add(f"batch totals ({label})", right, left, a_t.atol, "totals: " + a_t.rule, lhs + rhs,
                f"{' + '.join(f'T({nm})' for nm in rhs)} == {' + '.join(f'T({nm})' for nm in lhs)}, "
                f"T = value · number of examples counted in the batch{n_note(label)}", judged)
        for piece, lo, whole, at, width in pieces:
            if per_example:
                got, exp = v[piece][:, lo:lo + width], v[whole][:, at:at + width]
                a_v = rounding_allowance(exp, s, dtype=dtype, n_ops=n_ops)
                add(f"per-example values ({label})", got, exp, a_v.atol, "value: " + a_v.rule, [whole, piece],
                    f"the rows of {piece} to equal the same examples' rows in {whole}")
            gp, gw = g[piece], g[whole]
            if gp is None or gw is None:
                continue
            # a mean's gradient row is ∂ℓ_i/∂z_i / W: multiply by W to compare across batches
            wp = (w[piece] if mean and not per_example else np.ones(k)).reshape((k,) + (1,) * (gp.ndim - 1))
            ww = (w[whole] if mean and not per_example else np.ones(k)).reshape((k,) + (1,) * (gw.ndim - 1))
            got, exp = gp[:, lo:lo + width] * wp, gw[:, at:at + width] * ww
            atol, rule = grad_atol(exp, x, ww.reshape(k))
            add(f"gradient rows ({label})", _nan_unless_finite(got), _nan_unless_finite(exp), atol, rule,
                [whole, piece], f"W·the gradient rows of {piece} to equal W·the same examples' rows in {whole}",
                judged)
    return parts


def _conventions(ctx: Context) -> list[str]:
    return ["examples"] + (["all rows"] if ctx.spec.ignore_label is not None else [])


def _judge(ctx: Context, case: tuple, with_halves: bool) -> list[Part]:  # type: ignore[type-arg]
    """The comparisons for one drawn case X, its partner X' being X with its rows reversed
    (so the company comparison pairs each half with the other half's examples)."""
    z, y = case
    x, x2 = single(ctx.spec, z, y), single(ctx.spec, z[::-1], y[::-1])
    e = evaluate(ctx, x, x2, ctx.rng("batch search"), with_halves)
    best: list[Part] = []
    for conv in _conventions(ctx):
        parts = compare(ctx, e, conv)
        if not any(p.bad.any() for p in parts):
            return parts
        best = best or parts
    return best


def _run(ctx: Context) -> CheckResult:
    big = split_cell(ctx.cells)
    evals = []
    for cell in ctx.cells:
        x = ctx.standard_cases(cell)
        order = np.roll(np.arange(len(x)), len(x) // 2)  # pair random cases with ladder cases
        x2 = x.take(order)
        if not large_case(cell.elements()):
            evals.append((cell, evaluate(ctx, x, x2, ctx.rng(f"batch {cell}"), cell == big, partner=order)))
            continue
        for i in range(len(x)):  # large cases one pair at a time: every array stays one case big
            rng = ctx.rng(f"batch {cell}" + (f" case {i}" if i else ""))
            evals.append((cell, evaluate(ctx, x.take([i]), x2.take([i]), rng, cell == big)))
    chosen, tally = "", Tally("batch")
    for conv in _conventions(ctx):
        t = Tally("batch")
        for cell, e in evals:
            t.add(compare(ctx, e, conv), len(e.calls["X"]))
            t.unjudged += int(np.sum(~np.all(np.isfinite(e.v["X"].reshape(len(e.calls["X"]), -1)), axis=1)))
        if not chosen or (t.failed == 0 and tally.failed > 0):
            chosen, tally = conv, t
    if tally.failed:
        cell = next(c for c, e in evals if any(p.bad.any() for p in compare(ctx, e, chosen)))
        tally.shrink(ctx, cases(ctx.spec, shapes=[cell]), lambda case: _judge(ctx, case, cell == big))
    weighted = ctx.spec.reference is not None and get_reference(ctx.spec.reference).example_weights is not None
    kept = "examples not ignored" if ctx.spec.ignore_label is not None else "every example"
    counted = {"examples": kept + (f", weighted as {ctx.spec.reference!r} weights them" if weighted else ""),
               "all rows": "all rows, ignored ones included (see the padding check)"}[chosen]
    return tally.result(
        passed=f"order, company and batch size leave per-example contributions unchanged (a mean counts {counted})",
        failed="the loss depends on the order, company or size of the batch", hint=HINT,
        details={"mean_counts": counted, "halves_shape": str(halves(big))},
    )


def _compiles(ctx: Context) -> list[tuple[str, str, Cell]]:
    """Every cell in float64, and the halves of the largest one (A and B of the size comparison)."""
    big = split_cell(ctx.cells)
    return planned(("float64",))(ctx) + [("vg", "float64", halves(big)),
                                         ("vg", "float64", Cell(big.n - big.n // 2, big.c, big.d))]


CHECK = Check(
    name="batch",
    summary="reordering, regrouping or splitting the batch leaves per-example contributions unchanged",
    run=_run,
    skip_hint=("legitimate for a loss normalised by something other than its examples "
               "(the number of positives, a running statistic)"),
    order=34,
    compiles=_compiles,
)
