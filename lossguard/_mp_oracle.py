"""The mpmath oracle: each registry reference written once more in mpmath, per example.

Notation and shapes: a case's predictions (N, C), class axis last (binary: each element is an
example, a row of one logit); ℓ_i the per-example loss, w_i its weight (0 for the ignore label,
else the reference's example weight), W = Σ w_i. A case's value is Σ w_i ℓ_i / W (mean),
Σ w_i ℓ_i (sum) or the w_i ℓ_i themselves (none), as in :mod:`lossguard.references._base`.

Formula: the gradient is carried by forward-mode dual numbers (value a, tangents d_c = ∂/∂z_c),
so exact arithmetic rules give it with no derivation to trust. The references are written in
the registry's own stable forms, so 40 significant digits suffice at every magnitude.

Cost: a dual number carries C tangents, so one example's gradient costs O(C²) operations (a
second at C = 1000); its value alone costs O(C). :func:`settle_value` therefore evaluates in
mpmath only the examples whose float64 value overflowed, and stops as soon as the case's value
is known to exceed every float dtype; the others enter through an exact sum at C speed
(:func:`_exact_sum`: 4 million binary examples in under a second, where mpmath's own ``fsum``
took 80 s); :func:`settle_grad_rows` takes the dual numbers only to the examples whose float64
gradient row is not finite.

References:
    F. Johansson et al., mpmath: a Python library for arbitrary-precision floating-point
    arithmetic, https://mpmath.org.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .spec import LossSpec

try:  # optional dependency: the callers fall back to the float64 reference without it
    import mpmath as _mpmath

    _MP: Any = _mpmath.mp
except ImportError:  # pragma: no cover - exercised only where mpmath is absent
    _MP = None

__all__ = ["mp_available", "mp_reference_stack", "row_values", "row_grads", "settle_value", "settle_grad_rows",
           "ROWS_EVALUATED"]

#: Examples evaluated in mpmath so far, by kind ("value" or "gradient"): read by tests and benchmarks.
ROWS_EVALUATED = {"value": 0, "gradient": 0}


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
    """log Σ_{c ≠ skip} e^(z_c) = z_k + log1p(Σ_{c ≠ k} e^(z_c − z_k)), z_k the largest.

    Without tangents (values only) the terms with z_c − z_k below −(dps·ln 10 + ln C + 10) are
    left out: together they are below 10^(−dps) e^(−10), under the working precision of log1p.
    """
    idx = [c for c in range(len(zs)) if c != skip]
    k = max(idx, key=lambda c: zs[c].a)
    if not zs[k].d:
        far = -(_MP.dps * 2.302585092994046 + np.log(len(zs)) + 10.0)  # ln 10 = 2.302585…
        idx = [c for c in idx if c == k or zs[c].a - zs[k].a > far]
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
            yy, w = _example_weights(spec, ref, yf, prm)
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


# ------------------------------------------------------------------ only the examples that need it


def _example_weights(spec: LossSpec, ref: Any, y: np.ndarray, prm: dict[str, Any]) -> tuple[np.ndarray, np.ndarray]:
    """(targets with ignored labels at 0, w) for the examples ``y`` of one case."""
    n = y.shape[0]
    ignored = (y == spec.ignore_label) if spec.ignore_label is not None else np.zeros(n, bool)
    yy = np.where(ignored, 0, y) if spec.kind == "categorical" else y
    binary = spec.kind == "binary"
    w = np.ones(n) if ref.example_weights is None or binary else \
        np.asarray(ref.example_weights(yy, **prm), dtype=np.float64).reshape(-1)
    return yy, np.where(ignored, 0.0, w)


def _rows_setup(spec: LossSpec, z: np.ndarray) -> tuple[Any, dict[str, Any]]:
    from .references import get_reference, validate_params

    ref = get_reference(spec.reference or "")
    return ref, validate_params(ref, spec.params, None if spec.kind == "binary" else z.shape[-1])


def row_values(spec: LossSpec, z: np.ndarray, y: np.ndarray, *, dps: int = 40) -> list[Any]:
    """ℓ_i in mpmath (values only, O(C) each) for examples ``z`` (R, C) (binary: (R, 1)), labels or
    target rows ``y`` (R, …) with ignored labels already replaced."""
    ref, prm = _rows_setup(spec, z)
    ROWS_EVALUATED["value"] += z.shape[0]
    with _MP.workdps(dps):
        return [_mp_example(ref.name, [_Dual(_MP.mpf(float(v)), []) for v in z[i]], y[i], spec.inputs, prm).a
                for i in range(z.shape[0])]


def row_grads(spec: LossSpec, z: np.ndarray, y: np.ndarray, *, dps: int = 40) -> list[list[Any]]:
    """∂ℓ_i/∂z_i in mpmath (dual numbers, O(C²) each), one list of C numbers per example."""
    ref, prm = _rows_setup(spec, z)
    c = z.shape[1]
    ROWS_EVALUATED["gradient"] += z.shape[0]
    with _MP.workdps(dps):
        return [_mp_example(ref.name, [_Dual(_MP.mpf(float(v)), [_MP.one if j == q else _MP.zero for j in range(c)])
                                       for q, v in enumerate(z[i])], y[i], spec.inputs, prm).d
                for i in range(z.shape[0])]


def settle_value(spec: LossSpec, z: np.ndarray, y: np.ndarray, ell: np.ndarray, *, reduction: str,
                 beyond: float, dps: int = 40) -> float | np.ndarray:
    """One case's true value where its float64 reference overflowed, from mpmath on few examples.

    Args:
        spec: the declaration (its reference, parameters, ignore label).
        z, y: the case's examples (M, C) (binary: (M, 1)) and targets (M, …), ignore label kept.
        ell: the float64 reference ℓ_i (M,); only the examples where it is not finite are
            evaluated in mpmath (values only, O(C) each), the others enter exactly as they are.
        reduction: "mean", "sum" or "none".
        beyond: a value above which the case fits no dtype (the caller's bound); once the exact
            partial sum of a nonnegative reference passes it, the remaining examples are skipped.

    Returns:
        The reduced value, rounded to float64 (inf when it passed ``beyond``), or the (M,) values
        w_i ℓ_i for "none".
    """
    ref, prm = _rows_setup(spec, z)
    yy, w = _example_weights(spec, ref, y, prm)
    live = w != 0
    hot = np.flatnonzero(live & ~np.isfinite(ell))
    with _MP.workdps(dps):
        if reduction == "none":
            value = np.where(live, w * ell, 0.0)
            for i, li in zip(hot, row_values(spec, z[hot], yy[hot], dps=dps)):
                value[i] = float(_MP.mpf(float(w[i])) * li)
            return value
        big_w = _weighted_sum(w, np.ones_like(w))
        if reduction == "mean" and big_w == 0:  # every example ignored: 0/0, as the reference
            return float("nan")
        div = big_w if reduction == "mean" else _MP.one
        fine = live & np.isfinite(ell)
        total = _weighted_sum(w[fine], ell[fine])
        monotone = "nonnegative" in ref.properties  # every term ≥ 0: a partial sum bounds the total below
        # the float64 overflows to +inf first: they decide soonest whether the case fits
        for i in hot[np.argsort(-np.nan_to_num(ell[hot], nan=0.0), kind="stable")]:
            total += _MP.mpf(float(w[i])) * row_values(spec, z[i:i + 1], yy[i:i + 1], dps=dps)[0]
            if monotone and total / div > beyond:
                return float("inf")
        return float(total / div)


#: Binary exponent the terms of :func:`_exact_sum` are scaled by, so that a sum of millions of
#: float64 values near the top of the range cannot overflow (2^-64 · 1.8e308 · 2^23 ≪ 1.8e308).
_SCALE = 64


def _exact_sum(x: np.ndarray) -> Any:
    """Σ x for finite float64 ``x``, in mpmath, good to far more than 40 digits, at C speed.

    Each term is scaled by 2^-64, which is exact unless it lands among the subnormals (below
    2^-1022); such a term loses at most half their spacing, 2^-1075, which is 2^-1011 once scaled
    back: nothing a 40-digit total of values that overflowed float64 can see. ``math.fsum`` returns the correctly rounded
    sum of its terms; appending the negated result and summing again gives the correctly rounded
    remainder, so three rounds carry the sum to about 160 bits (Shewchuk, "Adaptive precision
    floating-point arithmetic and fast robust geometric predicates", Discrete & Computational
    Geometry 18, 1997, is the algorithm inside ``math.fsum``).
    """
    terms = np.ldexp(np.asarray(x, dtype=np.float64), -_SCALE).tolist()  # x · 2^-64, exact (see above)
    total = _MP.zero
    for _ in range(3):
        part = math.fsum(terms)
        if part == 0.0:
            break
        total += _MP.mpf(part)
        terms.append(-part)
    return _MP.ldexp(total, _SCALE)


def _weighted_sum(w: np.ndarray, x: np.ndarray) -> Any:
    """Σ w_i x_i in mpmath: the x of each distinct weight summed by :func:`_exact_sum`, then
    scaled by that weight (the weights are class weights, 1 or 0: few distinct values)."""
    total = _MP.zero
    for v in np.unique(w):
        if v != 0.0:
            total += _MP.mpf(float(v)) * _exact_sum(x[w == v])
    return total


def settle_grad_rows(spec: LossSpec, z: np.ndarray, y: np.ndarray, grad: np.ndarray, *, reduction: str,
                     dps: int = 40) -> tuple[np.ndarray, np.ndarray]:
    """The exact gradient rows of one case where the float64 reference's are not finite.

    Shapes as in :func:`settle_value`; ``grad`` (M, C) the float64 ∂ℓ_i/∂z_i. Returns ``(rows,
    exact)``: the examples whose row was not finite, and their rows w_i ∂ℓ_i/∂z_i / W (mean) or
    w_i ∂ℓ_i/∂z_i, evaluated with dual numbers (O(C²) each) and rounded to float64.
    """
    ref, prm = _rows_setup(spec, z)
    yy, w = _example_weights(spec, ref, y, prm)
    rows = np.flatnonzero((w != 0) & ~np.all(np.isfinite(grad.reshape(len(w), -1)), axis=1))
    if rows.size == 0:
        return rows, np.zeros((0,) + grad.shape[1:])
    with _MP.workdps(dps):
        div = _MP.fsum(_MP.mpf(float(x)) for x in w) if reduction == "mean" else _MP.one
        exact = [[float(_MP.mpf(float(w[i])) / div * t) for t in r]
                 for i, r in zip(rows, row_grads(spec, z[rows], yy[rows], dps=dps))]
    return rows, np.asarray(exact, dtype=np.float64).reshape((rows.size,) + grad.shape[1:])
