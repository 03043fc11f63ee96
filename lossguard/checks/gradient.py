"""``gradient``: every gradient oracle agrees with float64 finite differences, and with each other.

Notation and shapes: a stack of K cases, predictions z (K, *S) with the class axis last; D
directions v (K, D, *S) per case (dense random, one random row; all coordinate axes for tiny
cases); J = 4 halving steps. The scalar studied per case is φ(z) = ⟨c, L(z)⟩ with a random
cotangent c (a positive scale for scalar losses, a Gaussian vector for per-example losses), so a
backward pass that ignores or mis-broadcasts its incoming cotangent is caught.

Oracles compared (all in float64, on whole stacks):

- reverse mode (the VJP with c) · v against central finite differences of φ along v
  (Richardson table, :mod:`lossguard._fd`); where the one-sided differences disagree the point
  is a kink, and the autodiff value need only lie between the two one-sided derivatives;
- forward mode (JVP along v) against reverse mode, so the two autodiff modes agree (on the last
  stack only: forward mode is a compiled function of its own);
- a declared closed-form ``grad`` · v against finite differences of Σ L (the gradient of the
  sum of the outputs; for numpy losses it *is* the reverse oracle);
- the registry's hand-derived gradient against reverse mode, when a reference is declared;
- per-example outputs: the VJP with a one-hot cotangent e_i vanishes outside row i;
- float32: reverse mode in float32 against reverse mode in float64 on the same float32-rounded
  cases (finite values only; non-finite float32 gradients are the ``finite`` check's business),
  at the shapes of ``Context.cells_for("float32")``.

Cases: the battery's random and extreme-ladder cases plus special points where implementations
branch: all-zero logits, exact ties (with and without the labelled class), exact zeros among
random logits, and the thresholds where stable formulas switch branches (common practice: 15,
20 and 30 logits). Before use predictions are rounded to 50 significant bits so that every
perturbed point is exact (:func:`lossguard._fd.snap`).

Tolerances (printed with the verdict): finite differences 2 × table estimate + Σ|a_l| ε/h_l
with ε = γ_n(|f| + S) the value's rounding bound; an autodiff slope γ_n(1 + S)(‖g‖∞ + G)‖v‖₁;
vector comparisons :func:`lossguard.tolerance.rounding_allowance` (normwise) — S = max|z|, G the
size of the cancelling gradient terms. A failure reports the worst point and direction, both
values, the allowance and the Taylor remainder order (:mod:`lossguard._taylor`).

Complex step (:func:`lossguard._fd.complex_step`) is not used here: the JAX adapter casts inputs
to real dtypes, and a stable loss (abs, maximum, comparisons) drops the imaginary part silently,
so it could not be trusted without the author's word that the code is complex-analytic.

Example:
    >>> import jax, jax.numpy as jnp
    >>> from lossguard import declare, run
    >>> def ce(z, y):
    ...     return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1))
    >>> run(declare(ce, kind="categorical"), effort="quick", only=["gradient"]).check("gradient").verdict
    'pass'

References:
    Richardson (1927) and Ridders (1982) for the extrapolation; Farrell, Ham, Funke, Rognes,
    SIAM J. Sci. Comput. 35(4), 2013 for the Taylor test (see the modules cited).
"""

from __future__ import annotations

import numpy as np

from .. import _fd
from .._taylor import taylor_along, taylor_orders
from .._budget import large_case
from ..cases import CaseStack, Cell, concat
from ..errors import LossCallError
from ..evaluate import NoGradient
from ..result import CheckResult, Example
from ..tolerance import gamma, op_count, rounding_allowance
from .._simplex import flushed
from ._base import Check, Context, Judged, conclude
from ._compare import examples_from, mismatch
from ._gradient_parts import (Probe, Tally, directional_pair, dots, example, point_values, probe_directions,
                              slope_allowance, special_cases, sum_out)
from ._scales import case_scale, gradient_term_scale
from ._reference_batch import reference_batch

__all__ = ["CHECK", "check_stacks", "special_cases"]

def _setup(ctx: Context, stack: CaseStack, tally: Tally, tag: str) -> Probe:
    """Draw the cotangent and directions, evaluate the gradient and every finite-difference point."""
    ev = ctx.evaluator
    rng = ctx.rng(f"gradient {stack.cell}{tag}")
    stack = stack.with_predictions(_fd.snap(stack.predictions))
    z, y, cell, k = stack.predictions, stack.targets, stack.cell, len(stack)
    out = ev.cotangent_shape(stack)
    c = rng.uniform(0.5, 2.0, size=k) if not out else rng.standard_normal((k,) + out)
    vals, g = ev.value_and_grad(stack, "float64", cotangent=c)
    v, labels, h0 = probe_directions(ctx, z, rng)
    p = Probe(ctx, stack, tally, out, case_scale(ctx, z), op_count(cell.n, cell.c or cell.d or 1),
               gradient_term_scale(ctx, y), c, np.abs(c).reshape(k, -1).max(axis=1), vals, g,
               "declared grad" if not ev.has_autodiff else "reverse mode", v, labels, h0, _fd.step_ladder(h0),
               ev.computed_dtype("float64"))
    tally.oracles.add(p.oracle)
    fv = point_values(ev, stack, v, h0, out)  # one evaluator call per chunk of points
    cb = c.reshape((k, 1, 1, 1) + out)
    with np.errstate(all="ignore"):
        # fmax.reduce skips nan like nanmax (nan only when every point is nan), without a warning
        top = np.maximum(np.abs(vals), np.fmax.reduce(np.abs(fv).reshape((k, -1) + out), axis=1))
    # a loss that computes in float32 rounds at float32's u
    atol = rounding_allowance(top, p.scale + _fd.H0_LOGITS, dtype=p.comp, n_ops=p.n, both_sides=1).atol
    atol = np.broadcast_to(atol, top.shape)
    d = v.shape[1]
    for name, w in (("c", cb), ("1", np.ones_like(cb))):
        p.phis[name] = phi = sum_out(fv * w, 4)  # ⟨w, L⟩ at every point: (K, D, 2, J)
        p.noise[name] = sum_out(np.abs(w[:, 0, 0, 0]) * atol, 1)
        p.f0s[name] = sum_out(vals * w[:, 0, 0, 0], 1)
        fp, fm = np.moveaxis(phi[:, :, 0], -1, 0), np.moveaxis(phi[:, :, 1], -1, 0)
        f0b = np.broadcast_to(p.f0s[name][:, None], (k, d))
        p.fds[name] = _fd.directional(f0b, fp, fm, p.steps, np.broadcast_to(p.noise[name][:, None], (k, d)))
    fd = p.fds["c"]
    tally.total += k
    tally.judged += int(fd.judged.sum())
    tally.skipped += int((~fd.judged).sum())
    tally.kinks += int(fd.kink.sum())
    good_tol = fd.allowance()[np.isfinite(fd.allowance())]
    tally.fd_tol += [float(good_tol.min()), float(good_tol.max())] if good_tol.size else []
    return p


def _against_fd(p: Probe) -> tuple[np.ndarray, np.ndarray]:
    """Reverse mode (or the declared grad of a numpy loss) against finite differences, with the
    observed Taylor orders: (failing cases (K,), failing directions (K, D))."""
    k, d = p.v.shape[:2]
    fd = p.fds["c"]
    with np.errstate(invalid="ignore"):  # inf · 0 where the true gradient is infinite: not judged
        p.slope = slope = dots(p.g, p.v)
        p.a_dot = slope_allowance(p.g, p.v, p.scale, p.big_g * p.cmax, p.n, p.comp)
    f0b = np.broadcast_to(p.f0s["c"][:, None], (k, d))
    taylor = taylor_orders(f0b, np.moveaxis(p.phis["c"][:, :, 0], -1, 0), p.steps, slope,
                           np.broadcast_to(p.noise["c"][:, None], (k, d)))
    p.tally.orders += taylor.observed[fd.smooth & np.isfinite(taylor.observed)].tolist()
    case_bad, kd_bad = directional_pair(p.ctx, p.tally, p.stack, f"{p.oracle} vs finite differences", slope, fd,
                                        p.a_dot, p.labels, taylor)
    if kd_bad.any():
        _diagnose(p, kd_bad)
    return case_bad, kd_bad


def _diagnose(p: Probe, kd_bad: np.ndarray) -> None:
    """Notes on the worst failing direction: its Taylor test, and whether the gradient is the one
    for cotangent 1 (a backward pass that ignores its incoming cotangent)."""
    ev, slope, a_dot = p.ctx.evaluator, p.slope, p.a_dot
    assert slope is not None and a_dot is not None
    z, y, c = p.stack.predictions, p.stack.targets, p.c
    kk, dd = np.argwhere(kd_bad)[np.argmax(np.where(kd_bad, np.abs(slope - p.fds["c"].central.value), -1)[kd_bad])]

    def phi(points: np.ndarray) -> np.ndarray:  # the cell's compiled function: no new compilation
        one = CaseStack(points, np.repeat(y[kk:kk + 1], len(points), axis=0), p.stack.cell)
        return sum_out(ev.values(one, "float64") * c[kk][None], 1)

    t = taylor_along(phi, z[kk], p.v[kk, dd], float(p.h0[kk, dd]), float(p.f0s["c"][kk]), float(slope[kk, dd]),
                     float(p.noise["c"][kk]))
    p.tally.notes.add(f"at the worst point, {t.describe((0,))}")
    ones = p.fds["1"].central.value
    if np.all(np.abs(slope[kd_bad] - ones[kd_bad]) <= (p.fds["1"].allowance() + a_dot)[kd_bad]):
        p.tally.notes.add("the gradient equals the one for cotangent 1: the backward pass ignores its "
                          "incoming cotangent")


def _forward(p: Probe, kd_bad: np.ndarray) -> np.ndarray:
    """Forward mode against reverse mode: failing cases (K,)."""
    ctx, stack, tally, slope, a_dot = p.ctx, p.stack, p.tally, p.slope, p.a_dot
    assert slope is not None and a_dot is not None
    k, d = p.v.shape[:2]
    try:
        tang = np.stack([ctx.evaluator.jvp(stack, np.ascontiguousarray(p.v[:, j]), "float64")[1] for j in range(d)],
                        axis=1)
    except (LossCallError, NoGradient) as exc:
        why = str(exc).split(" while computing")[0].replace("loss raised ", "")
        tally.notes.add(f"forward mode unavailable, forward vs reverse mode not compared: {why.rstrip('. ')}")
        return np.zeros(k, bool)
    fwd = sum_out(tang * p.c.reshape((k, 1) + p.out), 2)
    tally.oracles.add("forward mode")
    with np.errstate(invalid="ignore"):
        err = np.abs(fwd - slope)
        fb = ~(err <= 2.0 * a_dot) & np.isfinite(slope)
        fratio = (err / (2 * a_dot)).max(axis=1)
    side = np.where(kd_bad, "finite differences side against reverse mode",
                    np.where(p.fds["c"].judged, "finite differences side with reverse mode",
                             "finite differences cannot judge this point"))
    ex = [example(ctx, stack, int(i), f"forward mode vs reverse mode, {p.labels[j]}", float(fwd[i, j]),
                  float(slope[i, j]), float(err[i, j]), float(2 * a_dot[i, j]), str(side[i, j]))
          for i, j in np.argwhere(fb)[:2]]
    tally.add("forward mode vs reverse mode", fb.any(axis=1), fratio, ex)
    return fb.any(axis=1)


def _declared(p: Probe) -> np.ndarray:
    """A declared closed-form grad beside autodiff (the gradient of Σ outputs) against finite
    differences: failing cases (K,)."""
    gu = p.ctx.evaluator.user_grads(p.stack, "float64")
    if gu is None:
        return np.zeros(len(p.stack), bool)
    p.tally.oracles.add("declared grad")
    with np.errstate(invalid="ignore"):
        su = dots(gu, p.v)
    return directional_pair(p.ctx, p.tally, p.stack, "declared grad vs finite differences", su, p.fds["1"],
                            slope_allowance(gu, p.v, p.scale, p.big_g, p.n, p.comp), p.labels, None)[0]


def _registry(p: Probe) -> np.ndarray:
    """The registry's hand-derived gradient against the loss's: failing cases (K,)."""
    ctx, spec = p.ctx, p.ctx.spec
    p.tally.oracles.add(f"registry {spec.reference!r}")
    _, gref = reference_batch(ctx, p.stack.predictions, p.stack.targets, cotangent=p.c)
    al = rounding_allowance(gref, p.scale, dtype=ctx.evaluator.computed_dtype("float64"), n_ops=p.n,
                            normwise=True, grad_scale=p.big_g * p.cmax)
    m = mismatch(p.g, gref, al.atol)
    ex = examples_from(m, spec, p.stack, f"{p.oracle} vs registry {spec.reference!r} closed form")
    p.tally.add("registry closed form", m.case_bad, m.case_ratio, [(e.abs_err / e.allowance, e) for e in ex])
    return m.case_bad


def _probe(ctx: Context, stack: CaseStack, tally: Tally, forward: bool = True, tag: str = "",
           float32: bool | None = None) -> np.ndarray:
    """Every gradient source of one stack against finite differences and against each other:
    the failing cases (K,). ``float32``: compare float32 with float64 (default: at the cells of
    ``ctx.cells_for("float32")``)."""
    spec, ev = ctx.spec, ctx.evaluator
    p = _setup(ctx, stack, tally, tag)
    case_bad, kd_bad = _against_fd(p)
    bad = case_bad.copy()
    # forward mode against reverse mode, where forward mode is a pass of its own
    if forward and ev.has_autodiff and not ev.capabilities.forward_mode:
        tally.notes.add(f"forward mode unavailable, forward vs reverse mode not compared: adapter "
                        f"{ev.adapter.name!r} has no forward mode of its own")
    if forward and ev.capabilities.forward_mode:
        bad |= _forward(p, kd_bad)
    if spec.grad is not None and ev.has_autodiff:
        bad |= _declared(p)
    if spec.reference is not None:
        bad |= _registry(p)
    if ev.output == "per_example":
        bad |= _row_leaks(ctx, tally, p.stack, p.out, p.scale, p.big_g, p.n, tag)
    at_cell = p.stack.cell in ctx.cells_for("float32") if float32 is None else float32
    if ev.has_autodiff and at_cell and "float32" in spec.dtypes:
        bad |= _float32(ctx, tally, p.stack, p.c, p.scale, p.big_g * p.cmax, p.n, ~bad)
    tally.bad += int(bad.sum())
    return bad


def _row_leaks(ctx: Context, tally: Tally, stack: CaseStack, out: tuple[int, ...], scale: np.ndarray,
               big_g: np.ndarray, n: int, tag: str = "") -> np.ndarray:
    """VJP with a one-hot cotangent: example i's loss must not reach other rows."""
    ev, k = ctx.evaluator, len(stack)
    rng = ctx.rng(f"gradient rows {stack.cell}{tag}")
    pick = rng.integers(0, int(np.prod(out)), size=k)
    cot = np.zeros((k, int(np.prod(out))))
    cot[np.arange(k), pick] = 1.0
    cot = cot.reshape((k,) + out)
    _, g = ev.value_and_grad(stack, "float64", cotangent=cot)
    own = np.broadcast_to(cot.reshape(cot.shape + (1,) * (g.ndim - cot.ndim)) > 0, g.shape)
    flat_g, flat_own = g.reshape(k, -1), own.reshape(k, -1)
    with np.errstate(invalid="ignore"):
        leak = np.max(np.where(flat_own, 0.0, np.abs(flat_g)), axis=1)
        mine = np.max(np.where(flat_own, np.abs(flat_g), 0.0), axis=1)
        tol = gamma(n, ev.computed_dtype("float64")) * (1.0 + scale) * (mine + big_g)
        bad = ~(leak <= tol)
    ex = []
    for i in np.flatnonzero(bad)[:2]:
        row = np.unravel_index(pick[i], out)
        ex.append(example(ctx, stack, int(i), f"VJP with cotangent 1 at output {row}: gradient outside its row",
                           float(leak[i]), 0.0, float(leak[i]), float(tol[i]),
                           "example losses must depend on their own row only"))
    tally.add("rows: example i reaches other rows", bad, leak / tol, ex)
    return bad


def _float32(ctx: Context, tally: Tally, stack: CaseStack, c: np.ndarray, scale: np.ndarray,
             big_g: np.ndarray, n: int, ok64: np.ndarray) -> np.ndarray:
    """Reverse mode in float32 against float64 on the same float32-rounded cases, float32
    subnormals (predictions and float targets) flushed to zero in both, as XLA sees them."""
    ev = ctx.evaluator
    # XLA on CPU flushes float32 subnormals to zero: compare both precisions at the flushed input
    s32 = flushed(stack.with_predictions(stack.predictions.astype(np.float32).astype(np.float64)), "float32")
    _, g32 = ev.value_and_grad(s32, "float32", cotangent=c)
    _, g64 = ev.value_and_grad(s32, "float64", cotangent=c)
    k = len(stack)
    both = np.all(np.isfinite(g32).reshape(k, -1), axis=1) & np.all(np.isfinite(g64).reshape(k, -1), axis=1) & ok64
    al = rounding_allowance(g64, case_scale(ctx, s32.predictions), dtype=ev.computed_dtype("float32"),
                            n_ops=n, normwise=True, grad_scale=big_g)
    m = mismatch(g32, g64, al.atol)
    bad = m.case_bad & both
    m.case_bad = bad
    ex = examples_from(m, ctx.spec, s32, "reverse mode in float32 vs float64 (same float32 inputs)", dtype="float32")
    tally.add("float32 reverse mode vs float64", bad, np.where(both, m.case_ratio, 0.0),
              [(e.abs_err / e.allowance, e) for e in ex])
    tally.float32_cases += int(both.sum())
    return bad


_HINTS = {
    "vs finite differences": ("the gradient is not the derivative of the values: a custom_vjp/custom_jvp "
                              "rule out of step with the forward pass (a sign, a missing 1/N, a "
                              "stop_gradient on a term that depends on the predictions), or a branch whose "
                              "derivative is wrong exactly at the point shown (zeros, ties)"),
    "forward mode": "forward and reverse mode disagree: a custom rule that only one mode uses is wrong",
    "rows": ("example i's gradient reaches other rows: the per-example loss mixes examples, or its "
             "backward pass mis-broadcasts the cotangent"),
    "registry": "autodiff differs from the registry's hand-derived gradient (the reference check says more)",
    "float32": ("the float32 gradient differs from float64 beyond float32 rounding: a cancellation or a "
                "term lost in float32"),
}


def _run(ctx: Context) -> CheckResult:
    ev = ctx.evaluator
    if not ev.has_gradient:
        return CheckResult(name="gradient", verdict="skip",
                           summary=("no gradient oracle: the loss is not JAX-traceable and declares no "
                                    "grad; declare grad=... to have it checked"))
    # the special points keep cases of their own (their logits reach 30: beside random rows they
    # would widen those rows' allowance, which scales with a case's largest |logit|)
    stacks: list[CaseStack] = []
    for cell in ctx.cells:
        parts = [ctx.standard_cases(cell), special_cases(ctx, cell)]
        stacks += parts if large_case(cell.elements()) else [concat(parts)]  # large cases are probed one by one
    return check_stacks(ctx, stacks)


def check_stacks(ctx: Context, stacks: list[CaseStack]) -> CheckResult:
    """The gradient check on given stacks (the battery passes its standard and special cases;
    benchmarks pass a few cases of a large shape)."""
    ev = ctx.evaluator
    calls0 = ev.calls
    tally = Tally()
    pieces: dict[Cell, int] = {}
    for stack in stacks:
        forward = stack.cell == stacks[-1].cell  # forward mode compiles: the last shape only
        if large_case(stack.cell.elements()):
            # large cases one at a time, each with its own draws: every array stays one case big
            for j in range(len(stack)):
                m = pieces[stack.cell] = pieces.get(stack.cell, -1) + 1
                _probe(ctx, stack.take([j]), tally, forward=forward, tag=f" case {m}" if m else "")
        else:
            _probe(ctx, stack, tally, forward=forward)
    worst = [e for _, e in sorted(tally.worst, key=lambda e: -(e[0] if not np.isnan(e[0]) else np.inf))][:3]
    order = float(np.median(tally.orders)) if tally.orders else float("nan")
    oracles = ", ".join(sorted(tally.oracles))
    notes = "; ".join(sorted(tally.notes))
    if tally.bad:
        pairs = "; ".join(f"{p} on {n}" for p, n in sorted(tally.pairs.items(), key=lambda x: -x[1]))
        summary = f"gradient wrong on {tally.bad} of {tally.total} cases: {pairs}" + (f" ({notes})" if notes else "")
    else:
        taylor = f"median Taylor order {order:.2f}" if np.isfinite(order) else "Taylor order n/a (linear pieces)"
        summary = (f"{oracles} agree with float64 finite differences on {tally.total} cases "
                   f"({tally.judged + tally.skipped} directions) "
                   f"(largest error {tally.ratio:.2g} of its allowance; {taylor}; {tally.kinks} directions at "
                   f"kinks judged by one-sided bounds, {tally.skipped} too near a kink or singularity to judge)"
                   + (f"; {notes}" if notes else ""))
    fd_range = f" (from {min(tally.fd_tol):.2g} to {max(tally.fd_tol):.2g})" if tally.fd_tol else ""
    allowance = (f"finite differences: 2 × Richardson table estimate + Σ|a_l|·ε/h_l, ε = γ_n(|f| + S), u=1.1e-16"
                 f"{fd_range}; autodiff slope g·v: γ_n(1 + S)(‖g‖∞ + G)‖v‖₁; forward vs reverse: twice that; "
                 f"kinks: between the one-sided derivatives; vectors: 2·γ_n·(1 + max|z|)·(‖g*‖∞ + G); "
                 f"float32: the same in float32")
    hint = " | ".join(h for key, h in _HINTS.items() if any(key in p for p in tally.pairs))
    details = {"oracles": sorted(tally.oracles), "failed_pairs": dict(tally.pairs),
               "directions_judged": tally.judged, "directions_not_judged": tally.skipped,
               "kinks": tally.kinks, "median_taylor_order": order,
               "max_error_over_allowance": tally.ratio, "notes": sorted(tally.notes),
               "float32_cases_compared": tally.float32_cases, "loss_evaluations": ev.calls - calls0}
    return conclude("gradient", summary=summary, cases=tally.total, failed=tally.bad, allowance=allowance,
                    worst=worst, hint=hint, details=details)


def _still_fails(ctx: Context, example: Example, stack: CaseStack) -> Judged:
    """The whole probe on cut-down cases (forward mode and float32 only when the example is theirs);
    the example of a case is one the probe recorded for its inputs, else that case probed alone."""
    how = {"forward": "forward mode" in example.what, "float32": "float32" in example.what, "tag": " (shrinking)"}
    tally = Tally()
    bad = _probe(ctx, stack, tally, **how)  # type: ignore[arg-type]

    def one(k: int) -> Example | None:
        z = _fd.snap(stack.predictions[k])  # the probe's examples hold the snapped inputs
        for t in (tally, Tally()):  # recorded among the worst, else case k probed alone
            if t is not tally:
                _probe(ctx, stack.take([k]), t, **how)  # type: ignore[arg-type]
            mine = [(r, e) for r, e in t.worst if np.array_equal(e.predictions, z, equal_nan=True)
                    and np.array_equal(e.targets, stack.targets[k])]
            if mine:
                return max(mine, key=lambda re: re[0] if not np.isnan(re[0]) else np.inf)[1]
        return None

    return Judged(bad, one)


def _compiles(ctx: Context) -> list[tuple[str, str, Cell]]:
    """float64 value-and-gradient at every cell, float32 at its cells, forward mode at the last."""
    return ([("vg", "float64", cell) for cell in ctx.cells] + [("jvp", "float64", ctx.cells[-1])]
            + [("vg", "float32", cell) for cell in ctx.cells_for("float32") if "float32" in ctx.spec.dtypes])


CHECK = Check(
    name="gradient",
    summary="autodiff, declared and registry gradients agree with float64 finite differences (kink-aware)",
    run=_run,
    skip_hint="skip only for a loss that is never differentiated",
    order=30,
    compiles=_compiles,
    still_fails=_still_fails,
)
