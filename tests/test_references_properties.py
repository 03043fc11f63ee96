"""The declared properties of each reference hold numerically, and the undeclared ones fail.

Scenario: a beehive monitor classifying hive sounds into C colony states (categorical), flagging
queen presence per microphone (binary), and matching a forager-activity mix (distribution).
"""

from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.special as sp

from lossguard.references import REFERENCES

N, C = 6, 4


def hive_case(name: str, seed: int, scale: float = 4.0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    ref = REFERENCES[name]
    if ref.kinds == {"binary"}:
        z = rng.normal(0, scale, (N, 3))
        y = rng.integers(0, 2, (N, 3)).astype(float)
        if ref.target_domain == "hard":
            return z, y
        return z, np.where(rng.random((N, 3)) < 0.5, y, rng.random((N, 3)))
    z = rng.normal(0, scale, (N, C))
    if "categorical" in ref.kinds:
        return z, rng.integers(0, C, N)
    return z, rng.dirichlet(np.ones(C), N)


def with_property(prop: str) -> list[str]:
    return [n for n, r in REFERENCES.items() if prop in r.properties]


@pytest.mark.parametrize("name", with_property("nonnegative"))
@pytest.mark.parametrize("scale", [1.0, 30.0])
def test_nonnegative(name: str, scale: float) -> None:
    for seed in range(3):
        z, y = hive_case(name, seed, scale)
        assert np.all(REFERENCES[name].per_example(z, y) >= 0.0)


@pytest.mark.parametrize("name", with_property("shift_invariant"))
def test_shift_invariant(name: str) -> None:
    ref = REFERENCES[name]
    z, y = hive_case(name, 1)
    shift = np.linspace(-7.0, 11.0, N)[:, None]  # a different constant for each row
    # softmax(z + c) = softmax(z) (common practice); rounding of z + c costs ~|c|·eps absolute
    atol = 32 * np.finfo(float).eps * (np.abs(z).max() + 11)
    assert np.allclose(ref.per_example(z + shift, y), ref.per_example(z, y), rtol=0, atol=atol)
    assert np.allclose(ref.per_example_grad(z + shift, y), ref.per_example_grad(z, y),
                       rtol=0, atol=atol)


@pytest.mark.parametrize("name", with_property("class_symmetric"))
def test_class_symmetric(name: str) -> None:
    ref = REFERENCES[name]
    z, y = hive_case(name, 2)
    perm = np.array([2, 0, 3, 1])
    inv = np.argsort(perm)
    yp = inv[y] if y.ndim == 1 else y[:, perm]  # relabel class perm[j] as j
    assert np.allclose(ref.per_example(z[:, perm], yp), ref.per_example(z, y), rtol=1e-14, atol=0)
    assert np.allclose(ref.per_example_grad(z[:, perm], yp), ref.per_example_grad(z, y)[:, perm],
                       rtol=1e-13, atol=1e-16)


def test_class_weights_break_symmetry_as_documented() -> None:
    z, y = hive_case("categorical_ce", 2)
    w = [1.0, 3.0, 1.0, 1.0]
    rows = np.eye(C)[y]
    perm = np.array([1, 0, 2, 3])
    ref = REFERENCES["categorical_ce"]
    permuted = ref.per_example(z[:, perm], rows[:, perm], weight=w)
    assert not np.allclose(permuted, ref.per_example(z, rows, weight=w))


def _row_hessian(name: str, params: dict[str, Any]) -> Any:
    ref = REFERENCES[name]

    def one(z: jax.Array, y: jax.Array) -> jax.Array:
        return jnp.sum(ref.jax_per_example(z[None], y[None], **params))

    return jax.jit(jax.hessian(one))


@pytest.mark.parametrize("name", with_property("convex"))
def test_convex_hessians_are_psd(name: str) -> None:
    z, y = hive_case(name, 4)
    params = {"pos_weight": 2.0} if name == "bce" else {}
    with jax.enable_x64(True):
        hess = _row_hessian(name, params)
        for i in range(N):
            h = np.asarray(hess(jnp.asarray(z[i]), jnp.asarray(y[i])))
            # a convex function has a positive semi-definite Hessian (common practice)
            assert np.linalg.eigvalsh(h).min() >= -1e-12


@pytest.mark.parametrize("name,y,params", [
    ("focal_binary", np.array([1.0, 1.0, 1.0]), {"gamma": 2.0, "alpha": None}),
    ("focal_multiclass", np.array(0), {"gamma": 2.0}),
])
def test_focal_is_not_convex(name: str, y: np.ndarray, params: dict[str, Any]) -> None:
    assert "convex" not in REFERENCES[name].properties
    # a point of negative curvature (found numerically): z ≈ −4 on the true class, γ = 2
    z = np.array([-4.0, -4.0, -4.0]) if name == "focal_binary" else np.array([-4.0, 0.0, 0.0])
    with jax.enable_x64(True):
        h = np.asarray(_row_hessian(name, params)(jnp.asarray(z), jnp.asarray(y)))
    assert np.linalg.eigvalsh(h).min() < -1e-3


def expected_grad(name: str, q: np.ndarray, z: np.ndarray, params: dict[str, Any]) -> np.ndarray:
    """∇_z E_{y~q} ℓ(z, y) for one prediction row (all loss families here are linear in y's law)."""
    ref = REFERENCES[name]
    if ref.kinds == {"binary"}:  # E over y ∈ {0, 1} with P(y = 1) = q
        g1 = ref.per_example_grad(z, np.ones_like(z), **params)
        g0 = ref.per_example_grad(z, np.zeros_like(z), **params)
        return q * g1 + (1 - q) * g0
    if "categorical" in ref.kinds:
        labels = np.arange(len(q))
        g = ref.per_example_grad(np.tile(z, (len(q), 1)), labels, **params)
        return q @ g
    return ref.per_example_grad(z[None], q[None], **params)[0]


Q = np.array([0.1, 0.6, 0.25, 0.05])


@pytest.mark.parametrize("name", with_property("proper"))
def test_proper_losses_are_minimised_at_the_true_law(name: str) -> None:
    binary = REFERENCES[name].kinds == {"binary"}
    q = Q[:3] if binary else Q
    z = sp.logit(q) if binary else np.log(q)  # the prediction that reports q itself
    # propriety (Gneiting & Raftery, JASA 2007): the expected loss is stationary at p = q
    assert np.all(np.abs(expected_grad(name, q, z, {})) < 1e-15)


@pytest.mark.parametrize("name,params", [
    ("smoothed_ce", {"epsilon": 0.1}),
    ("focal_multiclass", {"gamma": 2.0}),
    ("focal_binary", {"gamma": 2.0, "alpha": None}),
    ("bce", {"pos_weight": 3.0}),
])
def test_improper_losses_move_away_from_the_true_law(name: str, params: dict[str, Any]) -> None:
    binary = REFERENCES[name].kinds == {"binary"}
    q = Q[:3] if binary else Q
    z = sp.logit(q) if binary else np.log(q)
    # smoothing pulls toward ε/C, focal pushes p_t away from q, pos_weight shifts the optimum
    assert np.max(np.abs(expected_grad(name, q, z, params))) > 1e-3
