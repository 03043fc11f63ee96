"""Finite differences for checking gradients: Richardson tables with their own error estimate.

Notation and shapes: a stack of K cases with predictions ``z`` of shape (K, *S) (class axis
last); D directions per case ``v`` of shape (K, D, *S); J step levels h_j = h0 · 2^(−j),
j = 0 … J−1, one h0 per (case, direction). The scalar studied is φ(t) = f(z + t v); its values
at the perturbed points come in arrays (J, *B) where B is any batch shape, usually (K, D).

Formulas:

    central    C(h) = (φ(h) − φ(−h)) / 2h = φ'(0) + c₂h² + c₄h⁴ + …
    one-sided  F(h) = (φ(h) − φ(0)) / h,  B(h) = (φ(0) − φ(−h)) / h = φ'(0) ± c₁h + c₂h² + …

Richardson extrapolation with step ratio 2 removes one power at a time:
R[i, j] = R[i, j−1] + (R[i, j−1] − R[i−1, j−1]) / (2^(p·j) − 1), with p = 2 for the central
table (only even powers) and p = 1 for the one-sided tables. Every entry is a fixed linear
combination Σ_l a_l · D(h_l) of the raw differences, so a bound ε on the rounding error of each
φ value propagates exactly: |rounding of R| ≤ Σ_l |a_l| · b_l with b_l = ε/h_l (central) or
2ε/h_l (one-sided). The truncation error of an entry is estimated from the table itself, as the
larger of its distances to the two entries it was built from (Ridders 1982); the entry with the
smallest estimate + rounding bound is reported (the first row, which has no finer neighbour to be
judged by, never is).

Kinks: where φ is not differentiable at 0 the one-sided tables disagree by more than their
error estimates; :func:`directional` flags such points so that a check can judge them by the
interval between the two one-sided derivatives instead of reporting a false failure. A kink
*near* 0, inside the step range, breaks the power law of the table (:func:`consistent`); such
points are neither smooth nor kinks and are left unjudged rather than misjudged.

Exact steps: :func:`snap` rounds predictions to 50 significant bits and :func:`quantise`
rounds directions so that every h_j v_i is a multiple of 8 ulp(z_i); then z + h_j v is exactly
representable wherever the step is small against z (and rounds by at most a relative 5u of the
step elsewhere), so the only rounding left in φ is the loss's own.

Example:
    >>> import numpy as np
    >>> h = 2.0 ** -np.arange(4) / 8
    >>> d = directional(np.sin(0.0) * np.ones(1), np.sin(h)[:, None], np.sin(-h)[:, None],
    ...                 h[:, None], np.full(1, 1e-16))
    >>> abs(float(d.central.value[0]) - 1.0) < 1e-12, bool(d.kink[0])
    (True, False)

References:
    Richardson, L. F., "The deferred approach to the limit", Philosophical Transactions of the
    Royal Society A 226, 1927. Ridders, C. J. F., "Accurate computation of F'(x) and
    F'(x) F''(x)", Advances in Engineering Software 4(2), 1982. Squire, W. and Trapp, G.,
    "Using complex variables to estimate derivatives of real functions", SIAM Review 40(1), 1998
    (:func:`complex_step`).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ._branch_points import THRESHOLDS, branch_points, packed_branch_points
from .cases import CaseStack

__all__ = ["LEVELS", "CHUNK_BYTES", "THRESHOLDS", "Estimate", "Directional", "richardson", "consistent",
           "directional", "snap", "quantise", "unit_directions", "base_steps", "step_ladder", "point_stacks",
           "branch_points", "packed_branch_points", "complex_step"]

#: Step levels per direction: h0, h0/2, h0/4, h0/8.
LEVELS = 4
#: First step for logits, a power of two (losses in logits curve on a scale of about one logit).
H0_LOGITS = 2.0 ** -5
#: Largest predictions array (bytes) built or sent to the evaluator at once.
CHUNK_BYTES = 64 * 2**20
#: Directions with at most this many coordinates are replaced by the coordinate axes.
FULL_JACOBIAN_MAX = 12
#: Dense directions with more coordinates than this (2^16; the default menu's shapes have at
#: most a few thousand, a declared class count can exceed it) are drawn uniform on a cube
#: instead of Gaussian.
CUBE_DIRECTIONS_ABOVE = 2**16


@dataclass
class Estimate:
    """One derivative estimate per batch element: value, table error estimate, rounding bound."""

    value: np.ndarray
    table_error: np.ndarray
    rounding: np.ndarray

    @property
    def error(self) -> np.ndarray:
        """Estimated total error: table estimate plus propagated rounding bound."""
        return self.table_error + self.rounding


@dataclass
class Directional:
    """Central and one-sided derivative estimates along each direction; where φ is smooth over
    the step range, where it has a kink at 0, and (neither) where it cannot be judged."""

    central: Estimate
    forward: Estimate
    backward: Estimate
    kink: np.ndarray
    smooth: np.ndarray

    @property
    def judged(self) -> np.ndarray:
        """Smooth on the whole step range, or a kink with clean one-sided tables; elsewhere (a
        kink or branch within the step range but not at the point) nothing can be concluded."""
        return self.smooth | self.kink

    def allowance(self) -> np.ndarray:
        """Allowed |oracle − central| from the finite differences alone: twice the table
        estimate (it is an estimate, not a bound) plus the rounding bound."""
        return 2.0 * self.central.table_error + self.central.rounding


@lru_cache(maxsize=16)
def _coefficients(levels: int, power: int) -> tuple[np.ndarray, list[tuple[int, int]]]:
    """Weights a[e, l] with R_e = Σ_l a[e, l] D_l for every table entry e = (i, j)."""
    rows: dict[tuple[int, int], np.ndarray] = {}
    for i in range(levels):
        rows[(i, 0)] = np.eye(levels)[i]
        for j in range(1, i + 1):
            f = 2.0 ** (power * j) - 1.0
            rows[(i, j)] = rows[(i, j - 1)] + (rows[(i, j - 1)] - rows[(i - 1, j - 1)]) / f
    keys = sorted(rows)
    return np.stack([rows[k] for k in keys]), keys


def richardson(samples: np.ndarray, bounds: np.ndarray, power: int) -> Estimate:
    """Extrapolate raw differences D(h_l), h_l = h0 2^(−l), to h → 0.

    Shapes: ``samples`` and ``bounds`` (J, *B) → an :class:`Estimate` of shape B.
    Formula: R[i, j] = R[i, j−1] + (R[i, j−1] − R[i−1, j−1]) / (2^(p j) − 1) (module doc).

    Args:
        samples: D(h_l), J ≥ 2 levels on axis 0.
        bounds: bound on the rounding error of each D(h_l).
        power: 2 for central differences (even error powers), 1 for one-sided ones.
    Returns:
        The entry with the smallest estimated error per batch element; non-finite samples give
        a nan value with infinite error.
    """
    a, keys = _coefficients(samples.shape[0], power)
    with np.errstate(invalid="ignore", over="ignore"):
        r = np.tensordot(a, samples, axes=(1, 0))  # every entry is a fixed combination (linear)
        rnd = np.tensordot(np.abs(a), bounds, axes=(1, 0))  # |Σ a_l e_l| ≤ Σ |a_l| b_l
        index = {k: e for e, k in enumerate(keys)}
        err = np.empty_like(r)
        for e, (i, j) in enumerate(keys):
            if i == 0:  # no finer neighbour to judge it by: never chosen
                err[e] = np.inf
            elif j == 0:  # |D(h_i) − D(h_{i−1})| ≈ 3 × the error of D(h_i) when h² dominates
                err[e] = np.abs(r[e] - r[index[(i - 1, 0)]])
            else:  # Ridders: distance to both parents
                err[e] = np.maximum(np.abs(r[e] - r[index[(i, j - 1)]]), np.abs(r[e] - r[index[(i - 1, j - 1)]]))
        total = np.where(np.isfinite(err) & np.isfinite(rnd), err + rnd, np.inf)
    best = np.argmin(total, axis=0)
    pick = lambda x: np.take_along_axis(x, best[None], axis=0)[0]  # noqa: E731
    value, t_err, rounding = pick(r), pick(err), pick(rnd)
    bad = ~np.isfinite(pick(total))
    return Estimate(np.where(bad, np.nan, value), np.where(bad, np.inf, t_err), np.where(bad, np.inf, rounding))


def consistent(samples: np.ndarray, bounds: np.ndarray, power: int) -> np.ndarray:
    """True where successive raw differences shrink as a smooth function's must.

    Shapes: ``samples`` and ``bounds`` (J, *B) → bool B.
    Formula: Δ_l = D(h_l) − D(h_{l+1}) ≈ c h_l^p (1 − 2^(−p)), so Δ_l / Δ_{l+1} → 2^p (higher
    powers push it up, towards 2^(p+1)); a ratio outside [2^(p−1/2), 2^(p+1)] (or a sign change)
    while both differences exceed their rounding bounds means the expansion does not hold on
    this step range — a kink or a branch lies within it, or (ratio 2 in a central table) a kink
    sits at the point itself — and the table's error estimate cannot be trusted.
    """
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        delta = samples[:-1] - samples[1:]
        noise = bounds[:-1] + bounds[1:]
        loud = np.abs(delta) > noise
        ratio = delta[:-1] / delta[1:]
        ok = ~loud[1:] | (loud[:-1] & (ratio >= 2.0 ** (power - 0.5)) & (ratio <= 2.0 ** (power + 1)))
        return np.all(ok, axis=0) & np.all(np.isfinite(samples), axis=0)


def directional(
    f0: np.ndarray, f_plus: np.ndarray, f_minus: np.ndarray, steps: np.ndarray, noise: np.ndarray
) -> Directional:
    """Directional derivative φ'(0) from φ(±h_l), with one-sided estimates and kink flags.

    Shapes: ``f0`` and ``noise`` B; ``f_plus``, ``f_minus`` and ``steps`` (J, *B).

    Args:
        f0: φ(0). f_plus / f_minus: φ(h_l) and φ(−h_l). steps: h_l (halving along axis 0).
        noise: a bound ε on the rounding error of each φ value.
    Returns:
        :class:`Directional`; ``kink`` is True where the one-sided derivatives differ by more
        than twice the sum of their estimated errors.
    """
    with np.errstate(invalid="ignore", over="ignore"):
        central = richardson((f_plus - f_minus) / (2.0 * steps), noise / steps, power=2)
        forward = richardson((f_plus - f0) / steps, 2.0 * noise / steps, power=1)
        backward = richardson((f0 - f_minus) / steps, 2.0 * noise / steps, power=1)
        one_sided_ok = consistent((f_plus - f0) / steps, 2.0 * noise / steps, 1) & \
            consistent((f0 - f_minus) / steps, 2.0 * noise / steps, 1)
        gap = np.abs(forward.value - backward.value)
        kink = one_sided_ok & np.isfinite(gap) & (gap > 2.0 * (forward.error + backward.error))
        smooth = ~kink & consistent((f_plus - f_minus) / (2.0 * steps), noise / steps, 2) & np.isfinite(central.value)
    return Directional(central, forward, backward, kink, smooth)


def snap(z: np.ndarray, bits: int = 50) -> np.ndarray:
    """Round to ``bits`` significant bits (zeros, ties and signs are kept; relative change ≤ 2^−bits)."""
    m, e = np.frexp(np.asarray(z, dtype=np.float64))
    return np.ldexp(np.round(m * 2.0**bits) / 2.0**bits, e)  # frexp: z = m 2^e, 1/2 ≤ |m| < 1


def quantise(z: np.ndarray, v: np.ndarray, h0: np.ndarray, levels: int = LEVELS) -> np.ndarray:
    """Round directions so that z + h_l v is exact where the step is small against z.

    Shapes: ``z`` (K, *S) snapped by :func:`snap`; ``v`` (K, D, *S); ``h0`` (K, D) powers of two.
    Where |h0 v_i| < |z_i| / 4 every point stays within two binades of z_i, where z_i is a
    multiple of 8 ulp(z_i); making h_min v_i a multiple of 8 ulp(z_i) keeps every sum exact.
    Worked one (case, direction) at a time, in place: at (4096, 1000) a (K, D, *S) temporary
    is hundreds of megabytes.
    """
    out = np.array(v, dtype=np.float64, order="C")
    hmin = h0 * 2.0 ** -(levels - 1)
    step, grid = np.empty(out.shape[2:]), np.empty(out.shape[2:])  # scratch reused for every direction
    small = np.empty(out.shape[2:], bool)
    for i in range(out.shape[0]):
        quarter = np.abs(z[i])
        ulp8 = np.spacing(quarter)
        ulp8 *= 8.0
        quarter /= 4.0
        for j in range(out.shape[1]):
            vij = out[i, j]
            np.multiply(vij, h0[i, j], out=step)
            np.abs(step, out=step)
            np.less(step, quarter, out=small)  # |h0 v_i| < |z_i| / 4
            np.divide(ulp8, hmin[i, j], out=grid)  # a power of two: spacing and h are
            with np.errstate(over="ignore", invalid="ignore"):  # where the grid is tiny, v stays as it is
                np.divide(vij, grid, out=step)
                np.round(step, out=step)
                step *= grid
            np.copyto(vij, step, where=small)
    return out


def unit_directions(
    rng: np.random.Generator, k: int, shape: tuple[int, ...], count: int
) -> tuple[np.ndarray, list[str]]:
    """``count`` directions per case (K, D, *S), unit 2-norm, with a label for each.

    All but the last are dense random directions; the last is supported on one random row
    (axis 0 of the case), which a row-specific error cannot hide from. Cases with at most
    :data:`FULL_JACOBIAN_MAX` coordinates get every coordinate axis instead (the full Jacobian).
    Dense directions are Gaussian; past :data:`CUBE_DIRECTIONS_ABOVE` coordinates they are
    uniform on a cube, three times cheaper to draw. Both are continuous and symmetric, so an
    error vector e ≠ 0 is orthogonal to a drawn direction with probability 0.
    """
    m = int(np.prod(shape))
    if m <= FULL_JACOBIAN_MAX:
        eye = np.eye(m).reshape((m,) + shape)
        labels = [f"direction: coordinate {tuple(int(j) for j in np.unravel_index(i, shape))}" for i in range(m)]
        return np.broadcast_to(eye, (k,) + eye.shape).copy(), labels
    if m <= CUBE_DIRECTIONS_ABOVE:
        v = rng.standard_normal((k, count) + shape)
        rows = rng.integers(0, shape[0], size=k)
        keep = np.zeros((k,) + shape, bool)
        keep[np.arange(k), rows] = True
        v[:, -1] = np.where(keep, v[:, -1], 0.0)
        v /= np.sqrt(np.sum(v.reshape(k, count, -1) ** 2, axis=2)).reshape((k, count) + (1,) * len(shape))
    else:
        v = rng.random((k, count) + shape)
        v -= 0.5  # uniform on [−1/2, 1/2): zero mean, symmetric
        rows = rng.integers(0, shape[0], size=k)
        for i in range(k):  # in place, one (case, direction) at a time: no (K, D, *S) temporaries
            one_row = v[i, -1]
            kept = one_row[rows[i]].copy()
            one_row[...] = 0.0
            one_row[rows[i]] = kept
            for d in range(count):
                flat = v[i, d].reshape(-1)
                flat /= np.sqrt(flat @ flat)
    labels = [f"direction: dense random #{d}" for d in range(count - 1)]
    labels.append("direction: random within one row")
    return v, labels


def base_steps(z: np.ndarray, v: np.ndarray, inputs: str) -> np.ndarray:
    """h0 per (case, direction), a power of two.

    Logits: :data:`H0_LOGITS`. Probabilities: an eighth of the distance to the boundary of
    [0, 1] along v, so every point stays a valid probability (directions for probabilities are
    scaled coordinate-wise by min(p, 1 − p), see :func:`unit_directions` callers).
    """
    k, d = v.shape[:2]
    if inputs == "logits":
        return np.full((k, d), H0_LOGITS)
    zz = np.broadcast_to(z[:, None], v.shape)
    room = np.minimum(zz, 1.0 - zz)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(v != 0, room / np.abs(v), np.inf).reshape(k, d, -1).min(axis=2)
    h = np.minimum(H0_LOGITS, ratio / 8.0)
    h = np.where(np.isfinite(h) & (h > 0), h, H0_LOGITS)
    return 2.0 ** np.floor(np.log2(h))  # a power of two: h_l v is then exact when v is


def step_ladder(h0: np.ndarray, levels: int = LEVELS) -> np.ndarray:
    """h_l = h0 · 2^(−l), shape (J, *h0.shape)."""
    return h0[None] * 2.0 ** -np.arange(levels).reshape((levels,) + (1,) * np.ndim(h0))


def point_stacks(stack: CaseStack, v: np.ndarray, h0: np.ndarray,
                 levels: int = LEVELS) -> Iterator[tuple[np.ndarray, CaseStack]]:
    """Stacks of every point z ± h_l v (each case's targets repeated), a few points at a time.

    Yields ``(cases, points)``: the case index of each point and a stack of points, in the order
    (case, direction, sign (+ first), level), so that the values of all yielded stacks
    concatenated reshape to (K, D, 2, J, …). Each point is z + s·v computed as (s·v) + z, in
    place. Every stack fits :data:`CHUNK_BYTES` (all points at once at the
    menu's shapes) and lives in one buffer that the next stack overwrites: consume each before
    asking for the next. Reusing the buffer spares the page faults of a fresh array per chunk,
    which at (4096, 1000) cost more than the loss evaluations themselves.
    """
    shape = stack.cell.pred_shape()
    k, d = v.shape[:2]
    per = d * 2 * levels
    total = k * per
    size = max(1, min(total, CHUNK_BYTES // (max(int(np.prod(shape)), 1) * 8)))
    buf = np.empty((size,) + shape)
    steps = step_ladder(h0, levels)  # (J, K, D)
    z = stack.predictions
    for a in range(0, total, size):
        idx = np.arange(a, min(a + size, total))
        i, rest = np.divmod(idx, per)
        j, rest = np.divmod(rest, 2 * levels)
        sign, level = np.divmod(rest, levels)
        for slot, (ii, jj, ss, ll) in enumerate(zip(i, j, sign, level)):
            o = buf[slot]
            np.multiply(v[ii, jj], (1.0 - 2.0 * ss) * steps[ll, ii, jj], out=o)  # s·v, then z + s·v in place
            o += z[ii]
        yield i, CaseStack(buf[:len(idx)], stack.targets[i], stack.cell)


def complex_step(fn: Callable[[np.ndarray], np.ndarray], z: np.ndarray, v: np.ndarray, h: float = 1e-20) -> np.ndarray:
    """Directional derivative Im f(z + i h v) / h (Squire and Trapp 1998).

    There is no subtraction, so no cancellation: the error is O(h²) and h can be tiny. It is
    valid only for implementations that are complex-analytic in their input: ``abs``,
    ``maximum``, comparisons and real casts silently drop the imaginary part and give a wrong
    derivative with no warning, so it is an extra oracle, never the only one.

    Args:
        fn: evaluates the loss on complex128 predictions of ``z``'s shape.
        z: real point. v: direction (same shape). h: imaginary step.
    Returns:
        The estimate (same shape as ``fn``'s output), float64.

    Example:
        >>> float(complex_step(lambda x: np.exp(x).sum(), np.zeros(2), np.array([1.0, 0.0])))
        1.0
    """
    out = fn(np.asarray(z, dtype=np.complex128) + 1j * h * np.asarray(v, dtype=np.float64))
    return np.imag(np.asarray(out)) / h  # f(x + ih) = f(x) + i h f'(x) + O(h²) for analytic f
