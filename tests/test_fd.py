"""Finite differences (:mod:`lossguard._fd`) and the Taylor test (:mod:`lossguard._taylor`)."""

from __future__ import annotations

import numpy as np
import pytest

from lossguard import _fd
from lossguard._taylor import taylor_orders
from lossguard.cases import CaseStack, Cell

U = np.finfo(np.float64).eps / 2  # unit roundoff of float64 (IEEE 754)


def _points(z, v, h0):
    """Every point the gradient check evaluates, from the library's own stream: (K, D, 2, J, *S)."""
    cell = Cell(*z.shape[1:]) if z.ndim == 3 else Cell(z.shape[1], None)
    stack = CaseStack(z, np.zeros(z.shape[:2], dtype=np.int64), cell)
    pts = np.concatenate([p.predictions.copy() for _, p in _fd.point_stacks(stack, v, h0)])
    return pts.reshape(v.shape[:2] + (2, _fd.LEVELS) + z.shape[1:])


def _table(fn, x, levels=_fd.LEVELS, h0=2.0**-5, noise=None):
    steps = h0 * 2.0 ** -np.arange(levels)
    fp, fm = fn(x + steps), fn(x - steps)
    eps = np.full((), 4 * U * max(abs(fn(x)), 1.0)) if noise is None else np.full((), noise)
    return _fd.directional(np.asarray(fn(x)), fp, fm, steps, eps)


@pytest.mark.parametrize("fn, dfn, x", [
    (np.sin, np.cos, 0.7),            # d/dx sin = cos (recalled from memory, textbook calculus)
    (np.exp, np.exp, -1.3),           # d/dx exp = exp (recalled from memory)
    (lambda t: np.log1p(np.exp(t)), lambda t: 1 / (1 + np.exp(-t)), 2.0),  # softplus' = σ (common practice)
])
def test_richardson_is_accurate_and_its_allowance_covers_the_error(fn, dfn, x):
    d = _table(fn, x)
    err = abs(float(d.central.value) - dfn(x))
    assert err <= float(d.allowance())
    h = 2.0**-8  # the smallest step: the allowance is tighter than a plain central difference's error there
    assert float(d.allowance()) < abs((fn(x + h) - fn(x - h)) / (2 * h) - dfn(x))
    assert bool(d.smooth) and not bool(d.kink)


def test_richardson_beats_a_plain_central_difference():
    h = 2.0**-5 * 2.0 ** -np.arange(4)
    plain = abs((np.exp(h[-1]) - np.exp(-h[-1])) / (2 * h[-1]) - 1.0)
    d = _table(np.exp, 0.0)
    assert abs(float(d.central.value) - 1.0) < plain / 1e3


def test_rounding_noise_is_bounded_by_the_propagated_bound():
    rng = np.random.default_rng(0)
    noise = 1e-9
    fn = lambda t: np.sin(t) + rng.uniform(-noise, noise, size=np.shape(t))  # noqa: E731
    for _ in range(50):
        d = _table(fn, 0.3, noise=noise)
        assert abs(float(d.central.value) - np.cos(0.3)) <= float(d.allowance())


def test_a_kink_at_the_point_is_flagged_with_both_one_sided_derivatives():
    d = _table(np.abs, 0.0)
    assert bool(d.kink) and not bool(d.smooth)
    assert float(d.forward.value) == pytest.approx(1.0) and float(d.backward.value) == pytest.approx(-1.0)


def test_a_kink_inside_the_step_range_is_not_judged():
    kink_at = 0.003  # between h0/8 and h0 away from the point
    d = _table(lambda t: np.abs(t - kink_at) + 0.5 * t * t, 0.0)
    assert not bool(d.judged)
    assert not bool(_fd.consistent(np.array([0.2, 0.1, 0.02, 0.019]), np.zeros(4), 2))


def test_consistent_accepts_the_h_squared_law_and_rounding_level_tables():
    h = 2.0 ** -np.arange(4)
    assert bool(_fd.consistent(1.0 + 0.3 * h**2, np.zeros(4), 2))
    assert bool(_fd.consistent(1.0 + 0.3 * h, np.zeros(4), 1))
    assert not bool(_fd.consistent(1.0 + 0.3 * h, np.zeros(4), 2))  # first order where h² is expected
    assert bool(_fd.consistent(1.0 + 1e-15 * np.array([1, -1, 1, -1]), np.full(4, 1e-14), 2))


def test_snapped_points_are_exact():
    rng = np.random.default_rng(1)
    z = _fd.snap(np.concatenate([rng.standard_normal((5, 4)) * 10.0 ** rng.uniform(-3, 4, (5, 1)),
                                 np.zeros((1, 4)), np.full((1, 4), 1e4)]))
    v, _ = _fd.unit_directions(rng, len(z), (4,), 3)
    h0 = _fd.base_steps(z, v, "logits")
    v = _fd.quantise(z, v, h0)
    pts = _points(z, v, h0)
    steps = _fd.step_ladder(h0)  # (J, K, D)
    exact = np.moveaxis(steps, 0, -1)[..., None] * v[:, :, None]  # h_l v, exact (powers of two)
    moved = pts[:, :, 0] - z[:, None, None]
    small = np.abs(h0[..., None] * v) < np.abs(z[:, None]) / 4
    assert np.array_equal(moved[np.broadcast_to(small[:, :, None], moved.shape)],
                          exact[np.broadcast_to(small[:, :, None], exact.shape)])
    # where the step is large against z, rounding is at most a relative 5u of the step
    rel = np.abs(moved - exact) / np.maximum(np.abs(exact), 1e-300)
    assert np.all(rel <= 5 * U)
    assert np.array_equal(_fd.snap(np.array([0.0, 3.0, -3.0])), np.array([0.0, 3.0, -3.0]))


def test_directions_are_unit_with_one_row_direction_and_full_jacobian_for_tiny_cases():
    rng = np.random.default_rng(2)
    v, labels = _fd.unit_directions(rng, 4, (6, 5), 3)
    assert v.shape == (4, 3, 6, 5) and np.allclose(np.sum(v**2, axis=(2, 3)), 1.0)
    rows_used = np.any(v[:, -1] != 0, axis=2).sum(axis=1)
    assert np.all(rows_used == 1) and "one row" in labels[-1]
    eye, labels = _fd.unit_directions(rng, 2, (3, 2), 3)
    assert eye.shape == (2, 6, 3, 2) and len(labels) == 6 and "coordinate (2, 1)" in labels[-1]


def test_probability_steps_stay_inside_the_unit_interval():
    rng = np.random.default_rng(3)
    p = rng.dirichlet(np.ones(4), size=(3, 2)) ** 3
    p = p / p.sum(-1, keepdims=True)
    v, _ = _fd.unit_directions(rng, 3, (2, 4), 2)
    v = v * np.minimum(p, 1 - p)[:, None]
    h0 = _fd.base_steps(p, v, "probabilities")
    pts = _points(p, v, h0)
    assert np.all(pts > 0) and np.all(pts < 1)
    assert np.all(np.log2(h0) == np.round(np.log2(h0)))  # powers of two


def test_complex_step_is_exact_for_analytic_code_and_blind_to_abs():
    # Squire and Trapp, SIAM Review 40(1), 1998: Im f(x + ih)/h = f'(x) + O(h²), no cancellation
    f = lambda x: np.sum(np.exp(x) * np.sin(x))  # noqa: E731
    x, v = np.array([0.3, -1.2]), np.array([0.6, 0.8])
    exact = np.sum((np.exp(x) * (np.sin(x) + np.cos(x))) * v)  # product rule (recalled from memory)
    assert abs(float(_fd.complex_step(f, x, v)) - exact) <= 4 * U * abs(exact)
    # |x| drops the imaginary part: the estimate is silently wrong, which is why it is never trusted alone
    assert float(_fd.complex_step(lambda t: np.sum(np.abs(t)), x, v)) == 0.0


def test_taylor_order_two_for_the_right_slope_one_for_a_wrong_one():
    h = 2.0**-3 * 2.0 ** -np.arange(6)
    f = lambda t: np.log1p(np.exp(0.4 + t))  # noqa: E731  softplus, slope σ(0.4) (common practice)
    slope = 1 / (1 + np.exp(-0.4))
    noise = np.full(1, 4 * U)
    good = taylor_orders(np.array([f(0.0)]), f(h)[:, None], h[:, None], np.array([slope]), noise)
    bad = taylor_orders(np.array([f(0.0)]), f(h)[:, None], h[:, None], np.array([slope * 1.01]), noise)
    assert abs(float(good.observed[0]) - 2.0) < 0.1
    assert float(bad.observed[0]) < 1.5
    assert "order 2.0" in good.describe((0,))


def test_taylor_residuals_at_rounding_level_give_no_order():
    h = 2.0 ** -np.arange(4)
    res = taylor_orders(np.zeros(1), (3.0 * h)[:, None], h[:, None], np.array([3.0]), np.full(1, 1e-16))
    assert np.isnan(res.observed[0]) and "no reliable estimate" in res.describe((0,))


def test_branch_points_hold_zeros_ties_and_thresholds():
    from lossguard import declare
    from lossguard.cases import Cell

    spec = declare(lambda z, y: z.sum(), kind="categorical")
    s = _fd.branch_points(spec, Cell(4, 3), np.random.default_rng(4))
    z = s.predictions
    assert np.all(z[0] == 0.0)
    assert np.all(z[1].max(-1) == z[1][:, 0]) and np.all(z[1][:, 0] == z[1][:, 1])  # tie at the top
    lab = s.targets[2]
    assert np.all(z[2][np.arange(4), lab] == z[2][np.arange(4), (lab + 1) % 3])  # labelled class tied
    assert set(np.unique(z[4])) <= set(_fd.THRESHOLDS) and np.all(z[5] == 3.0)
    b = _fd.branch_points(declare(lambda z, y: z.sum(), kind="binary"), Cell(8), np.random.default_rng(4))
    assert np.all(b.predictions[0] == 0.0) and np.all(np.abs(b.predictions[2]) <= 1e-300)
