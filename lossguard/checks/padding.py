"""``padding``: examples carrying the ignore label are as good as absent.

Notation and shapes: logits ``z`` (N, C), class axis last, integer labels ``y`` (N,); ``ι`` the
declared ignore label; A the first h = N/2 examples of a case (a batch of its own, shape (h, C));
P = [A; h rows with label ι] the same examples padded back to N rows with random logits.

Formulas:

- L(P) = L(A) (per-example outputs: the first h values of P equal A's);
- ∇_A L(P) = ∇L(A): the real examples' gradients are unchanged by padding;
- ∂L/∂z_i = 0 exactly for every ignored example i (checked on P and on every battery case).

A mean that divides by all N rows instead of the examples kept, or a term (label smoothing's
uniform part, a regulariser) summed over ignored rows, breaks the first two; a mask applied by
multiplying after a non-finite intermediate breaks the third (0·nan = nan is left to the
``finite`` check; only a finite nonzero gradient counts here).

Error model: L(P) and L(A) are two roundings of the same sum (ignored rows contribute exact
zeros), so the value rule γ_n (|v| + max|z|) and the normwise gradient rule of
:mod:`lossguard.tolerance` apply with S the largest |logit| of the real rows. Zero gradients of
ignored rows are exact (a ``where`` or a multiplication by 0 both give exactly 0).

Example:
    >>> import jax, jax.numpy as jnp
    >>> from lossguard import declare, run
    >>> def mean_over_rows(z, y):  # divides by every row, ignored ones included
    ...     keep = y != -100
    ...     nll = -jnp.take_along_axis(jax.nn.log_softmax(z), jnp.where(keep, y, 0)[:, None], -1)[:, 0]
    ...     return jnp.where(keep, nll, 0.0).sum() / y.shape[0]
    >>> spec = declare(mean_over_rows, kind="categorical", ignore_label=-100)
    >>> run(spec, effort="quick", only=["padding"]).check("padding").verdict
    'fail'
"""

from __future__ import annotations

import numpy as np

from ._property import Part, Tally, mismatch_examples, value_and_grad
from ..cases import CaseStack, halves, join, split_cell, take_rows, to_inputs
from ..result import CheckResult, Example
from ..spec import LossSpec
from ..tolerance import op_count, rounding_allowance
from ._base import Check, Context, planned
from ._compare import mismatch, replay
from ._scales import case_scale, gradient_term_scale

__all__ = ["CHECK", "padding_parts"]

HINT = (
    "examples with the ignore label still count: the mean divides by every row instead of the "
    "examples kept, or a term (label smoothing's uniform part, a regulariser, a focal factor) is "
    "summed over ignored rows, or the mask lets gradient through. Mask every per-example term and "
    "divide by the number of examples kept. Skipping is legitimate only if padding rows are never "
    "passed to the loss"
)


def _ignored_gradient(spec: LossSpec, what: str, stack: CaseStack, g: np.ndarray, rows: np.ndarray) -> Part:
    """Ignored rows (K, N) must have an exactly zero gradient wherever it is finite."""
    k = len(stack)
    mask = rows.reshape(rows.shape + (1,) * (g.ndim - rows.ndim))
    leak = np.where(mask & np.isfinite(g), np.abs(g), 0.0)
    bad = np.any(leak.reshape(k, -1) > 0, axis=1)

    def examples(most: int) -> list[Example]:
        out = []
        for i in np.flatnonzero(bad)[:most]:
            out.append(Example(
                what=what, predictions=stack.predictions[i], targets=stack.targets[i],
                got=np.where(mask[i], g[i], 0.0), expected="0 on every ignored row",
                abs_err=float(leak[i].max()), allowance=0.0, note=stack.note(int(i)),
                replay=f"g = {replay(spec, stack.predictions[i], stack.targets[i])}\n"
                       f"# expected the gradient of g to be exactly 0 on rows labelled {spec.ignore_label}",
            ))
        return out

    return Part(what, bad, np.where(bad, np.inf, 0.0), "ignored rows: exactly 0 (where finite)", examples)


def padding_parts(ctx: Context, x: CaseStack, rng: np.random.Generator, with_padding: bool) -> list[Part]:
    """Zero gradients of ignored rows of ``x``; with ``with_padding``, A against P = [A; ignored]."""
    spec, ev = ctx.spec, ctx.evaluator
    ignore = spec.ignore_label
    parts: list[Part] = []
    v, g = value_and_grad(ctx, x)
    if g is not None:
        parts.append(_ignored_gradient(spec, "gradient of ignored examples", x, g, x.targets == ignore))
    if not with_padding:
        return parts
    k, cell = len(x), x.cell
    h = cell.n // 2
    a = take_rows(x, np.arange(h)[None].repeat(k, 0), halves(cell))
    scales = 10.0 ** rng.uniform(-1.0, 1.5, size=(k, 1, 1))  # padding rows at varied logit scales
    pad_z = to_inputs(spec, rng.standard_normal((k, cell.n - h, cell.c or 1)) * scales)
    pad = CaseStack(pad_z, np.full((k, cell.n - h), ignore, dtype=np.int64), halves(cell))
    p = join(a, pad, cell)
    va, ga = value_and_grad(ctx, a)
    vp, gp = value_and_grad(ctx, p)
    dtype = ev.computed_dtype("float64")
    n_ops = op_count(cell.n, cell.c or 1)
    s = case_scale(ctx, a.predictions)
    calls = [("a", a), ("p", p)]

    def add(what: str, got: np.ndarray, expected: np.ndarray, atol: np.ndarray, rule: str, relation: str) -> None:
        m = mismatch(got, expected, atol)
        parts.append(Part(what, m.case_bad, m.case_ratio, rule,
                          lambda most: mismatch_examples(spec, m, what, calls, relation, most=most)))

    got_v = vp[:, :h] if ev.output == "per_example" else vp
    a_v = rounding_allowance(va, s, dtype=dtype, n_ops=n_ops)
    add("value after appending ignored examples", got_v, va, a_v.atol, "value: " + a_v.rule,
        "p (a followed by ignored examples) to have a's value" + (" on a's rows" if ev.output == "per_example" else ""))
    if ga is not None and gp is not None:
        a_g = rounding_allowance(ga, s, dtype=dtype, n_ops=n_ops, normwise=True,
                                 grad_scale=gradient_term_scale(ctx, a.targets))
        add("real examples' gradient after appending ignored examples", gp[:, :h], ga, a_g.atol,
            "gradient: " + a_g.rule, "the gradient rows of a's examples in p to equal a's gradient")
        parts.append(_ignored_gradient(spec, "gradient of appended ignored examples", p, gp, p.targets == ignore))
    return parts


def _run(ctx: Context) -> CheckResult:
    tally = Tally("padding")
    big = split_cell(ctx.cells)
    tally.sweep(ctx, lambda cell, x: (padding_parts(ctx, x, ctx.rng(f"padding {cell}"), cell == big), None),
                lambda one: padding_parts(ctx, one, ctx.rng("padding search"), one.cell == big))
    return tally.result(
        passed=(f"examples labelled {ctx.spec.ignore_label} change neither value nor real gradients "
                    "and get zero gradient"),
        failed=f"examples labelled {ctx.spec.ignore_label} still affect the loss", hint=HINT,
        details={"padded_shape": str(big), "real_rows": big.n // 2},
    )


def _applies(spec: LossSpec) -> str | None:
    if spec.kind != "categorical":
        return f"applies to kind categorical, not {spec.kind}"
    return None if spec.ignore_label is not None else "no ignore label declared"


CHECK = Check(
    name="padding",
    summary="examples with the ignore label change neither value nor real gradients, and get zero gradient",
    run=_run,
    applies=_applies,
    skip_hint="legitimate only if padding rows never reach the loss",
    order=36,
    compiles=lambda ctx: planned(("float64",))(ctx) + [("vg", "float64", halves(split_cell(ctx.cells)))],
)
