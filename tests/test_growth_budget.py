"""Case budgets: the menu's shapes keep every case; large shapes do a bounded amount of work.

Scenario: a seismology network labels waveform windows from its stations against a catalogue of
event templates. The pilot ran on a handful of templates; the full catalogue gives logits of
thousands of windows by a thousand templates, and the loss must be checked at that size too.
``BIG`` is such a shape, past the case budget (2^21 logits per check) the way (4096, 1000) is,
at half its memory.
"""

from __future__ import annotations

import re

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import lossguard._mp_oracle as mp_oracle
from lossguard import declare
from lossguard._budget import CASE_ELEMENTS
from lossguard.cases import LADDER_LEAST, CaseStack, Cell, cases_per_cell, ladder_stack, shape_menu
from lossguard.checks import Context
from lossguard.checks.dtypes import check_dtypes
from lossguard.checks.finite import LEAST_CASES, STACK_SIZE, check_finite, extreme_stack, fill_to, finite_oracle, \
    per_case_finite, reduced_fits
from lossguard.evaluate import Evaluator
from lossguard.ladders import PATTERNS, largest_finite, magnitudes, overflow_rungs, thin_rungs, wide_magnitudes
from lossguard.options import EFFORTS
from lossguard.profile import mp_reference_stack
from lossguard.tolerance import DTYPES

BIG = Cell(2048, 1024)  # 2^21 logits: one case is the whole budget


def window_loss(z: jax.Array, y: jax.Array) -> jax.Array:
    """The network's loss: mean softmax cross-entropy (correct)."""
    return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1))


def window_loss_naive(z: jax.Array, y: jax.Array) -> jax.Array:
    e = jnp.exp(z)  # overflows at z ≈ 710 in float64
    return -jnp.mean(jnp.log(jnp.take_along_axis(e / e.sum(-1, keepdims=True), y[:, None], -1)))


def window_loss_batch_max(z: jax.Array, y: jax.Array) -> jax.Array:
    m = jnp.max(z)  # one shift for the whole batch, not one per row: small rows underflow to log 0
    lse = m + jnp.log(jnp.sum(jnp.exp(z - m), -1))
    return jnp.mean(lse - jnp.take_along_axis(z, y[:, None], -1)[:, 0])


def any_kind(z: jax.Array, y: jax.Array) -> jax.Array:
    """A stand-in for shapes only (never judged): accepts every kind of target."""
    return jnp.mean(z) + 0.0 * jnp.mean(y)


def context(loss, cell: Cell | None = None, effort: str = "quick", **declared: object) -> Context:  # noqa: ANN001
    # the budgets below are those of the whole format's ladder (max_logit="full"); the evaluator's
    # one-time precision probe runs first, so the counts are the checks' own
    spec = declare(loss, **{"max_logit": "full", **declared})  # type: ignore[arg-type]
    ev = Evaluator(spec)
    ev.rounding_grid()
    ev.adapter.calls = 0  # count from here: the probe's evaluations are the evaluator's, not a check's
    return Context(spec=spec, evaluator=ev, seed=0, effort=effort, cells_override=None if cell is None else (cell,))


def test_at_a_large_shape_the_default_range_still_judges_the_rungs_inside_it() -> None:
    # packed cases are judged by their largest |z|: rungs inside and beyond |z| ≤ 1e3 are packed
    # apart, so the inside ones are still judged (not all left as information)
    ctx = context(window_loss, BIG, kind="categorical", reference="categorical_ce", max_logit=1e3)
    r = check_dtypes(ctx, ("float32",), large=False)
    assert r.verdict == "pass" and r.cases > 0, r.summary
    bad = context(window_loss_naive, BIG, kind="categorical", reference="categorical_ce", max_logit=1e3)
    assert check_finite(bad, ("float64",)).verdict == "fail"  # softmax without max subtraction: |z| = 1e3


def packed_pairs(note: str) -> list[tuple[str, float]]:
    """The (pattern, |z|) pairs a packed case's rows take in turn, read from its note."""
    assert note.startswith("ladder packed, rows in turn: "), note
    return [(p, float(m)) for p, m in re.findall(r"(\w+) \|z\|=([^,]+)", note)]


# ------------------------------------------------------------------- the menu's shapes unchanged


@pytest.mark.parametrize("kind", ["categorical", "distribution", "binary"])
def test_menu_shapes_keep_every_case(kind: str) -> None:
    ctx = context(any_kind, kind=kind)
    for effort in EFFORTS:
        for cell in shape_menu(ctx.spec, effort):
            assert cases_per_cell(effort, cell) == cases_per_cell(effort)  # 16, 48 or 256
            ladder = ladder_stack(ctx.spec, cell, np.random.default_rng(0))
            assert len(ladder) == len(PATTERNS) * len(magnitudes("float64"))  # one case per pair
            assert ladder.notes[0] == "ladder right |z|=0" and ladder.notes[-1] == "ladder mixed |z|=1e+04"
    for dtype in DTYPES:  # the finite check's stack: one case per pair, filled to the call size
        stack = extreme_stack(ctx, ctx.cells[0], dtype)
        assert len(stack) == STACK_SIZE
        assert stack.notes[:len(PATTERNS) * len(wide_magnitudes(dtype))] == [
            f"ladder {p} |z|={m:.3g}" for p in PATTERNS for m in wide_magnitudes(dtype)]


# ---------------------------------------------------------------------- large shapes bounded


def test_a_large_shape_draws_few_cases_and_packs_every_pair() -> None:
    spec = declare(window_loss, kind="categorical")
    assert BIG.elements() * 2 > CASE_ELEMENTS  # two cases already exceed the budget
    assert cases_per_cell("default", BIG) == cases_per_cell("thorough", BIG) == 2
    ladder = ladder_stack(spec, BIG, np.random.default_rng(1))
    assert len(ladder) == LADDER_LEAST
    seen = []
    for k in range(len(ladder)):
        pairs = packed_pairs(ladder.note(k))
        seen += pairs
        z = ladder.predictions[k]
        for i, (pattern, m) in enumerate(pairs):
            rows = z[i::len(pairs)]  # row r takes pair r mod G
            top = np.abs(rows).max(axis=1)
            if pattern in ("right", "wrong", "equal"):
                assert np.all(top == m), (pattern, m)
            if pattern == "mixed":
                assert top.max() == m and np.all(top <= m)
    assert sorted(seen) == sorted((p, float(m)) for p in PATTERNS for m in magnitudes("float64"))
    # between the menu and the largest shapes: several cases, nearby magnitudes together
    mid = ladder_stack(spec, Cell(1024, 300), np.random.default_rng(1))
    assert 1 < len(mid) < len(PATTERNS) * len(magnitudes("float64"))
    tops = [max(m for _, m in packed_pairs(n)) for n in mid.notes]
    bottoms = [min(m for _, m in packed_pairs(n)) for n in mid.notes]
    assert all(t <= b for t, b in zip(tops, bottoms[1:]))


def test_fill_is_free_at_the_menu_and_absent_at_a_large_shape() -> None:
    small = context(window_loss, kind="categorical").random_cases(Cell(8, 3))
    assert len(fill_to(small.take([0, 1]), small)) == STACK_SIZE

    def never() -> CaseStack:
        raise AssertionError("the filler must not be built when no case is needed")

    big = ladder_stack(declare(window_loss, kind="categorical"), BIG, np.random.default_rng(2))
    assert len(fill_to(big, never)) == len(big)


def test_finite_at_a_large_shape_evaluates_few_cases_and_still_catches_an_overflow() -> None:
    bad = context(window_loss_naive, BIG, kind="categorical", reference="categorical_ce")
    r = check_finite(bad, ("float64",))
    assert r.verdict == "fail" and "ladder packed" in r.summary, r.summary
    assert r.cases == LEAST_CASES and bad.evaluator.calls == LEAST_CASES  # was 128 cases per dtype
    # float16: rows whose loss overflows (wrong by 65504) are packed apart, so a correct loss passes
    ok = context(window_loss, BIG, kind="categorical", reference="categorical_ce")
    r = check_finite(ok, ("float16",))
    assert r.verdict == "pass", r.summary
    assert r.details["cases_where_true_value_not_representable"] == 1


def test_dtypes_at_a_large_shape_compares_the_packed_ladder_only() -> None:
    ctx = context(window_loss, BIG, kind="categorical", reference="categorical_ce")
    r = check_dtypes(ctx, ("float32",), large=False)
    assert r.verdict == "pass", r.summary
    assert r.cases == LADDER_LEAST and ctx.evaluator.calls == LADDER_LEAST  # was 128


def test_proper_draws_fewer_targets_at_a_large_shape() -> None:
    from lossguard.checks.proper import CHECK, DIRECTIONS

    ctx = context(window_loss, BIG, kind="categorical", reference="categorical_ce")
    four = ctx.random_cases(Cell(8, 3)).take([0, 1, 2, 3])  # stand-in standard cases, never evaluated
    ctx._stacks[("standard", BIG)] = CaseStack(np.zeros((4,) + BIG.pred_shape()), np.zeros((4, BIG.n), np.int64), BIG,
                                               four.notes)
    r = CHECK.run(ctx)
    assert r.verdict == "pass", r.summary
    assert r.cases == 2 and ctx.evaluator.calls == 2 * (1 + DIRECTIONS)  # not 4 targets


def test_live_gradient_evaluates_its_five_cases_only() -> None:
    from lossguard.checks.live_gradient import CHECK, CONFIDENT

    ctx = context(window_loss, kind="categorical", effort="default")
    assert CHECK.run(ctx).verdict == "pass"
    assert ctx.evaluator.calls == 1 + len(CONFIDENT)  # no filler cases


def test_below_float64_only_the_last_menu_shape_at_default_effort() -> None:
    ctx = context(window_loss, kind="categorical", reference="categorical_ce", effort="default")
    cells = ctx.cells
    assert len(cells) == 2
    r = check_finite(ctx, DTYPES)  # float64 on both shapes, each lower dtype on the last only
    assert r.cases == (len(cells) + len(DTYPES) - 1) * STACK_SIZE, r.summary
    assert r.verdict == "pass", r.summary
    r = check_dtypes(ctx, DTYPES, large=False)  # the same rule (float64 runs: a reference is declared)
    assert r.cases == (len(cells) + len(DTYPES) - 1) * STACK_SIZE, r.summary
    from lossguard.checks.nonnegative import CHECK

    before = ctx.evaluator.calls
    assert CHECK.run(ctx).verdict == "pass"
    k = len(ctx.standard_cases(cells[0]))
    assert ctx.evaluator.calls - before == (len(cells) + 1) * k  # float64 on both, float32 on the last


def window_loss_zloss(z: jax.Array, y: jax.Array) -> jax.Array:
    """Cross-entropy plus a z-loss 1e-4·lse²: not shift invariant (by design, but the check must see it)."""
    lse = jax.nn.logsumexp(z, -1)
    return jnp.mean(lse - jnp.take_along_axis(z, y[:, None], -1)[:, 0] + 1e-4 * lse**2)


def test_shift_packs_its_four_shifts_into_one_copy_at_a_large_shape() -> None:
    from lossguard.checks.shift import SHIFTS, shift_parts

    def failing(loss, cell: Cell) -> tuple[list[str], int]:  # noqa: ANN001
        ctx = context(loss, cell, kind="categorical")
        stack = ladder_stack(ctx.spec, cell, np.random.default_rng(6), mags=np.array([3.0]), patterns=("huge",),
                             cases=1).take([0, 0])
        parts, _ = shift_parts(ctx, stack, np.random.default_rng(7))
        return [p.what for p in parts if p.bad.any()], ctx.evaluator.calls

    bad, calls = failing(window_loss_zloss, Cell(16, 10))
    assert "value after adding +1e4" in bad and calls == 2 * (1 + len(SHIFTS))  # the menu: a copy per shift
    bad, calls = failing(window_loss_zloss, BIG)
    assert "value after adding a shift per row (a random constant per row, +1e3, +1e4, -1e4, in turn)" in bad
    assert calls == 2 * 2  # one packed copy: still caught, two evaluations per case
    assert failing(window_loss, BIG) == ([], 2 * 2)


def test_batch_reuses_the_results_of_its_reordered_partner() -> None:
    from lossguard.checks.batch import CHECK

    ctx = context(window_loss, kind="categorical")  # quick: one shape, which is also the split one
    assert CHECK.run(ctx).verdict == "pass"
    k = len(ctx.standard_cases(ctx.cells[0]))
    assert ctx.evaluator.calls == 6 * k  # X, πX, [A; B'], [A'; B], A, B: X' = X reordered is not re-run


# -------------------------------------------------------------------- mpmath only where needed


def test_mpmath_evaluates_only_the_examples_that_overflow(monkeypatch: pytest.MonkeyPatch) -> None:
    calls = {"value": 0, "gradient": 0}
    real = mp_oracle._mp_example

    def counted(name, z, *args):  # noqa: ANN001, ANN002, ANN202
        calls["gradient" if z[0].d else "value"] += 1
        return real(name, z, *args)

    monkeypatch.setattr(mp_oracle, "_mp_example", counted)
    rng = np.random.default_rng(3)
    y = rng.integers(0, 10, (1, 64))
    z = rng.standard_normal((1, 64, 10))
    rows = [5, 17, 40]
    for r in rows:  # wrong by the largest float64: ℓ = 2·max overflows float64 in these rows only
        z[0, r, y[0, r]], z[0, r, (y[0, r] + 1) % 10] = -largest_finite("float64"), largest_finite("float64")
    stack = CaseStack(z, y, Cell(64, 10))
    mean = context(window_loss, Cell(64, 10), kind="categorical", reference="categorical_ce")
    need = finite_oracle(mean, stack, "float64")
    # the first overflowing example already puts the batch sum past float64: the rest are skipped
    assert not need.value[0] and calls == {"value": 1, "gradient": 0}

    def per_window(zz: jax.Array, yy: jax.Array) -> jax.Array:
        return -jnp.take_along_axis(jax.nn.log_softmax(zz), yy[:, None], -1)[:, 0]

    calls.update(value=0, gradient=0)
    none = context(per_window, Cell(64, 10), kind="categorical", reference="categorical_ce")
    need = finite_oracle(none, stack, "float64")
    assert not need.value[0] and calls == {"value": len(rows), "gradient": 0}  # one per overflowing window

    def weighted_alarm(zz: jax.Array, yy: jax.Array, pos_weight: float) -> jax.Array:  # per element, (N, D)
        return -(pos_weight * yy * jax.nn.log_sigmoid(zz) + (1.0 - yy) * jax.nn.log_sigmoid(-zz))

    calls.update(value=0, gradient=0)
    binary = context(weighted_alarm, Cell(8, d=3), kind="binary", reference="bce", params={"pos_weight": 3.0})
    zb, yb = rng.standard_normal((2, 8, 3)), np.ones((2, 8, 3))
    zb[0, 2, 1] = -largest_finite("float64")  # its weighted loss 3·max overflows float64: that element only
    need = finite_oracle(binary, CaseStack(zb, yb, Cell(8, d=3)), "float64")
    assert need.value.tolist() == [False, True] and calls == {"value": 1, "gradient": 0}


def test_the_settled_value_is_the_whole_case_in_mpmath() -> None:
    # every window wrong by 5e306: each ℓ ≈ 1e307 fits, their float64 sum overflows, the mean fits
    rng = np.random.default_rng(4)
    y = rng.integers(0, 10, (2, 64))
    z = rng.standard_normal((2, 64, 10))
    idx = np.arange(64)
    z[0, idx, y[0]], z[0, idx, (y[0] + 1) % 10] = -5e306, 5e306
    z[1, :8, :] *= 1e306  # a second case: a few windows at huge scale, the rest moderate
    ctx = context(window_loss, Cell(64, 10), kind="categorical", reference="categorical_ce")
    stack = CaseStack(z, y, Cell(64, 10))
    v_mp, _, g_mp, _ = mp_reference_stack(ctx.spec, z, y)  # every example in mpmath, with gradients
    before = dict(mp_oracle.ROWS_EVALUATED)
    need = finite_oracle(ctx, stack, "float64")
    assert mp_oracle.ROWS_EVALUATED == before  # no example overflowed alone: its float64 value is exact enough
    assert need.value.tolist() == reduced_fits(ctx, v_mp, 2, "float64", stack.cell).tolist()
    assert need.grad.tolist() == (per_case_finite(g_mp, 2, largest_finite("float64")) & need.value).tolist()
    from lossguard._mp_oracle import settle_value

    got = settle_value(ctx.spec, z[0], y[0], np.full(64, 1e307), reduction="mean", beyond=np.inf)
    assert got == pytest.approx(float(v_mp[0]), rel=1e-15)


def test_the_exact_sums_of_settle_value_agree_with_mpmath_fsum() -> None:
    # settle_value sums every example whose float64 value is finite; at (4096, 1000) binary logits
    # that is 4 million terms (the finite check took 82 s there, nearly all of it in mpmath.fsum). It must give what
    # mpmath.fsum (an outside library, exact at the working precision) gives, to 35 digits, also
    # when the total is far beyond float64's largest value 1.8e308 (IEEE 754)
    import mpmath

    from lossguard import _mp_oracle as mp_oracle

    rng = np.random.default_rng(21)
    for trial in range(40):
        m = int(rng.integers(1, 2000))
        x = rng.standard_normal(m) * 10.0 ** rng.uniform(-300, 300, size=m)
        if trial % 2:
            x[: m // 2] = 1.7e308  # the float64 sum overflows
        w = rng.choice([0.0, 1.0, 0.25, 3.0], size=m)
        with mpmath.mp.workdps(40):
            want = mpmath.fsum(mpmath.mpf(float(a)) * mpmath.mpf(float(b)) for a, b in zip(w, x))
            got = mp_oracle._weighted_sum(w, x)
            assert abs(got - want) <= abs(want) * mpmath.mpf(10) ** -35


# ----------------------------------------------------------------------- ladder shape and rungs


def test_mixed_rows_span_six_decades_and_reach_the_rung() -> None:
    spec = declare(window_loss_batch_max, kind="categorical", reference="categorical_ce")
    ladder = ladder_stack(spec, Cell(16, 10), np.random.default_rng(5), mags=np.array([1e4]), patterns=("mixed",))
    top = np.abs(ladder.predictions[0]).max(axis=1)
    assert top.max() == 1e4 and top.min() < 10.0  # rows of truly different scales in one case
    assert np.all(ladder.predictions[0] >= 0)  # each row spread over [0, s]: its loss stays within s + ln C
    r = check_finite(context(window_loss_batch_max, kind="categorical", reference="categorical_ce"), ("float64",))
    assert r.verdict == "fail" and "ladder mixed" in r.summary, r.summary  # only mixed rows expose it


def test_thinned_rungs_keep_zero_the_top_and_the_overflow_rungs() -> None:
    # e^M overflows past ln(max): float16 11.1, bfloat16 and float32 88.7, float64 709.8 (IEEE 754 ranges)
    assert overflow_rungs(wide_magnitudes("float64")) == [30.0, 90.0, 1000.0]
    for dtype in DTYPES:
        mags = wide_magnitudes(dtype)
        kept = thin_rungs(mags, 3, [dtype])
        assert kept[0] == 0.0 and kept[-1] == largest_finite(dtype)
        assert set(overflow_rungs(mags, [dtype])) <= set(kept.tolist())
        assert len(thin_rungs(mags, 8, [dtype])) == 8 and thin_rungs(mags, 99).tolist() == mags.tolist()
