"""``second-order`` (opt-in): Hessian-vector products by autodiff agree with finite differences of
the gradient, and a loss declared convex has a positive semi-definite Hessian in logits.

Notation and shapes: K cases, predictions z (K, *S) with the class axis last; D unit directions
v (K, D, *S); φ(z) = ⟨c, L(z)⟩ with a positive random cotangent c (so a sum of convex
per-example losses stays convex); g = ∇φ, H = ∇²φ.

Formulas:

    autodiff:  H v = ∇(∇φ · v), by reverse mode over reverse mode (custom_vjp losses too);
    oracle:    (∇φ(z + h v) − ∇φ(z − h v)) / 2h, Richardson-extrapolated element by element
               (:func:`lossguard._fd.richardson`), on one stack of every z ± h_l v;
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
from ..cases import CaseStack, concat
from ..evaluate import NoGradient
from ..references import get_reference
from ..result import CheckResult, Example
from ..tolerance import gamma, op_count
from ._base import Check, Context, never
from ._compare import replay
from .gradient import DIRECTIONS, special_cases
from .reference import case_scale, gradient_term_scale

__all__ = ["CHECK"]


def _point_grads(ctx: Context, stack: CaseStack, v: np.ndarray, h0: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Gradients of ⟨c, L⟩ at every z ± h_l v: (K, D, 2, J, *S)."""
    ev = ctx.evaluator
    parts = [ev.value_and_grad(pts, "float64", cotangent=c[cases])[1]  # each chunk used at once
             for cases, pts in _fd.point_stacks(stack, v, h0)]
    return np.concatenate(parts).reshape((-1, v.shape[1], 2, _fd.LEVELS) + stack.cell.pred_shape())


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
    v, labels = _fd.unit_directions(rng, k, shape, DIRECTIONS.get(ctx.effort, 3))
    if spec.inputs == "probabilities":  # keep every point inside [0, 1]
        v = v * np.minimum(z, 1.0 - z)[:, None]
        norm = np.sqrt(np.sum(v.reshape(v.shape[:2] + (-1,)) ** 2, axis=2))
        v = v / np.where(norm > 0, norm, 1.0).reshape(norm.shape + (1,) * len(shape))
    h0 = _fd.base_steps(z, v, spec.inputs)
    v = _fd.quantise(z, v, h0)
    d = v.shape[1]
    hv = np.stack([ev.hvp(stack, np.ascontiguousarray(v[:, j]), "float64", cotangent=c)[1] for j in range(d)], axis=1)
    g0 = ev.value_and_grad(stack, "float64", cotangent=c)[1]
    gp = _point_grads(ctx, stack, v, h0, c)
    lead = (k, d) + (1,) * len(shape)
    with np.errstate(all="ignore"):
        gmax = np.fmax.reduce(np.abs(np.concatenate([g0[:, None], gp.reshape((k, -1) + shape)], axis=1))
                              .reshape(k, -1), axis=1)  # nanmax without its warning
        eps = gamma(n, "float64") * (1.0 + scale) * (gmax + big_g)  # one gradient's rounding (normwise)
        steps = _fd.step_ladder(h0)  # (J, K, D)
        st = steps.reshape(steps.shape + (1,) * len(shape))
        samples = np.moveaxis(gp[:, :, 0] - gp[:, :, 1], 2, 0) / (2.0 * st)
        bounds = np.broadcast_to(eps.reshape((1, k) + (1,) * (1 + len(shape))) / st, samples.shape)
        est = _fd.richardson(samples, bounds, power=2)
        ok = _fd.consistent(samples, bounds, 2).reshape(k, d, -1).all(axis=2)
        ok &= np.isfinite(est.value).reshape(k, d, -1).all(axis=2)
        vmax = np.abs(v).reshape(k, d, -1).max(axis=2)
        hmax = np.fmax.reduce(np.abs(hv).reshape(k, d, -1), axis=2)  # nanmax without its warning
        a_h = gamma(n, "float64") * (1.0 + scale)[:, None] * (hmax + 3.0 * big_g[:, None] * vmax)
        tol = 2.0 * est.table_error + est.rounding + a_h.reshape(lead)
        err = np.abs(hv - est.value)
        ratio = (err / tol).reshape(k, d, -1).max(axis=2)
        bad = ok & ~(ratio <= 1.0)
    found["cases"] += k
    found["unjudged"] += int((~ok).sum())
    found["ratio"] = max(found["ratio"], float(np.nanmax(np.where(ok, ratio, 0.0))))
    for i, j in np.argwhere(bad)[:2]:
        e = int(np.nanargmax((err / tol)[i, j]))
        found["worst"].append(_example(ctx, stack, int(i), f"autodiff H v vs finite differences of the gradient, "
                                       f"{labels[j]}, element {np.unravel_index(e, shape)}",
                                       hv[i, j].reshape(-1)[e], est.value[i, j].reshape(-1)[e],
                                       tol[i, j].reshape(-1)[e]))
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


def _example(ctx: Context, stack: CaseStack, k: int, what: str, got: float, expected: float, tol: float) -> Example:
    err = abs(float(got) - float(expected))
    return Example(what=what, predictions=stack.predictions[k], targets=stack.targets[k], got=float(got),
                   expected=float(expected), abs_err=err, rel_err=err / abs(expected) if expected else err,
                   allowance=float(tol), note=stack.note(k),
                   replay=replay(ctx.spec, stack.predictions[k], stack.targets[k]))


def _convex_reference(ctx: Context) -> bool:
    spec = ctx.spec
    return bool(spec.reference and spec.inputs == "logits" and "convex" in get_reference(spec.reference).properties)


def _run(ctx: Context) -> CheckResult:
    t0 = time.perf_counter()
    ev = ctx.evaluator
    if not ev.has_autodiff:
        return CheckResult(name="second-order", verdict="skip",
                           summary="Hessian-vector products need a JAX-traceable loss (no autodiff here)")
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
    return CheckResult(
        name="second-order", verdict="fail" if found["failed"] else "pass", summary=summary,
        cases=found["cases"], failed=found["failed"],
        allowance=("finite differences of the gradient: 2 × Richardson table estimate + Σ|a_l| ε_g/h_l, "
                   "ε_g = γ_n(1 + S)(‖g‖∞ + G); autodiff H v: γ_n(1 + S)(‖Hv‖∞ + 3G‖v‖∞); curvature: "
                   "‖v‖₁ × that"),
        worst=sorted(found["worst"], key=lambda e: -e.abs_err / e.allowance if e.allowance else 0)[:3],
        hint="; ".join(hint),
        details={"directions_not_judged": found["unjudged"], "max_error_over_allowance": found["ratio"],
                 "convexity_checked": found["convex"],
                 "min_curvature": found["min_curvature"] if found["convex"] else None},
        seconds=time.perf_counter() - t0,
    )


CHECK = Check(
    name="second-order",
    summary="Hessian-vector products agree with finite differences of the gradient; convex means PSD",
    run=_run,
    default=never,
    skip_hint="skip when nothing differentiates the gradient (no second-order method, no curvature tool)",
    order=35,
)
