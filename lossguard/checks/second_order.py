"""``second-order`` (opt-in): Hessian-vector products by autodiff agree with finite differences of
the gradient, and a loss declared convex has a positive semi-definite Hessian in logits.

Notation and shapes: K cases, predictions z (K, *S) with the class axis last; D unit directions
v (K, D, *S); φ(z) = ⟨c, L(z)⟩ with a positive random cotangent c (so a sum of convex
per-example losses stays convex); g = ∇φ, H = ∇²φ.

Formulas:

    autodiff:  H v = ∇(∇φ · v), by reverse mode over reverse mode (custom_vjp losses too);
    oracle:    (∇φ(z + h v) − ∇φ(z − h v)) / 2h, Richardson-extrapolated element by element
               (:func:`lossguard._fd.richardson`), one direction and one block of elements at
               a time, from the gradients at every z ± h_l v, streamed and kept only as the
               differences (one case at a time for large cases: ``_budget.large_case``; at
               (4096, 1000) logits that took the check from 71 s and 20 GB to 17 s and 1.9 GB);
    convexity: vᵀ H v ≥ 0 for every v when the declared reference is convex in logits.

Tolerances: finite differences 2 × the table estimate + Σ|a_l| ε_g/h_l, with ε_g = γ_n(1 + S)
(‖g‖∞ + G) the normwise rounding bound of one gradient (:mod:`lossguard.tolerance`);
autodiff H v: γ_n(1 + S)(‖Hv‖∞ + 3 G ‖v‖∞) — for softmax-type losses each element of H v is
p_i v_i − p_i (p·v), two terms of size at most G‖v‖∞ whose p carry a relative error γ_n(1 + S).
Points where the gradient itself has a kink within the step range are not judged.

Why opt-in: a training loop needs first derivatives only; second-order methods, influence
functions and curvature-based tools need these, and they cost one more compilation.

Example:
    >>> import jax, jax.numpy as jnp
    >>> from lossguard import declare, run
    >>> def ce(z, y):
    ...     return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1))
    >>> spec = declare(ce, kind="categorical", reference="categorical_ce", expect=["second-order"])
    >>> run(spec, effort="quick", only=["second-order"]).check("second-order").verdict
    'pass'

References:
    Pearlmutter, B. A., "Fast exact multiplication by the Hessian", Neural Computation 6(1),
    1994 (Hessian-vector products by differentiating the gradient). Boyd, S. and
    Vandenberghe, L., "Convex Optimization", Cambridge University Press, 2004 (§3.1.4: a twice
    differentiable function is convex iff its Hessian is positive semi-definite).
"""

from __future__ import annotations

import time

import numpy as np

from .. import _fd
from .._budget import large_case
from ..cases import CaseStack, concat
from ..evaluate import NoGradient
from ..references import get_reference
from ..result import CheckResult, Example
from ..tolerance import gamma, op_count
from ._base import Check, Context, conclude, never
from ._compare import replay
from ._gradient_parts import special_cases
from ._scales import case_scale, gradient_term_scale

__all__ = ["CHECK"]


def _point_differences(ctx: Context, stack: CaseStack, v: np.ndarray, h0: np.ndarray, c: np.ndarray
                       ) -> tuple[np.ndarray, np.ndarray]:
    """∇φ(z + h_l v) − ∇φ(z − h_l v) at every step, and each case's largest |gradient entry|.

    Shapes: ``v`` (K, D, *S), ``h0`` (K, D), cotangents ``c`` (K, *out) → differences
    (K, D, J, *S) and the maxima (K,). The gradients at the points arrive a few at a time
    (:func:`lossguard._fd.point_stacks`) and are kept only until their partner on the other
    side is in: half the memory of keeping them all, and no copy of them into one array.
    """
    ev = ctx.evaluator
    k, d, levels = v.shape[0], v.shape[1], _fd.LEVELS
    diffs = np.empty((k, d, levels) + stack.cell.pred_shape())
    gmax = np.full(k, np.nan)
    plus: dict[tuple[int, int, int], np.ndarray] = {}
    q = 0  # flat index of the next point in the order (case, direction, side, level)
    for cases, pts in _fd.point_stacks(stack, v, h0):
        grads = ev.value_and_grad(pts, "float64", cotangent=c[cases])[1]
        for g in grads:
            i, j, side, level = np.unravel_index(q, (k, d, 2, levels))
            q += 1
            with np.errstate(invalid="ignore"):
                gmax[i] = np.fmax(gmax[i], np.fmax.reduce(np.abs(g).reshape(-1)))  # nanmax without its warning
            if side == 0:
                plus[(i, j, level)] = g
            else:
                np.subtract(plus.pop((i, j, level)), g, out=diffs[i, j, level])
    return diffs, gmax


def _probe(ctx: Context, stack: CaseStack, found: dict) -> None:
    spec, ev = ctx.spec, ctx.evaluator
    rng = ctx.rng(f"second-order {stack.cell}")
    stack = stack.with_predictions(_fd.snap(stack.predictions))
    z, cell = stack.predictions, stack.cell
    k, shape = len(stack), cell.pred_shape()
    out = ev.cotangent_shape(stack)
    c = rng.uniform(0.5, 2.0, size=(k,) + out)
    cmax = np.abs(c).reshape(k, -1).max(axis=1)
    scale = case_scale(ctx, z)
    n = op_count(cell.n, cell.c or cell.d or 1)
    big_g = gradient_term_scale(ctx, stack.targets) * cmax
    v, labels = _fd.unit_directions(rng, k, shape, ctx.effort.directions)
    if spec.inputs == "probabilities":  # keep every point inside [0, 1]
        v = v * np.minimum(z, 1.0 - z)[:, None]
        norm = np.sqrt(np.sum(v.reshape(v.shape[:2] + (-1,)) ** 2, axis=2))
        v = v / np.where(norm > 0, norm, 1.0).reshape(norm.shape + (1,) * len(shape))
    h0 = _fd.base_steps(z, v, spec.inputs)
    v = _fd.quantise(z, v, h0)
    # every draw above is made for the whole stack; large cases are then judged one at a time
    # (a whole stack of their point gradients is (K, D, 2, J, *S): 2.3 GB at (4096, 1000) logits)
    groups = [[i] for i in range(k)] if large_case(cell.elements()) else [list(range(k))]
    for idx in groups:
        _judge(ctx, stack.take(idx), found, c[idx], scale[idx], big_g[idx], v[idx], h0[idx], labels, n)


def _judge(ctx: Context, stack: CaseStack, found: dict, c: np.ndarray, scale: np.ndarray, big_g: np.ndarray,
           v: np.ndarray, h0: np.ndarray, labels: list[str], n: int) -> None:
    """H v against finite differences of the gradient (and the curvature) for the cases of
    ``stack``, with their draws: cotangents ``c`` (K, *out), directions ``v`` (K, D, *S) and base
    steps ``h0`` (K, D). The Richardson tables are built one direction and one block at a time."""
    ev = ctx.evaluator
    k, d, shape = len(stack), v.shape[1], stack.cell.pred_shape()
    hv = np.stack([ev.hvp(stack, np.ascontiguousarray(v[:, j]), "float64", cotangent=c)[1] for j in range(d)], axis=1)
    g0 = ev.value_and_grad(stack, "float64", cotangent=c)[1]
    diffs, gp_max = _point_differences(ctx, stack, v, h0, c)
    ok, ratio = np.empty((k, d), bool), np.empty((k, d))
    worst_at: dict[tuple[int, int], tuple[int, float, float, float]] = {}
    with np.errstate(all="ignore"):
        gmax = np.fmax(np.fmax.reduce(np.abs(g0).reshape(k, -1), axis=1), gp_max)  # nanmax without its warning
        eps = gamma(n, "float64") * (1.0 + scale) * (gmax + big_g)  # one gradient's rounding (normwise)
        steps = _fd.step_ladder(h0)  # (J, K, D)
        vmax = np.abs(v).reshape(k, d, -1).max(axis=2)
        hmax = np.fmax.reduce(np.abs(hv).reshape(k, d, -1), axis=2)  # nanmax without its warning
        a_h = gamma(n, "float64") * (1.0 + scale)[:, None] * (hmax + 3.0 * big_g[:, None] * vmax)
        for j in range(d):  # one direction at a time, in blocks of elements: see _tables
            ok[:, j], ratio[:, j], worst = _tables(diffs[:, j], hv[:, j], steps[:, :, j], eps, a_h[:, j])
            for i in range(k):
                worst_at[(i, j)] = worst[i]
        bad = ok & ~(ratio <= 1.0)
    found["cases"] += k
    found["unjudged"] += int((~ok).sum())
    found["ratio"] = max(found["ratio"], float(np.nanmax(np.where(ok, ratio, 0.0))))
    for i, j in np.argwhere(bad)[:2]:
        e, got, expected, tol_e = worst_at[(int(i), int(j))]
        found["worst"].append(_example(ctx, stack, int(i), f"autodiff H v vs finite differences of the gradient, "
                                       f"{labels[j]}, element {np.unravel_index(e, shape)}", got, expected, tol_e))
    found["hvp"] += int(bad.any(axis=1).sum())
    failed = bad.any(axis=1)
    if found["convex"]:
        q = np.sum((v * hv).reshape(k, d, -1), axis=2)  # vᵀ H v along each direction
        q_tol = np.abs(v).reshape(k, d, -1).sum(axis=2) * a_h
        neg = ~(q >= -q_tol)
        found["min_curvature"] = min(found["min_curvature"], float(np.nanmin(q)))
        for i, j in np.argwhere(neg)[:2]:
            found["worst"].append(_example(ctx, stack, int(i), f"curvature vᵀ H v along {labels[j]} "
                                           f"(a convex loss has vᵀ H v ≥ 0)", q[i, j], 0.0, q_tol[i, j]))
        found["psd"] += int(neg.any(axis=1).sum())
        failed |= neg.any(axis=1)
    found["failed"] += int(failed.sum())


#: Elements per block of the Richardson tables: each table holds about ten entries per element, so a
#: block of 2^16 keeps its arrays a few megabytes instead of gigabytes; on whole (4096, 1000)
#: gradients the same tables took 4× as long (measured here), with the same numbers bit for bit
#: (every step is element by element).
BLOCK = 1 << 16


def _tables(diffs: np.ndarray, hv: np.ndarray, steps: np.ndarray, eps: np.ndarray, a_h: np.ndarray
            ) -> tuple[np.ndarray, np.ndarray, list[tuple[int, float, float, float]]]:
    """H v against the extrapolated central differences of the gradient along one direction.

    Args:
        diffs: ∇φ(z + h_l v) − ∇φ(z − h_l v), (K, J, *S). hv: autodiff H v, (K, *S). steps: h_l (J, K).
        eps: one gradient's rounding bound per case (K,). a_h: the allowance of H v per case (K,).
    Returns:
        (judged (K,), largest error over allowance (K,; nan if any element's is), and per case
        the worst element: (flat index, H v, the estimate, the allowance there)).
    """
    k, levels = diffs.shape[:2]
    diff = diffs.reshape(k, levels, -1)  # (K, J, M)
    hv = hv.reshape(k, -1)
    st = steps[:, :, None]  # (J, K, 1)
    ok, ratio = np.ones(k, bool), np.full(k, -np.inf)
    best = np.full(k, -np.inf)
    worst: list[tuple[int, float, float, float]] = [(0, np.nan, np.nan, np.nan)] * k
    rows = np.arange(k)
    for a in range(0, diff.shape[2], BLOCK):
        samples = np.moveaxis(diff[:, :, a:a + BLOCK], 1, 0) / (2.0 * st)  # (J, K, m): central differences
        bounds = np.broadcast_to(eps[None, :, None] / st, samples.shape)
        est = _fd.richardson(samples, bounds, power=2)
        ok &= _fd.consistent(samples, bounds, 2).all(axis=1) & np.isfinite(est.value).all(axis=1)
        tol = 2.0 * est.table_error + est.rounding + a_h[:, None]
        over = np.abs(hv[:, a:a + BLOCK] - est.value) / tol
        ratio = np.maximum(ratio, over.max(axis=1))  # a nan anywhere stays nan, as a whole-row max
        seen = np.where(np.isnan(over), -np.inf, over)
        e = np.argmax(seen, axis=1)  # the first largest, as nanargmax over the whole row
        top = seen[rows, e]
        for i in np.flatnonzero(top > best):
            best[i] = top[i]
            worst[i] = (a + int(e[i]), float(hv[i, a + e[i]]), float(est.value[i, e[i]]), float(tol[i, e[i]]))
    return ok, ratio, worst


def _example(ctx: Context, stack: CaseStack, k: int, what: str, got: float, expected: float, tol: float) -> Example:
    err = abs(float(got) - float(expected))
    return Example(what=what, predictions=stack.predictions[k], targets=stack.targets[k], got=float(got),
                   expected=float(expected), abs_err=err, rel_err=err / abs(expected) if expected else err,
                   allowance=float(tol), note=stack.note(k),
                   replay=replay(ctx.spec, stack.predictions[k], stack.targets[k]))


def _convex_reference(ctx: Context) -> bool:
    spec = ctx.spec
    return bool(spec.reference and spec.inputs == "logits" and "convex" in get_reference(spec.reference).properties)


#: the allowance rule of the check, in words
ALLOWANCE = ("finite differences of the gradient: 2 × Richardson table estimate + Σ|a_l| ε_g/h_l, "
             "ε_g = γ_n(1 + S)(‖g‖∞ + G); autodiff H v: γ_n(1 + S)(‖Hv‖∞ + 3G‖v‖∞); "
             "curvature: ‖v‖₁ × that")


def _run(ctx: Context) -> CheckResult:
    ev = ctx.evaluator
    if not ev.capabilities.second_order:
        return CheckResult(name="second-order", verdict="skip",
                           summary="Hessian-vector products need autodiff (a JAX-traceable or torch loss)")
    found: dict = {"cases": 0, "failed": 0, "hvp": 0, "psd": 0, "unjudged": 0, "ratio": 0.0, "worst": [],
                   "convex": _convex_reference(ctx), "min_curvature": np.inf}
    try:
        for cell in ctx.cells:
            _probe(ctx, concat([ctx.standard_cases(cell), special_cases(ctx, cell)]), found)
    except NoGradient as exc:
        return CheckResult(name="second-order", verdict="skip", summary=str(exc))
    convex = (f"; curvature vᵀHv ≥ 0 as reference {ctx.spec.reference!r} is convex "
              f"(smallest {found['min_curvature']:.3g})") if found["convex"] else ""
    parts = [f"H v differs from finite differences on {found['hvp']}" if found["hvp"] else "",
             f"negative curvature on {found['psd']}" if found["psd"] else ""]
    if found["failed"]:
        summary = f"second derivatives wrong on {found['failed']} of {found['cases']} cases: " + \
            ", ".join(p for p in parts if p)
    else:
        summary = (f"autodiff H v agrees with finite differences of the gradient on {found['cases']} cases "
                   f"(largest error {found['ratio']:.2g} of its allowance, {found['unjudged']} directions near "
                   f"a kink not judged){convex}")
    hint = []
    if found["hvp"]:
        hint.append("the gradient's own derivative is wrong: a backward pass that is right in value but "
                    "not differentiable as written (stop_gradient, a callback, a custom rule without its own rule)")
    if found["psd"]:
        hint.append(f"the loss is not convex where reference {ctx.spec.reference!r} is: a different formula "
                    "(a squared or clipped probability, a non-log score)")
    return conclude("second-order", summary=summary, cases=found["cases"], failed=found["failed"], allowance=ALLOWANCE,
                    worst=sorted(found["worst"], key=lambda e: -e.abs_err / e.allowance if e.allowance else 0),
                    hint="; ".join(hint),
                    details={"directions_not_judged": found["unjudged"], "max_error_over_allowance": found["ratio"],
                             "convexity_checked": found["convex"],
                             "min_curvature": found["min_curvature"] if found["convex"] else None})


CHECK = Check(
    name="second-order",
    summary="Hessian-vector products agree with finite differences of the gradient; convex means PSD",
    run=_run,
    default=never,
    skip_hint="skip when nothing differentiates the gradient (no second-order method, no curvature tool)",
    order=35,
)
