"""``shift``: adding a constant to every logit of a row changes neither value nor gradient, and
every gradient row sums to zero.

Notation and shapes: logits ``z`` (N, C), class axis last; ``c`` a constant per row (N, 1);
``1`` the all-ones row; u the unit roundoff of the dtype the loss computed in.

Formula: softmax(z + c·1) = softmax(z) (numerator and denominator share the factor e^c), so a
loss that reads the logits only through the softmax has L(z + c·1) = L(z), and differentiating
along 1 gives Σ_c ∂L/∂z_ic = 0 for every row i. Shifts tried: a random constant per row (scale
1) and the whole batch by +1e3, +1e4 and −1e4, where an exponential without max subtraction
overflows or underflows. At large shapes (:func:`lossguard._budget.case_count`) the four are
packed into one shifted copy, its rows taking them in turn, so the check costs two evaluations
of each case rather than five.

Error model: the shifted logits are themselves rounded, |fl(z + c) − (z + c)| ≤ u (|z| + |c|), and
a stable evaluation cancels numbers of that size, so a correct implementation may move the value
by γ_n (|v| + max|z| + |c|) and the gradient by γ_n (1 + max|z| + |c|)(‖g‖∞ + G) (the rules of
:mod:`lossguard.tolerance` with S = max|z| + |c|): a shift by 1e4 costs about u·1e4 absolute.
Row sums add C terms of the gradient, so they are allowed C times the gradient's allowance.
Cases whose unshifted value is not finite are not judged (that is the ``finite`` check's job).

Example:
    >>> import jax
    >>> from lossguard import declare, run
    >>> def zloss(z, y):  # cross-entropy plus a z-loss: not shift invariant by design
    ...     ce = jax.nn.logsumexp(z, -1) - jax.numpy.take_along_axis(z, y[:, None], -1)[:, 0]
    ...     return (ce + 1e-4 * jax.nn.logsumexp(z, -1) ** 2).mean()
    >>> run(declare(zloss, kind="categorical"), effort="quick", only=["shift"]).check("shift").verdict
    'fail'

References:
    Blanchard, P., Higham, D. J. and Higham, N. J., "Accurately computing the log-sum-exp and
    softmax functions", IMA Journal of Numerical Analysis 41(4), 2021 (the shifted evaluation and
    its error bound).
"""

from __future__ import annotations

import numpy as np

from .._budget import case_count
from ._property import Part, Tally, mismatch_examples, value_and_grad
from ..cases import CaseStack, Cell
from ..result import CheckResult
from ..tolerance import op_count, rounding_allowance
from ._base import Check, Context, only, planned
from ._compare import mismatch
from ._scales import case_scale, gradient_term_scale

__all__ = ["CHECK", "shift_parts"]

#: (label, constant): ``None`` draws a random constant per row.
SHIFTS: tuple[tuple[str, float | None], ...] = (
    ("a random constant per row", None), ("+1e3", 1e3), ("+1e4", 1e4), ("-1e4", -1e4),
)

HINT = (
    "the value or gradient changed when a constant was added to every logit of a row, so the loss "
    "reads the logits other than through the softmax: an exponential without max subtraction "
    "(overflow at +1e3, 0/0 at -1e4), or a term in the logit level itself. A z-loss, a logit "
    "penalty or logit clipping is not shift invariant by design: skip shift for such a loss"
)


def _finite_cases(a: np.ndarray) -> np.ndarray:
    return np.all(np.isfinite(a.reshape(a.shape[0], -1)), axis=1)


def _shifts(stack: CaseStack, rng: np.random.Generator) -> list[tuple[str, np.ndarray]]:
    """(label, constants (K, N, 1)) of each shifted copy of ``stack`` to evaluate.

    One copy per entry of :data:`SHIFTS` while the budget affords them (the menu's shapes);
    at large shapes a single copy whose rows take the shifts in turn (row i the shift i mod 4).
    """
    k, n = len(stack), stack.cell.n
    if n >= len(SHIFTS) and case_count(len(SHIFTS) * k, stack.cell.elements(), least=1) < len(SHIFTS) * k:
        c = rng.uniform(-3.0, 3.0, size=(k, n, 1))
        turn = np.arange(n) % len(SHIFTS)
        for j, (_, const) in enumerate(SHIFTS):
            if const is not None:
                c[:, turn == j] = const
        return [("a shift per row (" + ", ".join(label for label, _ in SHIFTS) + ", in turn)", c)]
    return [(label, rng.uniform(-3.0, 3.0, size=(k, n, 1)) if const is None else np.full((k, n, 1), const))
            for label, const in SHIFTS]


def shift_parts(ctx: Context, stack: CaseStack, rng: np.random.Generator) -> tuple[list[Part], np.ndarray]:
    """The shift comparisons on one stack, and which cases were judged (finite unshifted value)."""
    spec = ctx.spec
    k, cell = len(stack), stack.cell
    v0, g0 = value_and_grad(ctx, stack)
    judged = _finite_cases(v0)
    scale = case_scale(ctx, stack.predictions)
    n_ops = op_count(cell.n, cell.c or 1)
    dtype = ctx.evaluator.computed_dtype("float64")
    g_terms = gradient_term_scale(ctx, stack.targets)
    parts: list[Part] = []

    def part(what: str, m, rule: str, calls, relation: str) -> Part:  # type: ignore[no-untyped-def]
        m.case_bad = m.case_bad & judged
        ratio = np.where(judged, m.case_ratio, 0.0)
        return Part(what, m.case_bad, ratio, rule,
                    lambda most: mismatch_examples(spec, m, what, calls, relation, most=most))

    if g0 is not None:
        a_g = rounding_allowance(g0, scale, dtype=dtype, n_ops=n_ops, normwise=True, grad_scale=g_terms)
        # Σ_c ∂L/∂z_ic = 0: C rounded terms, each within the gradient's allowance
        m = mismatch(g0.sum(axis=-1), np.zeros(g0.shape[:-1]), a_g.atol[..., 0] * (cell.c or 1))
        parts.append(part("gradient row sums", m, "row sums: C·" + a_g.rule, [("g", stack)],
                          "every row of the gradient of g to sum to 0"))
    for label, c in _shifts(stack, rng):
        shifted = stack.with_predictions(stack.predictions + c)
        v1, g1 = value_and_grad(ctx, shifted)
        s = scale + np.max(np.abs(c).reshape(k, -1), axis=1)  # the cancelling magnitude max|z| + |c|
        calls = [("a", stack), ("b", shifted)]
        a_v = rounding_allowance(v0, s, dtype=dtype, n_ops=n_ops)
        parts.append(part(f"value after adding {label}", mismatch(v1, v0, a_v.atol), "value: " + a_v.rule,
                          calls, "b == a (same value after the shift)"))
        if g0 is not None and g1 is not None:
            a_g = rounding_allowance(g0, s, dtype=dtype, n_ops=n_ops, normwise=True, grad_scale=g_terms)
            parts.append(part(f"gradient after adding {label}", mismatch(g1, g0, a_g.atol),
                              "gradient: " + a_g.rule, calls, "the gradients at b and a to be equal"))
    return parts, judged


def _judged_parts(ctx: Context, cell: Cell, stack: CaseStack) -> tuple[list[Part], np.ndarray]:
    parts, judged = shift_parts(ctx, stack, ctx.rng(f"shift {cell}"))
    return parts, ~judged


def _run(ctx: Context) -> CheckResult:
    tally = Tally("shift")
    tally.sweep(ctx, lambda cell, stack: _judged_parts(ctx, cell, stack),
                lambda one: shift_parts(ctx, one, ctx.rng("shift search"))[0])
    return tally.result(
        passed="value and gradient unchanged by row shifts (random, +1e3, +1e4, -1e4), gradient rows sum to 0",
        failed="value or gradient changed under a row shift", hint=HINT,
        details={"shifts": [label for label, _ in SHIFTS]},
    )


CHECK = Check(
    name="shift",
    summary="adding a constant to a row of logits leaves value and gradient unchanged; gradient rows sum to 0",
    run=_run,
    applies=only("categorical", "distribution", inputs="logits"),
    skip_hint="legitimate for a loss with a deliberate logit-level term (z-loss, logit penalty, logit clipping)",
    order=30,
    compiles=planned(("float64",)),
)
