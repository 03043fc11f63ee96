"""``proper``: predicting the target distribution minimises the expected loss.

Notation and shapes: q a target distribution in the interior of the simplex (every class > 0);
z* = log q its logits (binary: logit q), p = softmax(z) (binary: σ(z)); E(z) = E_{y~q} ℓ(z, y)
the expected loss. How E is formed from the loss's own inputs, keeping the menu's shapes:

- categorical (N, C): every row predicts the same z; class c is the label of m_c ≥ 1 rows, so a
  mean over rows is E(z) for q = m/N (the gradient with respect to the shared z is the sum of
  the rows' gradients);
- binary (N,) or (N, D): the same with 0/1 targets, one q per column;
- distribution (N, C): each row i carries its own q_i as the target: E is the loss itself.

Formula: ℓ is (strictly) proper when E is minimised at p = q, i.e. ∇E(z*) = 0 (in logits; for
probability inputs the gradient is mapped back through the softmax or sigmoid Jacobian,
g_z = p ⊙ (g_p − ⟨p, g_p⟩) or p (1 − p) g_p) and z* is a local minimum: E(z* + h d) ≥ E(z*)
along random directions d, h = 1e-3.

For a loss that is not proper (focal loss with γ > 0, label smoothing with ε > 0, a class weight)
the check reports the distortion: the prediction p̂ at which E is actually minimised, found by
gradient descent with backtracking from z*, next to q (label smoothing predicts
(1 − ε) q + ε/C; focal loss predicts something closer to uniform).

When it runs: by default for a declared reference known to be proper (categorical_ce,
kl_divergence, bce with their default parameters); otherwise only with ``expect``. Per shape it
draws as many target distributions as the battery has standard cases, fewer at a large shape
(:func:`lossguard._budget.case_count`), each costing 1 + :data:`DIRECTIONS` evaluations.

Error model: ∇E(z*) is a sum of terms of size T = Σ_rows |g_row| that cancel exactly, so it may
round to γ_n (1 + max|z|)·T (the normwise rule of :mod:`lossguard.tolerance` with an exact value
of 0); the values E(z* ± h d) and E(z*) are compared with the value rule on both.

Example:
    >>> from lossguard import declare, run
    >>> from lossguard.references import REFERENCES
    >>> ref = REFERENCES["smoothed_ce"]
    >>> def smoothed(z, y):
    ...     return ref.jax_per_example(z, y, epsilon=0.1).mean()
    >>> spec = declare(smoothed, kind="categorical", expect=["proper"])
    >>> run(spec, effort="quick", only=["proper"]).check("proper").verdict
    'fail'

References:
    Gneiting, T. and Raftery, A. E., "Strictly Proper Scoring Rules, Prediction, and
    Estimation", Journal of the American Statistical Association 102(477), 2007.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from .._budget import case_count
from ._property import Part, Tally, mismatch_examples, value_and_grad
from ..cases import CaseStack, Cell, to_inputs
from ..references import get_reference
from ..result import CheckResult, Example
from ..spec import LossSpec
from ..strategies import simplex_targets
from ..tolerance import op_count, rounding_allowance
from ._base import Check, Context, planned
from ._compare import fmt, mismatch
from ._scales import gradient_term_scale

__all__ = ["CHECK", "build", "expected_gradient", "minimiser", "proper_parts"]

STEP = 1e-3
DIRECTIONS = 4
DESCENT_STEPS = 200

HINT = (
    "the expected loss under a target distribution q is not minimised by predicting q: the loss "
    "distorts probabilities (focal loss, label smoothing, class weights and margins do so by "
    "design; their minimiser is shown). Skip proper for such a loss; for a loss meant to be a "
    "proper scoring rule (cross-entropy, KL, BCE) look for a wrong target, weight or temperature"
)


def _softmax(z: np.ndarray) -> np.ndarray:
    e = np.exp(z - z.max(axis=-1, keepdims=True))  # softmax(z) = softmax(z − max z)
    return e / e.sum(axis=-1, keepdims=True)


def _sigmoid(z: np.ndarray) -> np.ndarray:
    return np.exp(-np.logaddexp(0.0, -z))  # σ(z) = exp(−softplus(−z))


def probabilities(spec: LossSpec, w: np.ndarray) -> np.ndarray:
    return _sigmoid(w) if spec.kind == "binary" else _softmax(w)


def target_of(spec: LossSpec, raw: np.ndarray, n: int) -> np.ndarray:
    """q per case: counts / N (categorical, binary) or the target rows (distribution)."""
    return raw if spec.kind == "distribution" else raw / float(n)


def start(spec: LossSpec, raw: np.ndarray, n: int) -> np.ndarray:
    """z* = log q (binary: logit q) in the shape of the free parameter."""
    q = target_of(spec, raw, n)
    return np.log(q) - np.log1p(-q) if spec.kind == "binary" else np.log(q)  # logit q = log q − log(1 − q)


def build(spec: LossSpec, cell: Cell, raw: np.ndarray, w: np.ndarray) -> CaseStack:
    """The stack whose loss is E at logits ``w`` for targets ``raw`` (see the module doc)."""
    k, n = raw.shape[0], cell.n
    if spec.kind == "distribution":
        return CaseStack(to_inputs(spec, w), raw, cell)
    rows = np.arange(n)[None, :, None]
    if spec.kind == "categorical":
        ends = np.cumsum(raw, axis=1)[:, None, :]  # rows [end_{c−1}, end_c) carry label c
        labels = np.sum(rows >= ends, axis=2).astype(np.int64)
        return CaseStack(to_inputs(spec, np.repeat(w[:, None, :], n, axis=1)), labels, cell)
    y = (rows < raw[:, None, :]).astype(np.float64)  # the first m_j rows of column j are positives
    z = np.repeat(w[:, None, :], n, axis=1)
    if cell.d is None:
        y, z = y[..., 0], z[..., 0]
    return CaseStack(to_inputs(spec, z), y, cell)


def expected_gradient(spec: LossSpec, stack: CaseStack, g: np.ndarray) -> np.ndarray:
    """∇E in logits per case: rows sharing a prediction are summed (see the module doc)."""
    if spec.inputs == "probabilities":
        p = stack.predictions
        if spec.kind == "binary":
            g = p * (1.0 - p) * g  # dσ/dz = σ (1 − σ)
        else:
            g = p * (g - np.sum(p * g, axis=-1, keepdims=True))  # softmax Jacobian diag(p) − p pᵀ
    if spec.kind == "binary" and stack.cell.d is None:
        g = g[..., None]
    return g if spec.kind == "distribution" else g.sum(axis=1)


def _expected_values(v: np.ndarray) -> np.ndarray:
    return v.reshape(v.shape[0], -1).sum(axis=1)


def proper_parts(ctx: Context, cell: Cell, raw: np.ndarray, rng: np.random.Generator) -> list[Part]:
    """Zero expected gradient and a local minimum at z* = log q, for each case of ``raw``."""
    spec = ctx.spec
    k = raw.shape[0]
    w = start(spec, raw, cell.n)
    stack = build(spec, cell, raw, w)
    v, g = value_and_grad(ctx, stack)
    dtype = ctx.evaluator.computed_dtype("float64")
    n_ops = op_count(cell.n, cell.c or cell.d or 1)
    s = np.max(np.abs(w.reshape(k, -1)), axis=1) if spec.inputs == "logits" else np.ones(k)
    parts = []
    if g is not None:
        grad = expected_gradient(spec, stack, g)
        # terms of size G per row cancel (p − q); rows sharing a prediction add N of them
        terms = gradient_term_scale(ctx, stack.targets) * (1 if spec.kind == "distribution" else cell.n)
        # the exact value is 0: only the rounding of the cancelling terms remains
        a = rounding_allowance(np.zeros_like(grad), s, dtype=dtype, n_ops=n_ops, normwise=True, grad_scale=terms)
        m = mismatch(grad, np.zeros_like(grad), a.atol)
        parts.append(Part("expected gradient at the target", m.case_bad, m.case_ratio, "gradient: " + a.rule,
                          lambda most: mismatch_examples(spec, m, "expected gradient at the target", [("E", stack)],
                                                         "the gradient of E (rows sharing a prediction summed) to be 0",
                                                         most=most)))
    e0 = _expected_values(v)
    for j in range(DIRECTIONS):
        d = rng.standard_normal(w.shape)
        d /= np.max(np.abs(d.reshape(k, -1)), axis=1).reshape((k,) + (1,) * (w.ndim - 1))
        moved = build(spec, cell, raw, w + STEP * d)
        e1 = _expected_values(value_and_grad(ctx, moved)[0])
        a = rounding_allowance(e0, s + STEP, dtype=dtype, n_ops=n_ops)
        with np.errstate(invalid="ignore"):
            bad = ~(e1 >= e0 - a.atol)
        m = mismatch(np.where(bad, e1, e0), e0, a.atol)  # only a decrease counts
        parts.append(Part("expected loss near the target", bad, np.where(bad, m.case_ratio, 0.0), "value: " + a.rule,
                          lambda most, m=m, moved=moved: mismatch_examples(
                              spec, m, "expected loss near the target", [("at_target", stack), ("nearby", moved)],
                              "nearby >= at_target (the target is a local minimum)", most=most)))
    return parts


def minimiser(ctx: Context, cell: Cell, raw: np.ndarray) -> np.ndarray:
    """Probabilities p̂ minimising E for each case, by gradient descent with backtracking."""
    spec = ctx.spec
    w = start(spec, raw, cell.n)
    eta = np.ones(raw.shape[0])
    for _ in range(DESCENT_STEPS):
        stack = build(spec, cell, raw, w)
        v, g = value_and_grad(ctx, stack)
        if g is None:
            break
        grad = expected_gradient(spec, stack, g)
        shape = (len(w),) + (1,) * (w.ndim - 1)
        trial = w - eta.reshape(shape) * grad
        better = _expected_values(value_and_grad(ctx, build(spec, cell, raw, trial))[0]) <= _expected_values(v)
        w = np.where(better.reshape(shape), trial, w)
        eta = np.where(better, eta * 1.5, eta / 2.0)  # grow after a success, halve after a failure
    return probabilities(spec, w)


def _draw(spec: LossSpec, cell: Cell, rng: np.random.Generator, k: int) -> np.ndarray:
    n, c = cell.n, cell.c or 1
    if spec.kind == "distribution":
        q = np.maximum(rng.dirichlet(np.full(c, 2.0), size=(k, n)), 0.02)
        return q / q.sum(axis=-1, keepdims=True)
    if spec.kind == "categorical":
        return 1 + np.stack([rng.multinomial(n - c, rng.dirichlet(np.ones(c))) for _ in range(k)])
    return rng.integers(1, n, size=(k, cell.d or 1))


def _strategy(spec: LossSpec, cell: Cell) -> st.SearchStrategy[np.ndarray]:
    n, c = cell.n, cell.c or 1
    if spec.kind == "distribution":
        return simplex_targets(n, c, one_hot=False, zeros=False)
    if spec.kind == "binary":
        return hnp.arrays(np.int64, (cell.d or 1,), elements=st.integers(1, n - 1))

    def counts(q: np.ndarray) -> np.ndarray:
        share = q[0] * (n - c)
        m = np.floor(share).astype(np.int64)
        m[np.argsort(m - share)[: n - c - int(m.sum())]] += 1  # largest remainders get the rest
        return 1 + m

    return simplex_targets(1, c, one_hot=False, zeros=False).map(counts)


def _describe(spec: LossSpec, q: np.ndarray, p: np.ndarray) -> str:
    row = (lambda a: a[0]) if spec.kind == "distribution" else (lambda a: a)
    return f"target {fmt(row(q), 4)}: the expected loss is minimised predicting {fmt(row(p), 4)}"


def _run(ctx: Context) -> CheckResult:
    spec = ctx.spec
    tally = Tally("proper")
    failing: tuple[Cell, np.ndarray, np.ndarray] | None = None
    usable = [c for c in ctx.cells if spec.kind != "categorical" or c.n >= (c.c or 1)]
    for cell in usable:
        # as many target distributions as the battery has standard cases, fewer for a large cell
        k = case_count(len(ctx.standard_cases(cell)), cell.elements())
        raw = _draw(spec, cell, ctx.rng(f"proper {cell}"), k)
        parts = proper_parts(ctx, cell, raw, ctx.rng(f"proper directions {cell}"))
        tally.add(parts, k)
        bad = np.any([p.bad for p in parts], axis=0)
        if failing is None and bad.any():
            failing = (cell, raw, bad)
    details: dict[str, Any] = {"cells": [str(c) for c in usable]}
    failed = "the target distribution does not minimise the expected loss"
    if failing is not None:
        cell, raw, bad = failing
        k = len(raw)
        tally.shrink(ctx, _strategy(spec, cell), lambda r: proper_parts(
            ctx, cell, np.repeat(np.asarray(r)[None], k, axis=0), ctx.rng("proper search")))
        p_hat = minimiser(ctx, cell, raw)
        q = target_of(spec, raw, cell.n)
        gap = np.max(np.abs(p_hat - q).reshape(k, -1), axis=1)
        worst = int(np.flatnonzero(bad)[np.argmax(gap[bad])])
        details["distortion"] = [{"target": q[i].tolist(), "minimiser_predicts": p_hat[i].tolist()}
                                 for i in np.flatnonzero(bad)[:3]]
        details["largest_distortion"] = float(gap[worst])
        failed += f" ({_describe(spec, q[worst], p_hat[worst])}, a distortion of {gap[worst]:.3g})"
        at_target = build(spec, cell, raw[worst:worst + 1], start(spec, raw[worst:worst + 1], cell.n))
        tally.worst.insert(1 if tally.search.startswith("shrunk") else 0, Example(
            what="minimiser of the expected loss", predictions=at_target.predictions[0],
            targets=at_target.targets[0], got=p_hat[worst], expected=q[worst], abs_err=float(gap[worst]),
            note=_describe(spec, q[worst], p_hat[worst]) + " (gradient descent from the target)"))
    return tally.result(passed="the target distribution minimises the expected loss (zero gradient, local minimum)",
                        failed=failed, hint=HINT, details=details)


def _is_default(value: Any, default: Any) -> bool:
    if value is None or default is None:
        return value is default
    try:
        return bool(np.shape(value) == np.shape(default) and np.all(np.asarray(value) == np.asarray(default)))
    except (TypeError, ValueError):
        return False


def _default(spec: LossSpec) -> bool:
    """On for a reference known to be proper, used with its default parameters (a class weight or
    a positive-class weight makes cross-entropy improper)."""
    if spec.reference is None:
        return False
    ref = get_reference(spec.reference)
    defaults = {p.name: p.default for p in ref.params}
    return "proper" in ref.properties and all(
        k in defaults and _is_default(v, defaults[k]) for k, v in spec.params.items())


CHECK = Check(
    name="proper",
    summary=("predicting the target distribution gives zero expected gradient and a local minimum "
             "(by default only for references known to be proper)"),
    run=_run,
    default=_default,
    skip_hint="legitimate for losses that distort probabilities by design (focal loss, label smoothing, class weights)",
    order=42,
    compiles=planned(("float64",)),
)
