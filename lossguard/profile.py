"""Precision profile: how accurate a loss is, in each float dtype, as its logits grow.

Notation and shapes: cases of ``Effort.profile_rows`` rows with the battery's class count (class
axis last); at each logit magnitude M of :func:`~lossguard.ladders.profile_magnitudes` four cases
are built (rows confidently right, confidently wrong, all equal, one huge logit; see
:mod:`lossguard.ladders`), moved onto values every dtype that holds M represents exactly, and
evaluated in every such dtype (probability inputs are rounded to each dtype on its own).

Formula: the error of a value v against the oracle v* is counted in ULPs of the dtype at the
scale the rounding-error model of :mod:`lossguard.tolerance` uses,

    value:     |v − v*| / ulp(|v*| + S),        S = max |z| of the case
    gradient:  ‖g − g*‖∞ / ulp(‖g*‖∞ + G),      G = the size of the cancelling terms (p − y)

(a plain relative error would call every loss broken wherever the exact value is a tiny e^(−M)
that no dtype resolves next to M). The allowance of the same model, converted to ULPs, decides
"accurate"; the safe logit range of a dtype is the largest M such that at every M' ≤ M every
case is finite (where the true value is representable) and within the allowance.

The oracle is the declared reference evaluated in mpmath (40 significant digits, gradients by
forward-mode dual numbers), or, with no reference, the loss's own float64 value and gradient, in
which case float64 itself is judged for finiteness only. The float64 reference stands in when
mpmath is not installed; the profile says which oracle it used.

Example:
    >>> from lossguard import declare
    >>> from lossguard.examples.reef_survey import tile_loss
    >>> prof = profile(declare(tile_loss, kind="categorical", reference="categorical_ce"))
    >>> prof.row("float32").safe_limit > 1e30
    True

    ``lossguard profile`` prints it and plots it (``lossguard.commands.profile``).

References:
    N. J. Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., SIAM, 2002 (the
    error model). F. Johansson et al., mpmath: a Python library for arbitrary-precision
    floating-point arithmetic, https://mpmath.org (the oracle's arithmetic).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from ._deadline import BATTERY_SECONDS, CALL_SECONDS, Limits, bounded, limits_from
from ._guard import Guard
from .cases import CaseStack, Cell, concat, ladder_stack, shape_menu
from .checks._base import Context
from .checks._extremes import ACCUMULATOR
from .checks._finite_oracle import reduced_fits
from .checks._reference_batch import reference_batch
from .checks._scales import case_scale, gradient_term_scale
from .effort import validate_run
from .evaluate import Evaluator, NoGradient
from .ladders import common_grid, largest_finite, profile_magnitudes, round_down, ulp
from .spec import LossSpec
from .tolerance import DTYPES, op_count, rounding_allowance

from ._mp_oracle import mp_available, mp_reference_stack


__all__ = ["PROFILE_PATTERNS", "DtypeProfile", "Profile", "profile", "mp_available", "mp_reference_stack"]

PROFILE_PATTERNS = ("right", "wrong", "equal", "huge")


@dataclass
class DtypeProfile:
    """One dtype's curves, per magnitude the worst case over :data:`PROFILE_PATTERNS`.

    Errors and allowances are in ULPs (inf: not finite though the true value fits; nan: no true
    value fits); ``ok``: finite and within the allowance; ``safe_limit``: the largest magnitude
    before the first one not ok (``None`` if the first fails); ``end``: why the range ends.
    """

    dtype: str
    magnitudes: np.ndarray
    value_ulps: np.ndarray
    grad_ulps: np.ndarray
    value_allowance_ulps: np.ndarray
    grad_allowance_ulps: np.ndarray
    ok: np.ndarray
    safe_limit: float | None
    end: str
    judged: str = "accuracy"

    def worst_inside(self) -> tuple[float, float]:
        """(value, gradient) worst ULP error over the safe range."""
        inside = self.magnitudes <= (-1.0 if self.safe_limit is None else self.safe_limit)
        v, g = (a[inside & np.isfinite(a)] for a in (self.value_ulps, self.grad_ulps))
        return (float(v.max()) if v.size else np.nan), (float(g.max()) if g.size else np.nan)


@dataclass
class Profile:
    """A precision profile: one :class:`DtypeProfile` per dtype, and how it was measured."""

    target: str
    kind: str
    shape: str
    oracle: str
    seed: int
    rows: list[DtypeProfile] = field(default_factory=list)
    has_gradient: bool = True
    seconds: float = 0.0

    def row(self, dtype: str) -> DtypeProfile:
        return next(r for r in self.rows if r.dtype == dtype)


def _cases(ctx: Context, dtypes: tuple[str, ...]) -> tuple[CaseStack, list[tuple[str, ...]], np.ndarray]:
    """Every (magnitude, pattern) case on the common grid of the dtypes that hold it."""
    rng = ctx.rng("profile")
    cell = ctx.cells[0]
    stacks, holders, mags = [], [], []
    for m in profile_magnitudes("float64"):
        hold = tuple(d for d in dtypes if largest_finite(d) >= m)
        if not hold:
            continue
        mm = round_down(m, hold)
        with np.errstate(over="ignore"):  # softmax rows at the top of float64: z − max z → −inf
            s = ladder_stack(ctx.spec, cell, rng, mags=np.array([mm]), patterns=PROFILE_PATTERNS,
                             domain=ctx.domain)
        # probabilities are rounded per dtype: a coarser grid would turn them into exact 0s and 1s
        for group in ([hold] if ctx.spec.inputs == "logits" else [(d,) for d in hold]):
            floating = np.issubdtype(s.targets.dtype, np.floating)
            targ = common_grid(s.targets, group) if floating else s.targets
            stacks.append(CaseStack(common_grid(s.predictions, group), targ, cell, s.notes))
            holders += [group] * len(s)
            mags += [mm] * len(s)
    return concat(stacks), holders, np.asarray(mags)


def _oracle(ctx: Context, stack: CaseStack, dps: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, str]:
    """(v*, v* low part, g*, g* low part, description) for every case."""
    spec = ctx.spec
    if spec.reference is not None and mp_available():
        v_hi, v_lo, g_hi, g_lo = mp_reference_stack(
            spec, stack.predictions, stack.targets, reduction=ctx.evaluator.reduction, dps=dps)
        return v_hi, v_lo, g_hi, g_lo, f"reference {spec.reference!r} evaluated in mpmath ({dps} digits)"
    if spec.reference is not None:
        with np.errstate(all="ignore"):
            v, g = reference_batch(ctx, stack.predictions, stack.targets)
        return v, np.zeros_like(v), g, np.zeros_like(g), (
            f"reference {spec.reference!r} in float64 (mpmath is not installed: pip install mpmath)")
    try:
        v, g = ctx.evaluator.value_and_grad(stack, "float64")
    except NoGradient:
        v = ctx.evaluator.values(stack, "float64")
        g = np.full(stack.predictions.shape, np.nan)
    return v, np.zeros_like(v), g, np.zeros_like(g), (
        "the loss's own float64 value (no reference declared); float64 is judged for finiteness only")


def _case_errors(ctx: Context, stack: CaseStack, oracle: tuple[np.ndarray, ...], dtype: str,
                 self_oracle: bool) -> dict[str, np.ndarray]:
    """Per case: ULP errors, allowances and the flags that decide "ok" (see the module doc)."""
    ev, k = ctx.evaluator, len(stack)
    v_hi, v_lo, g_hi, g_lo = (a.reshape(k, -1) for a in oracle)
    try:
        got_v, got_g = ev.value_and_grad(stack, dtype)
    except NoGradient:
        got_v, got_g = ev.values(stack, dtype), np.full(stack.predictions.shape, np.nan)
    got_v, got_g = got_v.reshape(k, -1), got_g.reshape(k, -1)
    comp, top = ev.computed_dtype(dtype), largest_finite(dtype)
    s, gs = case_scale(ctx, stack.predictions), gradient_term_scale(ctx, stack.targets)
    n = op_count(stack.cell.n, stack.cell.c or stack.cell.d or 1)
    e: dict[str, np.ndarray] = {}
    with np.errstate(all="ignore"):
        e["own"] = np.all(np.isfinite(v_hi) & (np.abs(v_hi) <= top), axis=1)
        e["sum"] = reduced_fits(ctx, v_hi[:, 0] if v_hi.shape[1] == 1 else v_hi, k, dtype, stack.cell)
        e["grep"] = np.all(np.isfinite(g_hi) & (np.abs(g_hi) <= top), axis=1)
        e["vfin"] = np.all(np.isfinite(got_v), axis=1)
        e["gfin"] = np.all(np.isfinite(got_g), axis=1) | (not ev.has_gradient)
        vmag = np.max(np.abs(v_hi), axis=1)
        # |v − v*| with v* = hi + lo: (v − hi) is exact when v and hi are close (Sterbenz lemma)
        e["v"] = np.where(e["vfin"], np.max(np.abs((got_v - v_hi) - v_lo), axis=1) / ulp(vmag + s, comp), np.inf)
        e["av"] = rounding_allowance(vmag, s, dtype=comp, n_ops=n).atol / ulp(vmag + s, comp)
        gmag = np.max(np.where(np.isfinite(g_hi), np.abs(g_hi), 0.0), axis=1)
        e["g"] = np.where(e["gfin"], np.max(np.abs((got_g - g_hi) - g_lo), axis=1) / ulp(gmag + gs, comp), np.inf)
        a_g = rounding_allowance(gmag[:, None], s, dtype=comp, n_ops=n, normwise=True, grad_scale=gs).atol
        e["ag"] = a_g.reshape(k) / ulp(gmag + gs, comp)
    if not ev.has_gradient:
        e["g"] = e["ag"] = np.full(k, np.nan)
    if self_oracle:  # float64 against itself: only finiteness says anything
        e["v"], e["g"] = np.where(e["vfin"], 0.0, np.inf), np.where(e["gfin"], 0.0, np.inf)
        e["own"] = e["sum"] = e["grep"] = np.ones(k, bool)
    e["rep"] = e["own"] & e["sum"] & e["grep"]
    e["ok"] = e["rep"] & e["vfin"] & e["gfin"] & (e["v"] <= e["av"]) & ~(e["g"] > e["ag"])
    return e


def _why(e: dict[str, np.ndarray], i: int, note: str, dtype: str, m: float) -> str:
    where = f"at |z| = {m:.3g} ({note.replace('ladder ', '').split(' |z|')[0]} rows)"
    acc = ACCUMULATOR.get(dtype, dtype)
    reasons = [("own", f"the true loss exceeds {dtype}'s range"),
               ("sum", f"the batch sum of the true losses exceeds {acc}'s range"),
               ("grep", f"the true gradient exceeds {dtype}'s range"),
               ("vfin", "non-finite value though the true value fits"),
               ("gfin", "non-finite gradient though the true one fits")]
    for key, text in reasons:
        if not e[key][i]:
            tail = ": an intermediate overflowed" if key in ("vfin", "gfin") else ""
            return f"{text} {where}{tail}"
    what = "value" if e["v"][i] > e["av"][i] else "gradient"
    err, allow = (e["v"][i], e["av"][i]) if what == "value" else (e["g"][i], e["ag"][i])
    return f"{what} error {err:.3g} ULPs, above the allowance {allow:.3g}, {where}"


def _dtype_row(ctx: Context, stack: CaseStack, mags: np.ndarray, oracle: tuple[np.ndarray, ...],
               dtype: str, self_oracle: bool) -> DtypeProfile:
    """Per magnitude the worst case over the patterns, and where the safe range ends."""
    e = _case_errors(ctx, stack, oracle, dtype, self_oracle)
    uniq = np.unique(mags)
    cols = {key: np.full(uniq.size, np.nan) for key in ("v", "g", "av", "ag")}
    ok = np.zeros(uniq.size, bool)
    safe, end = float(uniq[-1]), f"finite and accurate up to the largest {dtype} value"
    for j, m in enumerate(uniq):
        idx = np.flatnonzero(mags == m)
        rep = e["rep"][idx]
        for key in ("v", "g"):
            if rep.any():  # errors only where the true values fit the dtype
                cols[key][j] = np.max(e[key][idx][rep])
        cols["av"][j] = np.min(e["av"][idx])
        cols["ag"][j] = np.nanmin(e["ag"][idx]) if np.isfinite(e["ag"][idx]).any() else np.nan
        ok[j] = bool(np.all(e["ok"][idx]))
        if not ok[j] and safe == float(uniq[-1]) and end.startswith("finite and accurate"):
            i = int(idx[np.flatnonzero(~e["ok"][idx])[0]])
            safe = float(uniq[j - 1]) if j > 0 else None  # type: ignore[assignment]
            end = _why(e, i, stack.note(i), dtype, float(m))
    return DtypeProfile(dtype, uniq, cols["v"], cols["g"], cols["av"], cols["ag"], ok, safe, end,
                        judged="finiteness" if self_oracle else "accuracy")


def profile(
    spec: LossSpec,
    *,
    seed: int = 0,
    dtypes: tuple[str, ...] | list[str] = DTYPES,
    evaluator: Evaluator | None = None,
    target: str | None = None,
    dps: int = 40,
    effort: str = "default",
    call_timeout: float = CALL_SECONDS,
    time_budget: float = BATTERY_SECONDS,
) -> Profile:
    """Measure value and gradient errors against the oracle over the magnitude grid, per dtype.

    Args:
        spec: a declaration from :func:`lossguard.declare`.
        seed: seeds the targets and the random entries of the cases.
        dtypes: which of :data:`~lossguard.tolerance.DTYPES` to profile.
        evaluator: reuse an evaluator (and its compilations).
        target: how the loss was named (for the report).
        dps: significant digits of the mpmath oracle.
        effort: rows per case, ``Effort.profile_rows`` (quick 2, default 4, thorough 16; binary:
            twice as many elements): more rows at each (magnitude, pattern) give the random entries
            of a case more chances to meet a bad spot; the mpmath oracle's time grows with them.
        call_timeout, time_budget: seconds one call of the loss, and the whole profile, may take
            (as for :func:`lossguard.run`; defaults 60 and 300; a given ``evaluator`` keeps its
            own guard's call limit).

    Returns:
        A :class:`Profile`; ``render_profile`` prints it, ``lossguard profile --png`` plots it.
    """
    rows = validate_run(seed, effort).profile_rows
    limits = limits_from(call_timeout, time_budget)
    return bounded(lambda: _profile(spec, seed, tuple(dtypes), evaluator, target, dps, rows, limits), limits,
                   "the profile")


def _profile(spec: LossSpec, seed: int, dtypes: tuple[str, ...], evaluator: Evaluator | None, target: str | None,
             dps: int, rows: int, limits: Limits) -> Profile:
    """:func:`profile` once its arguments are checked."""
    t0 = time.perf_counter()
    dtypes = tuple(d for d in DTYPES if d in dtypes)
    ev = evaluator
    if ev is None:
        ev = Evaluator(spec, Guard(limits))
        ev.guard.phase = "while profiling the loss"
    first = shape_menu(spec, "quick")[0]
    cell = Cell(rows, first.c) if first.c is not None else Cell(2 * rows)
    ctx = Context(spec=spec, evaluator=ev, seed=seed, effort="quick", cells_override=(cell,))
    stack, holders, mags = _cases(ctx, dtypes)
    *oracle, how = _oracle(ctx, stack, dps)
    prof = Profile(target=target or spec.name, kind=spec.kind, shape=str(stack.cell), oracle=how,
                   seed=seed, has_gradient=ev.has_gradient)
    for d in dtypes:
        idx = np.array([i for i, h in enumerate(holders) if d in h])
        sub = stack.take(idx)
        parts = tuple(a[idx] for a in oracle)
        self_oracle = spec.reference is None and d == "float64"
        prof.rows.append(_dtype_row(ctx, sub, mags[idx], parts, d, self_oracle))
    prof.seconds = time.perf_counter() - t0
    return prof
