"""Pieces of the ``gradient`` check: the tally of findings, slopes and their rounding allowance,
and the comparison of one oracle's slopes with finite differences.

Notation and shapes as in :mod:`lossguard.checks.gradient`: K cases, D directions v (K, D, *S)
per case, J step levels; slopes g·v and finite-difference estimates are (K, D).

Example:
    >>> import numpy as np
    >>> dots(np.ones((1, 2, 3)), np.ones((1, 4, 2, 3))).tolist()
    [[6.0, 6.0, 6.0, 6.0]]

References:
    Higham, N. J., Accuracy and Stability of Numerical Algorithms, 2nd ed., SIAM, 2002, ch. 3
    (the rounding bounds of sums and dot products).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .. import _fd
from .._budget import case_count
from .._taylor import TaylorResult
from ..cases import CaseStack, Cell
from ..evaluate import Evaluator
from ..result import Example
from ..tolerance import gamma
from ._base import Context
from ._compare import replay

__all__ = ["Probe", "probe_directions", "special_cases", "Tally", "point_values", "sum_out", "dots", "slope_allowance", "example", "directional_pair"]


def special_cases(ctx: Context, cell: Cell) -> CaseStack:
    """Zeros, exact ties and branch thresholds for ``cell`` (:func:`lossguard._fd.branch_points`);
    at large shapes packed row by row into fewer cases (:func:`lossguard._fd.packed_branch_points`)."""
    k = case_count(6, cell.elements(), least=1)
    return _fd.packed_branch_points(ctx.spec, cell, ctx.rng(f"gradient special {cell}"), ctx.domain, k)


@dataclass
class Probe:
    """One stack's shared draws and evaluations, which every gradient source is compared against.

    Shapes: K cases, D directions, predictions (K, *S), output per case ``out``; ``c`` the
    cotangent (K,) + out; ``v`` unit directions (K, D, *S) with base steps ``h0`` (K, D);
    ``fds`` the finite-difference estimates of ⟨c, L⟩ (key ``"c"``) and of Σ L (key ``"1"``);
    ``slope`` the reverse-mode (or declared) slopes ⟨g, v⟩ (K, D) with allowance ``a_dot``;
    ``comp`` the precision the loss really computes a float64 call in (a float32 loss: float32).
    """

    ctx: Context
    stack: CaseStack
    tally: Tally
    out: tuple[int, ...]
    scale: np.ndarray
    n: int
    big_g: np.ndarray
    c: np.ndarray
    cmax: np.ndarray
    vals: np.ndarray
    g: np.ndarray
    oracle: str
    v: np.ndarray
    labels: list[str]
    h0: np.ndarray
    steps: np.ndarray
    comp: str
    fds: dict[str, _fd.Directional] = field(default_factory=dict)
    noise: dict[str, np.ndarray] = field(default_factory=dict)
    f0s: dict[str, np.ndarray] = field(default_factory=dict)
    phis: dict[str, np.ndarray] = field(default_factory=dict)
    slope: np.ndarray | None = None
    a_dot: np.ndarray | None = None


def probe_directions(ctx: Context, z: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, list[str], np.ndarray]:
    """(unit directions v (K, D, *S), their labels, base steps h0 (K, D)), quantised so z ± h v is exact."""
    shape = z.shape[1:]
    v, labels = _fd.unit_directions(rng, len(z), shape, ctx.effort.directions)
    if ctx.spec.inputs == "probabilities":  # scale by the room to the boundary: points stay in [0, 1]
        v = v * np.minimum(z, 1.0 - z)[:, None]
        norm = np.sqrt(np.sum(v.reshape(v.shape[:2] + (-1,)) ** 2, axis=2))
        v = v / np.where(norm > 0, norm, 1.0).reshape(norm.shape + (1,) * len(shape))
    h0 = _fd.base_steps(z, v, ctx.spec.inputs)
    return _fd.quantise(z, v, h0), labels, h0


def point_values(ev: Evaluator, stack: CaseStack, v: np.ndarray, h0: np.ndarray, out: tuple[int, ...]) -> np.ndarray:
    """float64 loss values at every z ± h_l v, the points streamed by :func:`lossguard._fd.point_stacks`.

    Args:
        ev: the battery's evaluator. stack: K cases (predictions (K, *S)).
        v: unit directions (K, D, *S). h0: base steps (K, D). out: the loss's output shape per case.
    Returns:
        (K, D, 2, J, *out): sign + then −, J step levels h0 · 2^(−l).
    """
    parts = [ev.values(pts, "float64") for _, pts in _fd.point_stacks(stack, v, h0)]  # each chunk used at once
    return np.concatenate(parts).reshape((-1,) + v.shape[1:2] + (2, _fd.LEVELS) + out)


@dataclass
class Tally:
    """What the cells found, pair by pair (oracle against oracle), summed over the cells' probes.

    ``pairs`` counts failing cases per pair; ``worst`` keeps (error / allowance, example); ``ratio``
    is the largest error over allowance seen; the rest feed the check's details (kinks met,
    directions judged or skipped, observed Taylor orders, finite-difference allowances, notes).
    """

    total: int = 0
    bad: int = 0
    pairs: dict[str, int] = field(default_factory=dict)
    worst: list[tuple[float, Example]] = field(default_factory=list)
    ratio: float = 0.0
    kinks: int = 0
    judged: int = 0
    skipped: int = 0
    orders: list[float] = field(default_factory=list)
    fd_tol: list[float] = field(default_factory=list)
    notes: set[str] = field(default_factory=set)
    oracles: set[str] = field(default_factory=set)
    float32_cases: int = 0

    def add(self, pair: str, bad: np.ndarray, ratio: np.ndarray, examples: list[tuple[float, Example]]) -> None:
        """Record one comparison: ``bad`` (K,) failing cases, ``ratio`` (K,) error / allowance."""
        if bad.any():
            self.pairs[pair] = self.pairs.get(pair, 0) + int(bad.sum())
        finite = ratio[np.isfinite(ratio)]
        if finite.size:
            self.ratio = max(self.ratio, float(finite.max()))
        self.worst += examples


def sum_out(a: np.ndarray, lead: int) -> np.ndarray:
    """``a`` summed over every axis after the first ``lead``: (*L, *rest) → (*L)."""
    return a.reshape(a.shape[:lead] + (-1,)).sum(axis=-1)


def dots(g: np.ndarray, v: np.ndarray) -> np.ndarray:
    """g·v per (case, direction): (K, *S) and (K, D, *S) → (K, D), a matrix-vector product per
    case (no (K, D, *S) temporary; the summation order is BLAS's, which the allowance covers)."""
    k, d = v.shape[:2]
    return np.stack([v[i].reshape(d, -1) @ g[i].reshape(-1) for i in range(k)])


def slope_allowance(g: np.ndarray, v: np.ndarray, scale: np.ndarray, grad_scale: np.ndarray, n: int,
                    dtype: str = "float64") -> np.ndarray:
    """Rounding allowance of g·v (K, D): γ_n(1 + S)(‖g‖∞ + G)‖v‖₁ + γ_m Σ|g_i v_i| (Higham ch. 3).

    Args:
        g: gradients (K, *S). v: directions (K, D, *S).
        scale: S per case (K,), as :func:`~lossguard.checks.reference.case_scale` gives it (the
            largest |logit|; 1 for probability inputs).
        grad_scale: G, the size of one gradient term (K,) or a number (callers multiply it by the
            largest |cotangent| when the gradient was taken with one). n: operations per element.
        dtype: the precision the gradient was computed in (a loss that downcasts: its dtype).
    Returns:
        (K, D) absolute allowances: the gradient's own rounding (first term) and the dot product's
        (second, m = the number of elements of a case).
    """
    k, d = v.shape[:2]
    ag = np.abs(g.reshape(k, -1))
    gmax = np.where(np.isfinite(ag), ag, 0.0).max(axis=1)
    elem = gamma(n, dtype) * (1.0 + scale) * (gmax + grad_scale)  # normwise bound on each g_i
    l1, absdot = np.empty((k, d)), np.empty((k, d))
    av = np.empty(ag.shape[1])
    for i in range(k):  # one direction at a time: no (K, D, *S) temporary
        for j in range(d):
            np.abs(v[i, j].reshape(-1), out=av)
            l1[i, j] = av.sum()
            with np.errstate(invalid="ignore"):  # a non-finite g_i makes Σ|g_i v_i| inf or nan
                absdot[i, j] = av @ ag[i]
    dot = gamma(v[0, 0].size, "float64") * absdot
    return elem[:, None] * l1 + dot


def example(ctx: Context, stack: CaseStack, k: int, what: str, got: float, expected: object,
             err: float, tol: float, note: str) -> tuple[float, Example]:
    """(error / allowance, the :class:`Example`) for case ``k`` of ``stack``, with its replay line;
    ``expected`` may be text (a one-sided interval at a kink), then the relative error is the
    absolute one."""
    ref = float(expected) if isinstance(expected, (float, np.floating)) else float("nan")
    rel = err / abs(ref) if np.isfinite(ref) and ref != 0 else err
    ex = Example(what=what, predictions=stack.predictions[k], targets=stack.targets[k], got=got,
                 expected=expected, abs_err=err, rel_err=rel, allowance=tol,
                 note="; ".join(s for s in (stack.note(k), note) if s),
                 replay=replay(ctx.spec, stack.predictions[k], stack.targets[k]))
    return (err / tol if tol > 0 else np.inf), ex


def directional_pair(ctx: Context, tally: Tally, stack: CaseStack, what: str, slope: np.ndarray,
                      fd: _fd.Directional, a_dot: np.ndarray, labels: list[str],
                      taylor: TaylorResult | None) -> tuple[np.ndarray, np.ndarray]:
    """Compare an oracle's slopes with the finite differences and record the result in ``tally``.

    Where the loss is smooth along a direction, the slope must lie within the central estimate's
    allowance plus the slope's own ``a_dot``; at a kink, between the one-sided estimates, widened
    by a margin of 2 · (forward error + backward error) + ``a_dot``. Directions that are neither
    (the finite differences could not judge them) are not compared.

    Args:
        slope: the oracle's g·v (K, D). fd: the finite-difference estimates (K, D).
        a_dot: rounding allowance of the slopes (K, D). labels: one name per direction (D,).
        taylor: observed Taylor orders for the examples' notes, or ``None``.
    Returns:
        (bad per case (K,), bad per case and direction (K, D)).
    """
    c_est, f_est, b_est = fd.central, fd.forward, fd.backward
    smooth = fd.smooth
    tol = fd.allowance() + a_dot
    with np.errstate(invalid="ignore"):
        err = np.abs(slope - c_est.value)
        bad_s = smooth & ~(err <= tol)
        margin = 2.0 * (f_est.error + b_est.error) + a_dot
        lo = np.minimum(f_est.value, b_est.value) - margin
        hi = np.maximum(f_est.value, b_est.value) + margin
        bad_k = fd.kink & ~((slope >= lo) & (slope <= hi))
        ratio = np.where(smooth, err / tol, np.where(fd.kink, np.maximum(lo - slope, slope - hi) / margin + 1, 0.0))
        bad = bad_s | bad_k
        ratio = np.where(np.isnan(ratio) & bad, np.inf, ratio)
        gap = np.fmax(lo - slope, slope - hi)  # distance outside the one-sided interval
    examples = []
    flat = np.flatnonzero(bad)
    for k, d in zip(*np.unravel_index(flat[np.argsort(-ratio.reshape(-1)[flat], kind="stable")][:2], bad.shape)):
        order = taylor.describe((k, d)) if taylor is not None else ""
        if fd.kink[k, d]:
            exp: object = f"between {f_est.value[k, d]:.9g} and {b_est.value[k, d]:.9g} (one-sided, a kink)"
            e_kd = float(gap[k, d]) if np.isfinite(gap[k, d]) else np.inf
            examples.append(example(ctx, stack, int(k), f"{what}, {labels[d]}", float(slope[k, d]), exp,
                                     e_kd, float(margin[k, d]), order))
        else:
            examples.append(example(ctx, stack, int(k), f"{what}, {labels[d]}", float(slope[k, d]),
                                     float(c_est.value[k, d]), float(err[k, d]), float(tol[k, d]), order))
    tally.add(what, bad.any(axis=1), ratio.max(axis=1), examples)
    return bad.any(axis=1), bad
