"""Ladders, special values and the mpmath oracle, checked against outside sources.

Scenario: a glacier-monitoring team classifies crevasse photos into ice classes (categorical),
flags melt ponds (binary) and predicts a mix of snow types per tile (distribution); their logits
come from half-precision hardware, so every special value of every dtype matters.
"""

from __future__ import annotations

import jax.numpy as jnp
import ml_dtypes
import numpy as np
import pytest
import scipy.special as sp

from lossguard import declare
from lossguard.ladders import (
    EDGE_STEPS,
    approach,
    common_grid,
    flush_subnormals,
    has_subnormals,
    largest_finite,
    magnitudes,
    mask_non_targets,
    next_below_one,
    probability_edges,
    probability_rows,
    profile_magnitudes,
    round_down,
    round_to,
    smallest_subnormal,
    sparse_simplex_rows,
    ulp,
    wide_magnitudes,
)
from lossguard.checks import Context
from lossguard.checks.finite import extreme_stack, reference_batch
from lossguard.references import evaluate_reference
from lossguard.evaluate import Evaluator
from lossguard.profile import mp_reference_stack
from lossguard.tolerance import DTYPES, dtype_of


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(7310)


def test_existing_ladder_is_unchanged() -> None:
    # the spine's rungs, which the shared case generator and the Hypothesis strategies rely on
    assert magnitudes("float64").tolist() == [0.0, 1e-3, 1e-1, 1.0, 3.0, 10.0, 30.0, 90.0, 1e2, 1e3, 1e4]
    assert magnitudes("float64", up_to_max=True)[-1] == largest_finite("float64")  # used to overflow
    assert magnitudes("float32", up_to_max=True)[-3:].tolist() == [1e37, 1e38, largest_finite("float32")]


@pytest.mark.parametrize("dtype", DTYPES)
def test_wide_ladder_reaches_the_largest_value_of_each_dtype(dtype: str) -> None:
    m = wide_magnitudes(dtype)
    assert m[0] == 0.0 and np.all(np.diff(m) > 0)
    # ml_dtypes.finfo is the outside source of each format's largest finite value
    assert m[-1] == float(ml_dtypes.finfo(dtype_of(dtype)).max)
    assert len(m) <= 18


def test_profile_grid_holds_each_range_end() -> None:
    grid = profile_magnitudes("float64")
    for d in DTYPES:
        assert largest_finite(d) in grid
    assert profile_magnitudes("float16")[-1] == 65504.0  # IEEE 754-2008 binary16 maximum (recalled from memory)


@pytest.mark.parametrize("dtype", DTYPES)
def test_probability_edges_are_the_dtype_values_at_and_next_to_0_and_1(dtype: str) -> None:
    e = probability_edges(dtype)
    assert e[0] == 0.0 and e[-1] == 1.0
    assert np.array_equal(round_to(e, dtype), e)  # every edge is a value of the dtype
    dt = dtype_of(dtype)
    one, zero = np.asarray(1.0, dt), np.asarray(0.0, dt)
    # numpy's nextafter (outside source) gives the neighbours of 0 and 1 in the dtype
    assert float(np.nextafter(one, zero)) == next_below_one(dtype) == e[-2]
    assert float(np.nextafter(zero, one)) == smallest_subnormal(dtype) == e[1]


def test_binary16_facts() -> None:
    # IEEE 754-2008 binary16: smallest subnormal 2^-24, largest below 1 is 1 − 2^-11 (recalled from memory)
    assert smallest_subnormal("float16") == 2.0**-24
    assert next_below_one("float16") == 1.0 - 2.0**-11


@pytest.mark.parametrize("dtype", ["float16", "bfloat16", "float32", "float64"])
def test_ulp_matches_numpy_spacing(dtype: str, rng: np.random.Generator) -> None:
    x = np.concatenate([10.0 ** rng.uniform(-3, 4, 50), [1.0, 2.0, 0.75]])
    xd = x.astype(dtype_of(dtype))
    # np.spacing on the dtype's own values (numpy / ml_dtypes: outside sources)
    expected = np.abs(np.spacing(xd).astype(np.float64))
    assert np.array_equal(ulp(xd.astype(np.float64), dtype), expected)


def test_common_grid_and_round_down_give_values_every_dtype_holds(rng: np.random.Generator) -> None:
    x = rng.standard_normal(200) * 10.0 ** rng.uniform(-6, 4, 200)
    g = common_grid(x, ["float16", "bfloat16"])
    for d in ("float16", "bfloat16", "float32"):
        assert np.array_equal(round_to(g, d), g)
    assert np.max(np.abs(g - x) / np.maximum(np.abs(x), 1e-4)) < 2 * 2.0**-8  # within bfloat16 rounding
    assert round_down(65504.0, ["float16", "bfloat16"]) == 65280.0  # 65504 rounds up to 65536 in bfloat16
    top = round_down(largest_finite("float32"), ["bfloat16", "float32"])
    assert top <= largest_finite("bfloat16") and round_to(top, "bfloat16") == top


def test_subnormals_are_found_and_flushed() -> None:
    x = np.array([[1e-40, 1.0], [1e-30, 0.5]])
    assert has_subnormals(x, "float32").tolist() == [True, False]
    assert flush_subnormals(x, "float32")[0, 0] == 0.0
    assert has_subnormals(np.array([[6e-8]]), "float16").tolist() == [True]


def test_approach_moves_only_the_endpoints() -> None:
    p = np.array([0.0, 0.3, 1.0])
    for s in EDGE_STEPS:
        assert approach(p, s).tolist() == [s, 0.3, 1.0 - s]


def test_probability_rows_put_the_edge_on_the_label(rng: np.random.Generator) -> None:
    labels = np.array([0, 2, 1, 2])
    for q in probability_edges("float32"):
        a = probability_rows(q, labels, 3, "label", rng)
        b = probability_rows(q, labels, 3, "rest", rng)
        assert np.allclose(a.sum(1), 1.0) and np.allclose(b.sum(1), 1.0)
        assert np.all(a[np.arange(4), labels] == q) and np.all(b[np.arange(4), labels] == 1.0 - q)


def test_masks_never_hit_the_label_nor_a_target_with_mass(rng: np.random.Generator) -> None:
    labels = rng.integers(0, 5, 400)
    labels[:7] = -100
    m = mask_non_targets(rng, labels, 5, ignore_label=-100)
    assert not m[np.arange(400)[labels >= 0], labels[labels >= 0]].any()
    assert not m[:7, 0].any()  # an ignored row keeps class 0
    assert m.any(axis=1).all() and (m.sum(1) == 4).any()  # one to all competitors, both seen
    rows = sparse_simplex_rows(rng, 300, 6)
    assert np.allclose(rows.sum(1), 1.0) and (rows == 0).any(axis=1).all()
    md = mask_non_targets(rng, rows, 6)
    assert not (md & (rows > 0)).any() and md.any(axis=1).all()


# ---------------------------------------------------------------------------- mpmath oracle


def _spec(kind: str, reference: str, **kw: object):  # noqa: ANN202
    return declare(lambda z, y, **p: jnp.mean(z), kind=kind, reference=reference, **kw)


def test_mp_oracle_matches_scipy_cross_entropy_at_huge_logits(rng: np.random.Generator) -> None:
    z = rng.standard_normal((3, 6, 4)) * np.array([1.0, 1e3, 1e4])[:, None, None]
    y = rng.integers(0, 4, (3, 6))
    v, v_lo, g, _ = mp_reference_stack(_spec("categorical", "categorical_ce"), z, y)
    for k in range(3):
        ls = sp.log_softmax(z[k], axis=-1)  # scipy.special.log_softmax: outside source
        assert v[k] == pytest.approx(-np.mean(ls[np.arange(6), y[k]]), rel=1e-14)
        expect = (sp.softmax(z[k], axis=-1) - np.eye(4)[y[k]]) / 6  # ∇ mean CE = (p − onehot)/N
        assert np.allclose(g[k], expect, rtol=1e-12, atol=1e-300)
    assert np.all(np.abs(v_lo) <= np.abs(v) * 2.0**-52)


def test_mp_oracle_matches_scipy_bce_and_kl(rng: np.random.Generator) -> None:
    z = rng.standard_normal((2, 9)) * 30.0
    y = np.where(rng.random((2, 9)) < 0.5, rng.integers(0, 2, (2, 9)), rng.random((2, 9)))
    v, _, g, _ = mp_reference_stack(_spec("binary", "bce"), z, y)
    # scipy.special.log_expit (outside source): ℓ = −[y log σ(z) + (1 − y) log σ(−z)]
    expect = -np.mean(y * sp.log_expit(z) + (1 - y) * sp.log_expit(-z), axis=1)
    assert np.allclose(v, expect, rtol=1e-13)
    # ∂ℓ/∂z = σ(z) − y, written (1 − y) σ(z) − y σ(−z) so that scipy's expit does not cancel
    assert np.allclose(g, ((1 - y) * sp.expit(z) - y * sp.expit(-z)) / 9, rtol=1e-11, atol=1e-300)
    zz = rng.standard_normal((2, 5, 3)) * 5
    t = np.stack([sparse_simplex_rows(rng, 5, 3) for _ in range(2)])
    v, _, _, _ = mp_reference_stack(_spec("distribution", "kl_divergence"), zz, t)
    # scipy.special.rel_entr(t, p) = t log(t/p), with 0 · log 0 = 0 (outside source)
    expect = [np.mean(np.sum(sp.rel_entr(t[k], sp.softmax(zz[k], -1)), -1)) for k in range(2)]
    assert np.allclose(v, expect, rtol=1e-12)


@pytest.mark.parametrize(("reference", "kind", "inputs", "extra"), [
    ("bce", "binary", "probabilities", {"params": {"pos_weight": 2.0}, "reduction": "sum"}),
    ("categorical_ce", "categorical", "logits", {"params": {"weight": [1.0, 2.0, 3.0]}, "ignore_label": -100}),
    ("categorical_ce", "distribution", "probabilities", {}),
    ("focal_multiclass", "categorical", "logits", {"params": {"alpha": [1.0, 2.0, 3.0]}}),
])
def test_batched_reference_equals_the_per_case_one(reference: str, kind: str, inputs: str,
                                                   extra: dict[str, object]) -> None:
    spec = declare(lambda z, y, **p: jnp.mean(z), kind=kind, inputs=inputs, reference=reference,
                   classes=None if kind == "binary" else 3, **extra)  # type: ignore[arg-type]
    ctx = Context(spec=spec, evaluator=Evaluator(spec), effort="quick")
    stack = extreme_stack(ctx, ctx.cells[0], "float64")
    with np.errstate(all="ignore"):  # one case at a time, through the public one-case call
        one = [evaluate_reference(reference, stack.predictions[k], stack.targets[k], inputs=inputs,
                                  ignore_label=spec.ignore_label, reduction=ctx.evaluator.reduction,
                                  params=dict(spec.params)) for k in range(len(stack))]
    slow = (np.stack([v for v, _ in one]), np.stack([g for _, g in one]))
    fast = reference_batch(ctx, stack.predictions, stack.targets)
    for a, b in zip(fast, slow):
        assert np.array_equal(a, b, equal_nan=True)  # bit for bit, including infinities
