"""The public Hypothesis strategies and the scoped search that shrinks counterexamples."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import ml_dtypes
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.errors import InvalidArgument

from lossguard import declare
from lossguard._search import SearchUnavailable, search_settings, smallest_failure
from lossguard.errors import SpecError
from lossguard.ladders import largest_finite
from lossguard.strategies import (
    DEFAULT_SHAPES,
    StrategyArgumentError,
    binary_targets,
    cases,
    labels,
    logits,
    simplex_targets,
)

# our own @given tests pass their settings as objects, like the library does
FEW = settings(max_examples=20, database=None, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _ce(z, y):
    return -jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1).mean()


# ------------------------------------------------------------------------------ logits


@pytest.mark.parametrize("dtype", ["float16", "bfloat16", "float32", "float64"])
@FEW
@given(data=st.data())
def test_logits_respect_shape_menu_dtype_and_bound(dtype, data):
    menu = [(4, 3), (2, 5)]
    z = data.draw(logits(menu, dtype=dtype, max_magnitude=300.0))
    assert z.shape in menu
    assert np.dtype(z.dtype).name == np.dtype(ml_dtypes.bfloat16 if dtype == "bfloat16" else dtype).name
    zz = z.astype(np.float64)
    assert np.all(np.isfinite(zz)) and np.max(np.abs(zz)) <= 300.0


def test_logits_default_bound_is_capped_by_the_dtype():
    # float16's largest finite value is 65504 (IEEE 754 binary16); the default bound 1e4 fits it
    assert largest_finite("float16") == 65504.0
    too_big = lambda z: np.abs(z.astype(np.float64)).max() > 1e4  # noqa: E731
    assert smallest_failure(logits((2, 3), dtype="float16"), too_big, seed=3) is None


def test_extremes_shrink_to_one_rung_in_the_first_menu_shape():
    found = smallest_failure(logits(list(DEFAULT_SHAPES)), lambda z: np.abs(z).max() >= 1e3, seed=0)
    assert found is not None
    z = found.value
    assert z.shape == DEFAULT_SHAPES[0]  # shrinking prefers the first shape of the menu
    # and toward simple values: the smallest qualifying rung, everything else 0 or equal to it
    assert np.abs(z).max() == 1e3 and set(np.unique(np.abs(z))) <= {0.0, 1e3}


def test_extremes_can_be_switched_off_and_bounded_below():
    big = lambda z: np.abs(z).max() >= 1e3  # noqa: E731
    assert smallest_failure(logits((2, 3), max_magnitude=999.0), big, seed=1, max_examples=30) is None
    found = smallest_failure(logits((2, 3), min_magnitude=90.0), lambda z: 0 < np.abs(z).max() < 90.0, seed=1,
                             budget=30)
    assert found is not None  # ordinary values still lie below the smallest rung


def test_ties_are_mixed_in():
    def tied_rows(z):
        return bool(np.all(z[:, 0] == z[:, 1]) and len(np.unique(z[:, 0])) >= 3 and np.any(z[:, 2] != z[:, 0]))

    assert smallest_failure(logits((6, 3)), tied_rows, seed=2, budget=60) is not None


# ------------------------------------------------------------------------------ targets


@FEW
@given(y=labels(8, 3, ignore_label=-100, min_kept=2))
def test_labels_are_classes_or_the_ignore_label(y):
    assert y.shape == (8,) and y.dtype == np.int64
    assert np.all(((y >= 0) & (y < 3)) | (y == -100))
    assert np.sum(y != -100) >= 2


def test_labels_include_ignored_examples_and_shrink_to_zero():
    assert smallest_failure(labels(8, 3, ignore_label=-1), lambda y: np.any(y == -1), seed=0) is not None
    found = smallest_failure(labels(8, 3), lambda y: np.any(y == 2), seed=0)
    assert found is not None and set(found.value.tolist()) <= {0, 2}  # no label but 0 and the one needed


@FEW
@given(t=binary_targets([(16,), (8, 3)]), h=binary_targets((5,), soft=False))
def test_binary_targets_lie_in_the_unit_interval(t, h):
    assert t.shape in [(16,), (8, 3)] and np.all((t >= 0) & (t <= 1))
    assert set(np.unique(h)) <= {0.0, 1.0}


def test_soft_binary_targets_appear():
    assert smallest_failure(binary_targets((4,)), lambda t: np.any((t > 0) & (t < 1)), seed=0) is not None


@FEW
@given(t=simplex_targets(6, 4))
def test_simplex_rows_sum_to_one(t):
    assert t.shape == (6, 4) and np.all(t >= 0)
    assert np.max(np.abs(t.sum(axis=1) - 1.0)) <= 4 * np.finfo(np.float64).eps


@FEW
@given(dense=simplex_targets(5, 3, one_hot=False, zeros=False), hot=simplex_targets(5, 3, dense=False, zeros=False))
def test_simplex_row_kinds(dense, hot):
    assert np.all(dense > 0)  # interior rows: every class at least 2^-10 before normalising
    assert np.all(np.sort(hot, axis=1)[:, :-1] == 0) and np.all(hot.max(axis=1) == 1)


def test_simplex_rows_with_zeros_appear_and_shrink_to_uniform():
    assert smallest_failure(simplex_targets(2, 3, one_hot=False),
                            lambda t: np.any((t == 0).sum(axis=1) == 1), seed=0, budget=30) is not None
    found = smallest_failure(simplex_targets(2, 4), lambda t: True, seed=0, max_examples=5)
    assert found is not None and np.allclose(found.value, 0.25)


# ------------------------------------------------------------------------------ whole cases


@FEW
@given(data=st.data())
def test_cases_follow_the_declaration(data):
    spec = declare(_ce, kind="categorical", ignore_label=-100)
    z, y = data.draw(cases(spec))
    assert z.shape in [(8, 3), (16, 10)] and y.shape == z.shape[:1]
    assert np.all(((y >= 0) & (y < z.shape[1])) | (y == -100)) and np.any(y != -100)


@FEW
@given(data=st.data())
def test_cases_map_probability_inputs_and_hard_domains(data):
    probs = declare(lambda p, y: -jnp.log(p).mean(), kind="distribution", inputs="probabilities")
    p, t = data.draw(cases(probs, shapes=[(4, 3)]))
    assert p.shape == t.shape == (4, 3)
    assert np.allclose(p.sum(axis=1), 1.0) and np.allclose(t.sum(axis=1), 1.0)
    # focal_binary is defined for hard targets only, so drawn targets are 0 or 1
    hard = declare(lambda z, y: (z * y).mean(), kind="binary", reference="focal_binary")
    z, y = data.draw(cases(hard, shapes=[(8, 3)], dtype="float32"))
    assert z.dtype == np.float32 and set(np.unique(y)) <= {0.0, 1.0}


# ------------------------------------------------------------------------------ invalid arguments

_SPEC = declare(_ce, kind="categorical", classes=4)

INVALID = [
    (lambda: logits((0, 3)), "shape=(0, 3)"),
    (lambda: logits((2, 3, 4, 5)), "shape=(2, 3, 4, 5)"),
    (lambda: logits("8x3"), "shape='8x3'"),
    (lambda: logits((10_000, 10)), "shape=(10000, 10)"),
    (lambda: logits(dtype="float8"), "dtype='float8'"),
    (lambda: logits(max_magnitude=-1.0), "max_magnitude=-1.0"),
    (lambda: logits(max_magnitude=float("inf")), "max_magnitude=inf"),
    (lambda: logits(dtype="float16", max_magnitude=1e5), "max_magnitude=100000.0"),
    (lambda: logits(min_magnitude=100.0, max_magnitude=10.0), "min_magnitude=100.0"),
    (lambda: logits(extremes="yes"), "extremes='yes'"),
    (lambda: labels(0, 3), "n=0"),
    (lambda: labels(8, 1), "classes=1"),
    (lambda: labels(8, 3, ignore_label=2), "ignore_label=2"),
    (lambda: labels(8, 3, ignore_label=1.5), "ignore_label=1.5"),
    (lambda: labels(8, 3, min_kept=9), "min_kept=9"),
    (lambda: binary_targets((4,), soft=1), "soft=1"),
    (lambda: simplex_targets(4, 3, dense=False, one_hot=False, zeros=False), "dense=False"),
    (lambda: simplex_targets(4, True), "classes=True"),
    (lambda: cases("not a spec"), "spec='not a spec'"),
    (lambda: cases(_SPEC, shapes=[(8, 3)]), "shapes='8x3'"),
    (lambda: cases(_SPEC, shapes=[(8,)]), "shapes=(8,)"),
]


@pytest.mark.parametrize("make, starts", INVALID, ids=[s for _, s in INVALID])
def test_invalid_arguments_raise_at_construction_with_a_clear_message(make, starts):
    with pytest.raises(StrategyArgumentError) as info:
        make()  # eager: raised when the strategy is built, before any draw
    err = info.value
    assert isinstance(err, InvalidArgument) and isinstance(err, SpecError)
    msg = str(err)
    assert msg.startswith(starts + ": expected "), msg
    assert "; " in msg.split(": expected ", 1)[1]  # a suggestion follows the expectation


# ------------------------------------------------------------------------------ the search


def test_search_is_seeded_minimal_and_bounded():
    calls = []

    def prop(x):
        calls.append(x)
        return x * x > 200

    first = smallest_failure(st.integers(0, 10_000), prop, seed=7)
    again = smallest_failure(st.integers(0, 10_000), prop, seed=7)
    assert first is not None and again is not None
    assert first.value == again.value == 15 and first.evaluations == again.evaluations
    calls.clear()
    assert smallest_failure(st.integers(0, 10), prop, seed=7, max_examples=5, budget=3) is None
    assert len(calls) <= 3


def test_search_is_quiet_and_leaves_global_settings_alone(capfd):
    before = settings.default
    found = smallest_failure(st.lists(st.integers()), lambda xs: sum(xs) > 50, seed=1)
    assert found is not None and sum(found.value) == 51
    out, err = capfd.readouterr()
    assert out == "" and err == ""
    assert settings.default is before
    s = search_settings(10)
    assert s.database is None and s.deadline is None and s.max_examples == 10


def test_search_inside_a_users_given_test_degrades_gracefully():
    seen = []

    @settings(max_examples=2, database=None)
    @given(st.integers())
    def users_test(x):
        with pytest.raises(SearchUnavailable):
            smallest_failure(st.integers(0, 100), lambda v: v > 3, seed=0)
        seen.append(x)

    users_test()
    assert seen
