"""``live-gradient``: confidently wrong predictions still get a gradient to learn from.

Notation and shapes: one shape, the first of ``ctx.cells_for("float32")`` (class axis last); five
cases, one per magnitude; hard targets (labels, one-hot rows, 0/1).
A row is *wrong by M* when the label's logit is −M and another class's is +M (binary: the logit
is −M·(2y − 1)). Every row of a case is wrong by the same M, with the same labels and the same
competing classes at every M, so row i at M compares with row i at the moderate M₀ = 1.

Formula: with r_i(M) = |∂L/∂z_{i,y_i}| at magnitude M — the gradient on the label's own logit,
the component that would correct the mistake (binary: |∂L/∂z_i| per element) — the check requires for M in
:data:`CONFIDENT` (evaluated in float32, the usual training dtype)

    r_i(M) ≥ u · r_i(M₀),     u = unit roundoff of float32 (2^-24)

A gradient below u times a typical one is absorbed when the two meet in a sum (a + b = a in
floating point once |b| < u|a|): such an example has stopped teaching. Proper losses in logits
keep r_i(M) of order 1 (cross-entropy: p − y → ±1); clipping probabilities (zero derivative
beyond the clip) or feeding probabilities back in as logits (a softmax Jacobian p(1 − p) ≈ e^(−M))
make it vanish exactly where the model is most wrong.
"""

from __future__ import annotations

import numpy as np

from ..cases import CaseStack, Cell
from ..ladders import ladder_rows
from ..result import CheckResult, Example
from ..tolerance import unit_roundoff
from ._base import Check, Context, conclude
from ._compare import replay

__all__ = ["CHECK", "MODERATE", "CONFIDENT", "wrong_stack"]

MODERATE = 1.0
CONFIDENT = (10.0, 30.0, 100.0, 1e3)
DTYPE = "float32"


def wrong_stack(ctx: Context, cell: Cell, mags: tuple[float, ...]) -> CaseStack:
    """One case per magnitude, every row wrong by it; same labels and competitors throughout."""
    spec, rng = ctx.spec, ctx.rng(f"live-gradient {cell}")
    seed = int(rng.integers(2**31))
    if cell.c is None:
        y = rng.integers(0, 2, size=cell.pred_shape()).astype(np.float64)
        preds = [-(2.0 * y - 1.0) * m for m in mags]
        targets = [y] * len(mags)
    else:
        labels = rng.integers(0, cell.c, size=cell.n)
        # the same generator state for every M places the competing class identically
        preds = [ladder_rows(np.random.default_rng(seed), labels, cell.c, "wrong", m) for m in mags]
        y = labels if spec.kind == "categorical" else np.eye(cell.c)[labels]
        targets = [y] * len(mags)
    notes = [f"every row wrong by |z|={m:.3g}" for m in mags]
    return CaseStack(np.stack(preds), np.stack(targets), cell, notes)


def _row_norms(g: np.ndarray, targets: np.ndarray, spec_kind: str) -> np.ndarray:
    """|∂L/∂z_{i,y_i}| per row, (K, N), for softmax kinds; |∂L/∂z| per element for binary.

    The label's coordinate, not the row's largest entry: a bystander class's tiny gradient must
    not keep a row "alive" whose label and competitor get none.
    """
    if spec_kind == "binary":
        return np.abs(g).reshape(g.shape[0], -1)
    labels = targets if spec_kind == "categorical" else np.argmax(targets, axis=-1)
    # gather the label's entry first, then |·|: no full-size temporary
    return np.abs(np.take_along_axis(g, labels[..., None].astype(np.int64), axis=-1)[..., 0])


HINT = ("learning stops where the model is most wrong: compute the loss from logits (log_softmax, "
        "log σ) instead of clipping probabilities or feeding them back in as logits; skip only for "
        "losses meant to ignore outliers (e.g. noise-robust losses)")


def _run(ctx: Context) -> CheckResult:
    spec, ev = ctx.spec, ctx.evaluator
    u = unit_roundoff(ev.computed_dtype(DTYPE))
    mags = (MODERATE,) + CONFIDENT
    cell = ctx.cells_for(DTYPE)[0]  # a shape float32 is compiled for anyway
    stack = wrong_stack(ctx, cell, mags)
    _, grads = ev.value_and_grad(stack, DTYPE)
    r = _row_norms(grads[: len(mags)], stack.targets, spec.kind)
    base = r[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = r[1:] / base[None, :]
    usable = np.isfinite(r[1:]) & np.isfinite(base)[None, :]  # non-finite gradients: `finite`'s job
    dead = usable & ~(ratio >= u)
    rows = int(usable.sum())
    worst: list[Example] = []
    first = ""
    for j in range(len(CONFIDENT)):
        i = np.flatnonzero(dead[j])
        if i.size and len(worst) < 2:
            row = int(i[np.argmin(ratio[j, i])])
            first = first or (f"at |z|={CONFIDENT[j]:g} row {row} gets {r[j + 1, row]:.3g} against "
                              f"{base[row]:.3g} at |z|={MODERATE:g} (ratio {ratio[j, row]:.2g} < u={u:.2g})")
            worst.append(Example(
                what=f"gradient magnitude of row {row} in {DTYPE}",
                predictions=stack.predictions[j + 1], targets=stack.targets[j + 1],
                got=float(r[j + 1, row]),
                expected=f">= {u:.2g} x {base[row]:.3g} (its size when wrong by |z|={MODERATE:g})",
                note=f"{stack.note(j + 1)}; {ratio[j, row]:.3g} x its size at |z|={MODERATE:g}",
                replay=replay(spec, stack.predictions[j + 1], stack.targets[j + 1], DTYPE)))
    low = {f"{m:g}": float(np.nanmin(np.where(usable[j], ratio[j], np.nan))) if usable[j].any() else None
           for j, m in enumerate(CONFIDENT)}
    failed = int(dead.any(axis=1).sum())
    if failed:
        summary = (f"the gradient vanishes for confidently wrong predictions: {first}; {failed} of "
                   f"{len(CONFIDENT)} magnitudes affected")
    else:
        smallest = min((v for v in low.values() if v is not None), default=float("nan"))
        summary = (f"confidently wrong rows keep a gradient of at least {smallest:.3g} x its size at "
                   f"|z|={MODERATE:g} (|z| up to {CONFIDENT[-1]:g}, {rows} rows, {DTYPE})")
    allowance = f"ratio >= u = {u:.3g} (unit roundoff of {DTYPE}): below it the gradient is absorbed in any sum"
    return conclude("live-gradient", summary=summary, cases=len(CONFIDENT), failed=failed, allowance=allowance,
                    worst=worst, hint=HINT,
                    details={"smallest_ratio_per_magnitude": low, "moderate_magnitude": MODERATE})


def _applies(spec) -> str | None:  # type: ignore[no-untyped-def]
    return None if spec.inputs == "logits" else "applies to inputs=logits, not probabilities"


CHECK = Check(
    name="live-gradient",
    summary="confidently wrong predictions keep a gradient comparable to a moderately wrong one",
    run=_run,
    applies=_applies,
    skip_hint="skip for losses designed to ignore confidently wrong examples (noise-robust losses)",
    order=45,
    compiles=lambda ctx: [("vg", DTYPE, ctx.cells_for(DTYPE)[0])],
)
