"""Precision profile: how accurate a loss is, in each float dtype, as its logits grow.

Notation and shapes: cases of :data:`PROFILE_ROWS` rows with the battery's class count (class
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
from typing import Any

import numpy as np

from .cases import CaseStack, Cell, concat, ladder_stack, shape_menu
from .checks._base import Context
from .checks.finite import ACCUMULATOR, reduced_fits, reference_batch
from .checks.reference import case_scale, gradient_term_scale
from .evaluate import Evaluator, NoGradient
from .ladders import common_grid, largest_finite, profile_magnitudes, round_down, ulp
from .spec import LossSpec
from .tolerance import DTYPES, op_count, rounding_allowance

try:  # optional dependency: the oracle falls back to the float64 reference without it
    import mpmath as _mpmath

    _MP: Any = _mpmath.mp
except ImportError:  # pragma: no cover - exercised only where mpmath is absent
    _MP = None

__all__ = ["PROFILE_PATTERNS", "DtypeProfile", "Profile", "profile", "mp_available", "mp_reference_stack"]

PROFILE_PATTERNS = ("right", "wrong", "equal", "huge")
#: Rows per case (binary: twice as many elements); few, since the oracle runs in mpmath.
PROFILE_ROWS = 4


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
) -> Profile:
    """Measure value and gradient errors against the oracle over the magnitude grid, per dtype.

    Args:
        spec: a declaration from :func:`lossguard.declare`.
        seed: seeds the targets and the random entries of the cases.
        dtypes: which of :data:`~lossguard.tolerance.DTYPES` to profile.
        evaluator: reuse an evaluator (and its compilations).
        target: how the loss was named (for the report).
        dps: significant digits of the mpmath oracle.

    Returns:
        A :class:`Profile`; ``render_profile`` prints it, ``lossguard profile --png`` plots it.
    """
    t0 = time.perf_counter()
    dtypes = tuple(d for d in DTYPES if d in dtypes)
    ev = evaluator or Evaluator(spec)
    first = shape_menu(spec, "quick")[0]
    cell = Cell(PROFILE_ROWS, first.c) if first.c is not None else Cell(2 * PROFILE_ROWS)
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


# ------------------------------------------------------------------------------ mpmath oracle
# Each registry reference written once more in mpmath, per example, with its gradient carried by
# forward-mode dual numbers (value a, tangent d_c = ∂/∂z_c): exact arithmetic rules, no derivation
# to trust. Written in the registry's own stable forms, so 40 digits suffice at every magnitude.


def mp_available() -> bool:
    """Whether mpmath can be imported (it is an optional dependency)."""
    return _MP is not None


class _Dual:
    """a + Σ_c d_c ε_c over mpmath numbers (ε_c ε_k = 0): forward mode, all C tangents at once."""

    __slots__ = ("a", "d")

    def __init__(self, a: Any, d: list[Any]) -> None:
        self.a, self.d = a, d

    @staticmethod
    def const(value: Any, c: int) -> _Dual:
        return _Dual(_MP.mpf(value), [_MP.zero] * c)

    def _lift(self, o: Any) -> _Dual:
        return o if isinstance(o, _Dual) else _Dual.const(o, len(self.d))

    def __add__(self, o: Any) -> _Dual:
        o = self._lift(o)
        return _Dual(self.a + o.a, [x + y for x, y in zip(self.d, o.d)])

    def __neg__(self) -> _Dual:
        return _Dual(-self.a, [-x for x in self.d])

    def __sub__(self, o: Any) -> _Dual:
        return self + (-self._lift(o))

    def __rsub__(self, o: Any) -> _Dual:
        return self._lift(o) - self

    def __mul__(self, o: Any) -> _Dual:
        if not isinstance(o, _Dual):
            return _Dual(self.a * _MP.mpf(o), [x * o for x in self.d])
        return _Dual(self.a * o.a, [self.a * y + o.a * x for x, y in zip(self.d, o.d)])  # product rule

    __radd__, __rmul__ = __add__, __mul__


def _chain(x: _Dual, value: Any, slope: Any) -> _Dual:
    """f(x) with f'(x) = slope; a zero tangent stays zero even where the slope is infinite."""
    return _Dual(value, [slope * t if t != 0 else _MP.zero for t in x.d])


def _exp(x: _Dual) -> _Dual:
    e = _MP.exp(x.a)
    return _chain(x, e, e)  # (eˣ)' = eˣ


def _log(x: _Dual, one: int = 0) -> _Dual:
    """log(one + x) (``one`` = 1: log1p, accurate for small x); −inf, with nan slope, at 0."""
    if one + x.a == 0:
        return _chain(x, _MP.ninf, _MP.nan)
    return _chain(x, _MP.log1p(x.a) if one else _MP.log(x.a), 1 / (one + x.a))  # (log(1 + x))' = 1/(1 + x)


def _softplus(x: _Dual) -> _Dual:
    # log(1 + eˣ) = x + log1p(e^(−x)) for x > 0, log1p(eˣ) otherwise (no overflow, no cancellation)
    return x + _log(_exp(-x), 1) if x.a > 0 else _log(_exp(x), 1)


def _lse(zs: list[_Dual], skip: int | None = None) -> _Dual:
    """log Σ_{c ≠ skip} e^(z_c) = z_k + log1p(Σ_{c ≠ k} e^(z_c − z_k)), z_k the largest."""
    idx = [c for c in range(len(zs)) if c != skip]
    k = max(idx, key=lambda c: zs[c].a)
    rest = [_exp(zs[c] - zs[k]) for c in idx if c != k]  # z_k is a variable in both places
    return zs[k] + _log(sum(rest[1:], rest[0]), 1) if rest else zs[k]


def _mp_example(name: str, z: list[_Dual], y: Any, inputs: str, prm: dict[str, Any]) -> _Dual:
    """ℓ of one example (categorical/distribution: a row; binary: one element)."""
    c, zero = len(z), _Dual.const(0, len(z))
    gamma, a = float(prm.get("gamma", 2.0)), prm.get("alpha")
    if name in ("bce", "focal_binary"):
        x, t = z[0], _MP.mpf(float(y))
        if name == "bce" and inputs == "probabilities":  # −[w y log p + (1 − y) log(1 − p)], 0 · log 0 = 0
            w = 1.0 if prm.get("pos_weight") is None else float(prm["pos_weight"])
            out = zero - w * t * _log(x) if t != 0 else zero
            return out - (1 - t) * _log(-x, 1) if t != 1 else out
        if name == "bce":
            w = 1.0 if prm.get("pos_weight") is None else float(prm["pos_weight"])
            return (1 - t) * _softplus(x) + w * t * _softplus(-x)
        lp, lq = -_softplus(-x), -_softplus(x)  # log σ(z), log(1 − σ(z)) = log σ(−z)
        l1 = lq if t == 1 else lp if t == 0 else _log(t * _exp(lq) + (1 - t) * _exp(lp))  # log(1 − p_t)
        at = 1.0 if a is None else a * t + (1 - a) * (1 - t)
        # (1 − p_t)^γ = e^(γ log(1 − p_t)), times the cross-entropy −[y log p + (1 − y) log(1 − p)]
        return at * -(t * lp + (1 - t) * lq) * (_exp(gamma * l1) if gamma else 1)
    w = prm.get("weight") or [1.0] * c
    if inputs == "probabilities":  # categorical_ce: −Σ_c w_c y_c log p_c
        if np.ndim(y) == 0:
            return -_log(z[int(y)])
        return sum((-(w[j] * float(y[j])) * _log(z[j]) for j in range(c) if y[j] != 0), zero)
    lse = _lse(z)
    if name == "categorical_ce" and np.ndim(y) == 0:
        return lse - z[int(y)]
    if name == "categorical_ce":
        return sum(((w[j] * float(y[j])) * (lse - z[j]) for j in range(c) if y[j] != 0), zero)
    if name == "smoothed_ce":
        eps = float(prm.get("epsilon", 0.1))
        return sum((((1 - eps) * (j == int(y)) + eps / c) * (lse - z[j]) for j in range(c)), zero)
    if name == "kl_divergence":  # Σ y_c (log y_c − ls_c), 0 · log 0 = 0
        return sum((float(y[j]) * (_MP.log(float(y[j])) - (z[j] - lse)) for j in range(c) if y[j] != 0), zero)
    if name == "focal_multiclass":
        lab = int(y)
        ay = 1.0 if a is None else float(a) if np.ndim(a) == 0 else float(a[lab])
        l1 = _lse(z, skip=lab) - lse  # log(1 − p_y) = logsumexp_{c≠y} z_c − logsumexp z
        return ay * (lse - z[lab]) * (_exp(gamma * l1) if gamma else 1)
    raise KeyError(name)


def _split(x: Any) -> tuple[float, float]:
    """An mpmath number as float64 hi + lo (lo the rounding error of hi; 0 when hi is not finite)."""
    hi = float(x)
    return hi, (float(x - hi) if np.isfinite(hi) else 0.0)


def mp_reference_stack(spec: LossSpec, predictions: np.ndarray, targets: np.ndarray, *,
                       reduction: str = "mean", dps: int = 40) -> tuple[np.ndarray, ...]:
    """The declared reference in mpmath on every case of a stack, reduced like the loss.

    Shapes: predictions (K, …) and targets as in :mod:`lossguard.cases`. Returns float64
    ``(v_hi, v_lo, g_hi, g_lo)``: the value (K,) or (K, per-example) and the gradient (K, …) of
    the reduced loss (a VJP with ones for ``reduction="none"``), each split as hi + lo.
    Weights follow :mod:`lossguard.references._base` (ignored labels 0, class weights).
    """
    from .references import get_reference, validate_params

    ref, binary = get_reference(spec.reference or ""), spec.kind == "binary"
    prm = validate_params(ref, spec.params, None if binary else predictions.shape[-1])
    out: tuple[list[Any], ...] = ([], [], [], [])
    with _MP.workdps(dps):  # scoped: the precision is restored on exit
        for zk, yk in zip(predictions, targets):
            zf, yf = (zk.reshape(-1, 1), yk.reshape(-1)) if binary else (zk, yk)
            n, c = zf.shape
            ignored = (yf == spec.ignore_label) if spec.ignore_label is not None else np.zeros(n, bool)
            yy = np.where(ignored, 0, yf) if spec.kind == "categorical" else yf
            w = np.ones(n) if ref.example_weights is None or binary else \
                np.asarray(ref.example_weights(yy, **prm), dtype=np.float64).reshape(-1)
            w = np.where(ignored, 0.0, w)
            ells = [_mp_example(ref.name, [_Dual(_MP.mpf(float(v)), [_MP.one if j == q else _MP.zero
                                                                     for j in range(c)])
                                           for q, v in enumerate(zf[i])], yy[i], spec.inputs, prm)
                    if w[i] != 0 else _Dual.const(0, c) for i in range(n)]
            total = _MP.fsum(_MP.mpf(float(x)) for x in w)
            if reduction == "mean" and total == 0:  # every example ignored: 0/0 (as the reference)
                vals, grads = [(float("nan"), 0.0)], [(0.0, 0.0)] * (n * c)
            else:
                scale = [_MP.mpf(float(x)) / (total if reduction == "mean" else 1) for x in w]
                terms = [(scale[i] * e.a if w[i] != 0 else _MP.zero) for i, e in enumerate(ells)]
                vals = [_split(t) for t in terms] if reduction == "none" else [_split(_MP.fsum(terms))]
                grads = [_split(scale[i] * t) if w[i] != 0 else (0.0, 0.0) for i, e in enumerate(ells) for t in e.d]
            for slot, pairs in ((0, vals), (2, grads)):
                out[slot].append([p[0] for p in pairs])
                out[slot + 1].append([p[1] for p in pairs])
    k = predictions.shape[0]
    vshape = (k,) if reduction != "none" else (k,) + (targets.shape[1:] if binary else targets.shape[1:2])
    return tuple(np.asarray(o).reshape(shape) for o, shape in
                 zip(out, (vshape, vshape, predictions.shape, predictions.shape)))
