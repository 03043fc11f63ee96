"""The error model against IEEE-754 facts."""

from __future__ import annotations

import numpy as np
import pytest

from lossguard.tolerance import gamma, rounding_allowance, unit_roundoff


@pytest.mark.parametrize(
    "dtype, u",
    [
        # IEEE 754-2008 binary16/32/64: u = 2^-p with p = 11, 24, 53 significand bits
        ("float16", 2.0**-11),
        ("float32", 2.0**-24),
        ("float64", 2.0**-53),
        # bfloat16 has 8 significand bits (Google Brain's format, as documented by ml_dtypes)
        ("bfloat16", 2.0**-8),
    ],
)
def test_unit_roundoff_matches_ieee(dtype, u):
    assert unit_roundoff(dtype) == u


def test_gamma_is_higham_formula():
    # Higham 2002, Lemma 3.1: γ_n = n u / (1 − n u)
    u = 2.0**-53
    assert gamma(10, "float64") == pytest.approx(10 * u / (1 - 10 * u), rel=1e-15)
    assert gamma(10**20, "float16") == 1.0  # capped once n·u ≥ 1/2


def test_allowance_grows_with_scale_and_catches_relative_errors():
    ref = np.array([1.0, 1.0])
    a = rounding_allowance(ref, np.array([0.0, 1e4]), dtype="float64", n_ops=30)
    assert a.atol[1] > 1e3 * a.atol[0]
    # a 1e-9 relative error is far outside a float64 allowance at unit scale (it must fail) …
    assert 1e-9 > a.atol[0]
    # … and one rounding error is inside it (a correct computation must pass)
    assert np.spacing(1.0) <= a.atol[0]
