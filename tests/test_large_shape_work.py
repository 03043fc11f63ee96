"""Work at large shapes: one packed case, streamed finite-difference points, no needless arrays.

Scenario: a seismology network labels waveform windows from its stations against a catalogue of
event templates (as in test_growth_budget.py). ``BIG`` holds 2^21 logits, past the case budget
the way (4096, 1000) is, at half its memory.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import lossguard._fd as fd
from lossguard import declare
from lossguard.cases import CaseStack, Cell, concat
from lossguard.checks import Context
from lossguard.checks.finite import reference_batch
from lossguard.checks.gradient import check_stacks
from lossguard.checks.gradient import _run as gradient_run
from lossguard.evaluate import Evaluator
from lossguard.ladders import mask_non_targets

BIG = Cell(2048, 1024)
SMALL = Cell(16, 10)


def window_loss(z: jax.Array, y: jax.Array) -> jax.Array:
    """The network's loss: mean softmax cross-entropy (correct)."""
    return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1))


@jax.custom_vjp
def window_loss_hand(z: jax.Array, y: jax.Array) -> jax.Array:
    return window_loss(z, y)


def _fwd(z, y):  # type: ignore[no-untyped-def]
    return window_loss(z, y), (z, y)


def _bwd(res, ct):  # type: ignore[no-untyped-def]
    z, y = res
    g = (jax.nn.softmax(z) - jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)) / z.shape[0]
    g = g.at[0].multiply(1.01)  # broken: the first window's gradient is 1% too large
    return ct * g, None


window_loss_hand.defvjp(_fwd, _bwd)


def context(loss, cell: Cell, **declared: object) -> Context:  # noqa: ANN001
    spec = declare(loss, **declared)  # type: ignore[arg-type]
    return Context(spec=spec, evaluator=Evaluator(spec), seed=0, effort="default", cells_override=(cell,))


def test_a_large_shape_keeps_one_whole_random_case_apart_from_the_ladder() -> None:
    big = context(window_loss, BIG, kind="categorical")
    rand, ladder = big.random_cases(BIG), big.ladder_cases(BIG)
    std = big.standard_cases(BIG)
    assert len(rand) > 1 and len(std) == 1 + len(ladder)
    # the first random case, whole: one logit scale, so no row's allowance is widened by another's
    assert np.array_equal(std.predictions[0], rand.predictions[0])
    assert np.array_equal(std.targets[0], rand.targets[0])
    assert np.array_equal(std.predictions[1:], ladder.predictions)
    assert np.abs(std.predictions[0]).max() < 100 <= np.abs(std.predictions[1:]).max()
    small = context(window_loss, SMALL, kind="categorical")
    whole = concat([small.random_cases(SMALL), small.ladder_cases(SMALL)])
    assert np.array_equal(small.standard_cases(SMALL).predictions, whole.predictions)


def test_the_gradient_check_at_a_large_shape_still_catches_one_wrong_row() -> None:
    ctx = context(window_loss, BIG, kind="categorical")
    ctx.evaluator.rounding_grid()  # the evaluator's one-time precision probe, not the check's work
    good = gradient_run(ctx)
    assert good.verdict == "pass", good.summary
    # the packed random case, the ladder and the special points: D = 3 directions × 2 signs × 4
    # levels of finite differences each, then per case one value-and-gradient, D forward-mode
    # calls and two for the float32 comparison
    assert good.cases == 3 and good.details["loss_evaluations"] == 3 * (3 * 2 * fd.LEVELS + 1 + 3 + 2)
    bad = gradient_run(context(window_loss_hand, BIG, kind="categorical"))
    assert bad.verdict == "fail" and "finite differences" in bad.summary, bad.summary


def test_finite_difference_points_stream_through_one_buffer_within_the_chunk_budget(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    rng = np.random.default_rng(3)
    cell = Cell(6, 5)
    z = fd.snap(rng.standard_normal((3, 6, 5)))
    stack = CaseStack(z, rng.integers(0, 5, (3, 6)), cell)
    v, _ = fd.unit_directions(rng, 3, (6, 5), 3)
    h0 = fd.base_steps(z, v, "logits")
    v = fd.quantise(z, v, h0)
    point_bytes = z[0].nbytes
    monkeypatch.setattr(fd, "CHUNK_BYTES", 7 * point_bytes)  # 72 points in chunks of 7
    seen, cases, first = [], [], None
    for idx, pts in fd.point_stacks(stack, v, h0):
        assert pts.predictions.nbytes <= fd.CHUNK_BYTES
        first = pts.predictions if first is None else first
        assert np.shares_memory(pts.predictions, first)  # one buffer, reused
        seen.append(pts.predictions.copy())
        cases.append(idx)
        assert np.array_equal(pts.targets, stack.targets[idx])
    # the definition written out at once: z + s·v for s = ±h_l, sign before level, (s·v) rounded first
    s = np.moveaxis(fd.step_ladder(h0), 0, -1)[:, :, None, :] * np.array([1.0, -1.0])[None, None, :, None]
    expected = (s[..., None, None] * v[:, :, None, None] + z[:, None, None, None]).reshape((-1, 6, 5))
    assert np.array_equal(np.concatenate(seen), expected)  # bit for bit, in (case, direction, sign, level) order
    assert np.array_equal(np.concatenate(cases), np.repeat(np.arange(3), 3 * 2 * fd.LEVELS))


def test_masks_take_a_uniform_number_of_uniformly_chosen_classes() -> None:
    rng = np.random.default_rng(11)
    labels = np.zeros(6000, dtype=np.int64)  # class 0 is the label: classes 1..5 are eligible
    m = mask_non_targets(rng, labels, 6)
    sizes = np.bincount(m.sum(axis=1), minlength=6)[1:]
    # k uniform on 1..5: 1200 rows each; binomial sd ≈ 31, so ±150 is about 5 sd (common practice)
    assert np.all(np.abs(sizes - 1200) < 150), sizes
    share = m[:, 1:].mean(axis=0)  # each eligible class masked with probability E[k]/5 = 0.6
    assert np.all(np.abs(share - 0.6) < 0.03), share  # sd ≈ 0.0063
    assert not m[:, 0].any()


def test_the_reference_batch_without_gradients_gives_the_same_values() -> None:
    ctx = context(window_loss, SMALL, kind="categorical", reference="categorical_ce")
    s = ctx.standard_cases(SMALL)
    v1, g1 = reference_batch(ctx, s.predictions, s.targets)
    v2, g2 = reference_batch(ctx, s.predictions, s.targets, grad=False)
    assert g2 is None and g1 is not None and np.array_equal(v1, v2)


def test_check_stacks_still_takes_several_cases_when_given_them() -> None:
    # the packing belongs to the battery's own stacks: a caller's stacks are probed as given
    ctx = context(window_loss, SMALL, kind="categorical")
    res = check_stacks(ctx, [ctx.random_cases(SMALL).take(np.arange(5))])
    assert res.verdict == "pass" and res.cases == 5


def test_packed_special_points_keep_each_kind_in_its_rows() -> None:
    spec = declare(window_loss, kind="categorical")
    cell = Cell(600, 7)
    one = fd.packed_branch_points(spec, cell, np.random.default_rng(4), k=1)
    z, y = one.predictions[0], one.targets[0]
    r = np.arange(cell.n)
    assert np.all(z[r % 6 == 0] == 0.0)  # all zero
    top = np.sort(z[r % 6 == 1], axis=1)
    assert np.all(top[:, -1] == top[:, -2])  # two classes tied at the top
    lab = z[r % 6 == 2][np.arange((r % 6 == 2).sum()), y[r % 6 == 2]]
    assert np.all((z[r % 6 == 2] == lab[:, None]).sum(axis=1) >= 2)  # the label tied with another
    assert np.all(z[r % 6 == 5] == 3.0)  # every class tied
    assert np.isin(z[r % 6 == 4], fd.THRESHOLDS).all()
    two = fd.packed_branch_points(spec, cell, np.random.default_rng(4), k=2)
    assert np.all(two.predictions[1][(1 + r) % 6 == 0] == 0.0)  # case j, row r: kind (j + r) mod 6
    assert np.all(two.predictions[1][(1 + r) % 6 == 5] == 3.0)


def test_mismatch_of_large_cases_one_at_a_time_equals_the_whole_stack_at_once() -> None:
    from lossguard.checks._compare import Mismatch, _compare

    rng = np.random.default_rng(5)
    shape = (3, 700, 1000)  # 700,000 elements a case: past the one-case-per-call size
    e = rng.standard_normal(shape)
    g = e + rng.standard_normal(shape) * 1e-9
    g[1, 5, 5], e[2, 0, 0], g[2, 0, 0] = np.nan, np.inf, np.inf  # a nan; the same inf on both sides
    g[0, 9, 9] += 1.0  # one element far off
    a = np.full((3, 1, 1), 1e-8)
    m = Mismatch(g, e, a)
    bad, ratio, ab, rel = _compare(g, e, np.broadcast_to(a, shape), 3)
    assert np.array_equal(m.bad_elements, bad) and np.array_equal(m.case_ratio, ratio)
    assert np.array_equal(m.case_abs, ab) and np.array_equal(m.case_rel, rel)
    assert m.case_bad.tolist() == [True, True, False]
