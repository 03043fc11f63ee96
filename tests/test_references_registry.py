"""The registry, parameter validation, and one-case evaluation (ignore label, weights, reductions).

Scenario: a ferry-terminal camera sorting vehicles into C lanes; some frames are unlabelled
(ignore label) and rare lanes carry larger class weights.
"""

from __future__ import annotations

import doctest
import importlib

import numpy as np
import pytest
import scipy.special as sp

from _closeness import assert_close as _assert_close
from lossguard.errors import SpecError
from lossguard.references import (
    PROPERTIES,
    REFERENCES,
    evaluate_reference,
    get_reference,
    reference_names,
    validate_params,
)

N, C, IGNORE = 8, 5, -100
LANE_WEIGHT = [1.0, 2.5, 0.5, 4.0, 1.5]



def assert_close(actual: object, expected: object, rtol: float = 1e-13, atol: float = 1e-15) -> None:
    """Registry round trips agree to a few float64 ulp (2^-52 ≈ 2.2e-16, IEEE 754)."""
    _assert_close(actual, expected, rtol, atol)

def lanes(seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    z = rng.normal(0, 3, (N, C))
    y = rng.integers(0, C, N)
    y[[2, 5]] = IGNORE
    z[5] = [900.0, -900.0, 0.0, 3.0, 1e4]  # an ignored frame with wild logits must not leak
    return z, y


# ------------------------------------------------------------------------------- registry


def test_registry_names_and_declarations() -> None:
    assert reference_names() == ["bce", "categorical_ce", "focal_binary", "focal_multiclass",
                                 "kl_divergence", "smoothed_ce"]
    for name, ref in REFERENCES.items():
        assert ref.name == name and get_reference(name) is ref and get_reference(ref) is ref
        assert ref.properties <= PROPERTIES
        assert ref.kinds <= {"binary", "categorical", "distribution"} and ref.kinds
        assert ref.inputs <= {"logits", "probabilities"} and "logits" in ref.inputs
        assert ref.target_domain in ("soft", "hard") and ref.citation and ref.formula
    assert REFERENCES["focal_binary"].target_domain == "hard"
    assert "proper" not in REFERENCES["smoothed_ce"].properties
    assert "convex" not in REFERENCES["focal_multiclass"].properties


def test_unknown_reference_is_a_one_line_error_with_a_suggestion() -> None:
    with pytest.raises(SpecError) as err:
        get_reference("categorical_cee")
    msg = str(err.value)
    assert msg == "reference='categorical_cee': expected a registry name; try 'categorical_ce'"
    with pytest.raises(SpecError) as err:
        get_reference("xx")
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith("reference='xx': expected a registry name; ")
    assert "'kl_divergence'" in msg  # no close match: every name is listed


@pytest.mark.parametrize(
    "name,params,classes,fragment",
    [
        ("focal_binary", {"gama": 2.0}, None,
         "gama=2.0: expected a parameter of 'focal_binary'; try 'gamma'"),
        ("focal_binary", {"gamma": -1.0}, None, "gamma=-1.0: expected a finite number >= 0"),
        ("focal_binary", {"alpha": 1.5}, None, "alpha=1.5: expected None or a number in [0, 1]"),
        ("bce", {"pos_weight": 0.0}, None, "pos_weight=0.0: expected None or a positive"),
        ("bce", {"pos_weigth": 2.0}, None, "try 'pos_weight'"),
        ("smoothed_ce", {"epsilon": 1.0}, None, "epsilon=1.0: expected a number in [0, 1)"),
        ("categorical_ce", {"weight": [1.0, 2.0]}, 3, "expected 3 entries (one per class), got 2"),
        ("categorical_ce", {"weight": [1.0, -2.0, 1.0]}, 3, "positive finite numbers"),
        ("focal_multiclass", {"alpha": [0.2, 0.8]}, 4, "expected 4 entries"),
        ("kl_divergence", {"epsilon": 0.1}, None,
         "epsilon=0.1: expected no parameters for 'kl_divergence'"),
    ],
)
def test_validate_params_errors_are_one_line(name: str, params: dict, classes: int | None,
                                             fragment: str) -> None:
    with pytest.raises(SpecError) as err:
        validate_params(get_reference(name), params, classes)
    assert fragment in str(err.value) and "\n" not in str(err.value)


def test_validate_params_resolves_defaults() -> None:
    assert validate_params("focal_binary", {}) == {"gamma": 2.0, "alpha": 0.25}
    got = validate_params("focal_multiclass", {"alpha": [1, 2, 3]}, 3)
    assert got == {"gamma": 2.0, "alpha": [1, 2, 3]}
    assert validate_params("smoothed_ce", None, 4) == {"epsilon": 0.1}
    assert validate_params("categorical_ce", {"weight": LANE_WEIGHT}, None)["weight"] == LANE_WEIGHT


# ------------------------------------------------------------ evaluate_reference vs torch


@pytest.mark.parametrize("reduction", ["mean", "sum", "none"])
@pytest.mark.parametrize("weight", [None, LANE_WEIGHT])
def test_ignore_label_and_class_weights_vs_torch(reduction: str, weight: list[float] | None) -> None:
    torch = pytest.importorskip("torch")
    z, y = lanes()
    cot = np.linspace(0.5, 2.0, N) if reduction == "none" else None
    params = {} if weight is None else {"weight": weight}
    value, grad = evaluate_reference("categorical_ce", z, y, ignore_label=IGNORE, reduction=reduction,
                                     params=params, cotangent=cot)
    zt = torch.tensor(z, requires_grad=True)
    w = None if weight is None else torch.tensor(weight, dtype=torch.float64)
    # torch.nn.functional.cross_entropy with weight= and ignore_index= (value and autograd gradient)
    out = torch.nn.functional.cross_entropy(zt, torch.tensor(y), weight=w, ignore_index=IGNORE,
                                            reduction=reduction)
    (gt,) = torch.autograd.grad(out, zt, grad_outputs=None if cot is None else torch.tensor(cot))
    assert np.all(np.isfinite(value)) and np.all(np.isfinite(grad))
    assert_close(value, out.detach().numpy())
    assert_close(grad, gt.numpy())
    assert np.all(grad[[2, 5]] == 0.0)  # ignored frames: zero gradient


def test_ignored_mean_is_weighted_mean_of_kept_examples() -> None:
    z, y = lanes()
    keep = y != IGNORE
    value, _ = evaluate_reference("categorical_ce", z, y, ignore_label=IGNORE,
                                  params={"weight": LANE_WEIGHT})
    w = np.asarray(LANE_WEIGHT)[y[keep]]
    # scipy.special.log_softmax; weighted mean Σ w_y ℓ / Σ w_y (common practice, see _base)
    ell = -sp.log_softmax(z[keep], axis=-1)[np.arange(keep.sum()), y[keep]]
    assert_close(value, np.sum(w * ell) / np.sum(w))


def test_distribution_weights_divide_by_n_like_torch() -> None:
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(11)
    z, rows = rng.normal(0, 2, (N, C)), rng.dirichlet(np.ones(C), N)
    value, grad = evaluate_reference("categorical_ce", z, rows, params={"weight": LANE_WEIGHT})
    zt = torch.tensor(z, requires_grad=True)
    # torch.nn.functional.cross_entropy, probability targets + weight, mean over N
    out = torch.nn.functional.cross_entropy(zt, torch.tensor(rows), weight=torch.tensor(LANE_WEIGHT))
    (gt,) = torch.autograd.grad(out, zt)
    assert_close(value, out.detach().numpy())
    assert_close(grad, gt.numpy())


@pytest.mark.parametrize("reduction", ["mean", "sum", "none"])
def test_bce_pos_weight_reductions_vs_torch(reduction: str) -> None:
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(12)
    z, y = rng.normal(0, 3, (N, 2)), rng.random((N, 2))
    cot = rng.uniform(0.5, 1.5, (N, 2)) if reduction == "none" else None
    value, grad = evaluate_reference("bce", z, y, reduction=reduction, params={"pos_weight": 1.7},
                                     cotangent=cot)
    zt = torch.tensor(z, requires_grad=True)
    # torch.nn.functional.binary_cross_entropy_with_logits(pos_weight=...), autograd gradient
    out = torch.nn.functional.binary_cross_entropy_with_logits(
        zt, torch.tensor(y), pos_weight=torch.tensor(1.7, dtype=torch.float64), reduction=reduction)
    (gt,) = torch.autograd.grad(out, zt, grad_outputs=None if cot is None else torch.tensor(cot))
    assert_close(value, out.detach().numpy(), 1e-12)
    assert_close(grad, gt.numpy(), 1e-12)


def test_kl_sum_vs_torch_and_probabilities_input() -> None:
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(13)
    z, rows = rng.normal(0, 2, (N, C)), rng.dirichlet(np.ones(C), N)
    value, grad = evaluate_reference("kl_divergence", z, rows, reduction="sum")
    zt = torch.tensor(z, requires_grad=True)
    # torch.nn.functional.kl_div(log_softmax(z), y, reduction="sum")
    out = torch.nn.functional.kl_div(torch.log_softmax(zt, -1), torch.tensor(rows), reduction="sum")
    (gt,) = torch.autograd.grad(out, zt)
    assert_close(value, out.detach().numpy(), 1e-12)
    assert_close(grad, gt.numpy(), 1e-12)


def test_ce_sum_on_probabilities_vs_scipy() -> None:
    # scipy only: kept out of the torch test above so that it runs without torch too
    rng = np.random.default_rng(13)
    z = rng.normal(0, 2, (N, C))
    p = sp.softmax(z, axis=-1)
    labels = rng.integers(0, C, N)
    v2, g2 = evaluate_reference("categorical_ce", p, labels, inputs="probabilities", reduction="sum")
    # scipy.special.xlogy: −Σ log p_y; gradient −1/p_y at the label (d log p / dp = 1/p)
    assert_close(v2, -np.sum(np.log(p[np.arange(N), labels])))
    assert_close(g2, -np.eye(C)[labels] / p)


def test_none_reduction_is_a_vjp_and_scalar_cotangent_scales() -> None:
    z, y = lanes()
    cot = np.arange(1.0, N + 1)
    v, g = evaluate_reference("focal_multiclass", z, y, ignore_label=IGNORE, reduction="none",
                              cotangent=cot)
    vs, gs = evaluate_reference("focal_multiclass", z, y, ignore_label=IGNORE, reduction="sum")
    assert v.shape == (N,) and v[2] == 0.0 and v[5] == 0.0
    assert_close(np.sum(v), vs)
    # a VJP with cotangent c equals Σ_i c_i ∂ℓ_i/∂z (linearity; common practice)
    assert_close(g, gs * cot[:, None])
    _, g3 = evaluate_reference("focal_multiclass", z, y, ignore_label=IGNORE, reduction="sum",
                               cotangent=3.0)
    assert_close(g3, 3.0 * gs)


def test_all_ignored_mean_is_nan_not_a_crash() -> None:
    z = np.zeros((2, 3))
    v, g = evaluate_reference("categorical_ce", z, np.array([IGNORE, IGNORE]), ignore_label=IGNORE)
    assert np.isnan(v) and g.shape == z.shape  # 0/0, as documented in _base


Z23 = np.zeros((2, 3))


@pytest.mark.parametrize(
    "kwargs,fragment",
    [
        ({"ref": "bce", "z": np.zeros(3), "y": np.zeros(3), "ignore_label": -1},
         "ignore_label=-1: expected no ignore label"),
        ({"ref": "categorical_ce", "z": Z23, "y": np.array([0, 1]), "reduction": "means"},
         "try 'mean'"),
        ({"ref": "kl_divergence", "z": Z23, "y": np.full((2, 3), 1 / 3), "inputs": "probabilities"},
         "inputs='probabilities': expected one of ['logits']"),
        ({"ref": "categorical_ce", "z": Z23, "y": np.array([0, 3])},
         "label=3: expected a class index in [0, 3)"),
        ({"ref": "kl_divergence", "z": Z23, "y": np.array([0, 1])}, "expected rows (N, C)"),
        ({"ref": "smoothed_ce", "z": Z23, "y": np.array([0, 1]), "params": {"epsilon": 2}},
         "epsilon=2"),
    ],
)
def test_evaluate_reference_errors_are_one_line(kwargs: dict, fragment: str) -> None:
    ref, z, y = kwargs.pop("ref"), kwargs.pop("z"), kwargs.pop("y")
    with pytest.raises(SpecError) as err:
        evaluate_reference(ref, z, y, **kwargs)
    assert fragment in str(err.value) and "\n" not in str(err.value)


@pytest.mark.parametrize("module", ["_stable", "bce", "ce", "focal", "kl", ""])
def test_docstring_examples_run(module: str) -> None:
    mod = importlib.import_module("lossguard.references" + ("." + module if module else ""))
    result = doctest.testmod(mod, verbose=False)
    assert result.attempted > 0 and result.failed == 0
