"""Correct losses pass every property check that applies to them.

Each registry reference is written as its ``jax_per_example`` twin reduced by a mean (over the
examples kept, when an ignore label is declared) and run through the property checks its
declaration selects by default. A few seeds run in the default suite, 200 in the slow one.
"""

from __future__ import annotations

from typing import Any

import jax.numpy as jnp
import numpy as np
import pytest

from lossguard import declare, run
from lossguard.checks import select_checks
from lossguard.evaluate import Evaluator
from lossguard.references import REFERENCES

MINE = ("shift", "classes", "batch", "padding", "nonnegative", "deterministic", "proper")


def mean_of(name: str, ignore_label: int | None = None, inputs: str = "logits"):
    """The reference's JAX twin reduced by a mean; declared params arrive as keywords."""
    ref = REFERENCES[name]

    def loss(z, y, **params):
        if ignore_label is None:
            return ref.jax_per_example(z, y, inputs=inputs, **params).mean()
        keep = y != ignore_label
        per = ref.jax_per_example(z, jnp.where(keep, y, 0), inputs=inputs, **params)
        return jnp.where(keep, per, 0.0).sum() / keep.sum()

    loss.__name__ = f"{name}_mean"
    return loss


#: every registry reference once (the default suite), and the input-space variants (slow suite)
SPECS = [
    ("categorical_ce", "categorical", {}),
    ("categorical_ce", "categorical", dict(ignore_label=-100)),
    ("categorical_ce", "distribution", {}),
    ("smoothed_ce", "categorical", {}),
    ("focal_multiclass", "categorical", {}),
    ("focal_binary", "binary", {}),
    ("bce", "binary", {}),
    ("kl_divergence", "distribution", {}),
]
ALL_SPECS = SPECS + [
    ("categorical_ce", "categorical", dict(inputs="probabilities")),
    ("bce", "binary", dict(inputs="probabilities")),
    ("categorical_ce", "categorical", dict(reduction="sum")),
]


def _ids(specs: list) -> list[str]:  # type: ignore[type-arg]
    return [f"{n}-{k}-{'-'.join(f'{a}={b}' for a, b in kw.items())}" for n, k, kw in specs]


def _spec(name: str, kind: str, kw: dict[str, Any]):
    if kw.get("reduction") == "sum":
        ref = REFERENCES[name]
        return declare(lambda z, y: ref.jax_per_example(z, y).sum(), kind=kind, reference=name, **kw)
    loss = mean_of(name, ignore_label=kw.get("ignore_label"), inputs=kw.get("inputs", "logits"))
    return declare(loss, kind=kind, reference=name, **kw)


def _selected(spec) -> list[str]:
    return [c.name for c, why in select_checks(spec) if why is None and c.name in MINE]


def _assert_all_pass(spec, seeds, effort: str = "quick") -> None:
    ev = Evaluator(spec)  # shared across seeds: one set of compilations
    for seed in seeds:
        result = run(spec, seed=seed, effort=effort, only=_selected(spec), evaluator=ev)
        bad = {c.name: c.summary for c in result.checks if c.verdict != "pass"}
        assert not bad, f"seed {seed}: {bad}"


@pytest.mark.parametrize("name, kind, kw", SPECS, ids=_ids(SPECS))
def test_registry_reference_passes_every_applicable_check(name, kind, kw):
    _assert_all_pass(_spec(name, kind, kw), seeds=(0, 1))


@pytest.mark.slow
@pytest.mark.parametrize("name, kind, kw", ALL_SPECS, ids=_ids(ALL_SPECS))
def test_registry_reference_passes_over_many_seeds(name, kind, kw):
    _assert_all_pass(_spec(name, kind, kw), seeds=range(200))


def test_expected_checks_per_declaration():
    """Defaults by kind, inputs and parameters (the contract of which checks run)."""
    assert _selected(_spec("categorical_ce", "categorical", dict(ignore_label=-100))) == list(MINE)
    # probabilities have no shift to test; binary predictions have no class axis
    assert "shift" not in _selected(_spec("categorical_ce", "categorical", dict(inputs="probabilities")))
    assert _selected(_spec("bce", "binary", {})) == ["batch", "nonnegative", "deterministic", "proper"]
    # losses that are not proper scoring rules only run proper when asked to
    assert "proper" not in _selected(_spec("focal_multiclass", "categorical", {}))
    weighted = declare(mean_of("categorical_ce"), kind="categorical",
                       reference="categorical_ce", params={"weight": [1.0, 2.0, 3.0]})
    reasons = {c.name: why for c, why in select_checks(weighted)}
    # class weights break class-permutation equivariance and properness: both become opt-in
    assert reasons["classes"] == "optional: turn on with --expect classes (expect=['classes'] in Python)"
    assert reasons["proper"] == "optional: turn on with --expect proper (expect=['proper'] in Python)"
    no_ref = declare(mean_of("categorical_ce"), kind="categorical")
    assert _selected(no_ref) == ["shift", "classes", "batch", "nonnegative", "deterministic"]


def test_per_example_outputs_pass():
    ref = REFERENCES["categorical_ce"]
    keep = lambda y: y != -100  # noqa: E731
    per_example = declare(lambda z, y: jnp.where(keep(y), ref.jax_per_example(z, jnp.where(keep(y), y, 0)), 0.0),
                          kind="categorical", reference="categorical_ce", ignore_label=-100)
    _assert_all_pass(per_example, seeds=(0,))


def test_plain_numpy_loss_without_gradient_is_judged_on_values():
    def numpy_ce(z, y):
        z = np.asarray(z, dtype=np.float64)
        lse = np.log(np.exp(z - z.max(-1, keepdims=True)).sum(-1)) + z.max(-1)  # max-shifted log-sum-exp
        if float(lse[0]) != float(lse[0]):  # Python control flow on values: JAX cannot trace this
            raise ValueError("nan")
        return float(np.mean(lse - z[np.arange(len(y)), y]))

    spec = declare(numpy_ce, kind="categorical")
    result = run(spec, effort="quick", only=["shift", "batch", "deterministic"])
    assert result.evaluation["adapter"] == "numpy"
    assert all(c.verdict == "pass" for c in result.checks), [c.summary for c in result.checks]


def test_label_smoothing_distortion_is_the_smoothed_target():
    """The minimiser of the expected smoothed cross-entropy predicts (1 − ε) q + ε/C.

    Derivation (label smoothing, Szegedy et al., CVPR 2016): E_{y~q} of −Σ_c t_c(y) log p_c with
    t(y) = (1 − ε) onehot(y) + ε/C is the cross-entropy against (1 − ε) q + ε/C, which Gibbs'
    inequality minimises at that distribution.
    """
    eps = 0.1
    spec = declare(mean_of("smoothed_ce"), kind="categorical", reference="smoothed_ce",
                   params={"epsilon": eps}, expect=["proper"])
    check = run(spec, effort="quick", only=["proper"]).check("proper")
    assert check.verdict == "fail" and "minimised predicting" in check.summary
    for case in check.details["distortion"]:
        q, p = np.asarray(case["target"]), np.asarray(case["minimiser_predicts"])
        np.testing.assert_allclose(p, (1 - eps) * q + eps / q.size, atol=1e-4)


def test_focal_loss_distortion_is_toward_uniform():
    """Focal loss lowers the confidence of its minimiser (Mukhoti et al., "Calibrating Deep Neural
    Networks using Focal Loss", NeurIPS 2020): the predicted top probability is below the target's."""
    spec = declare(mean_of("focal_multiclass"), kind="categorical", reference="focal_multiclass",
                   params={"gamma": 2.0}, expect=["proper"])
    check = run(spec, effort="quick", only=["proper"]).check("proper")
    assert check.verdict == "fail" and "distort" in check.hint
    for case in check.details["distortion"]:
        q, p = np.asarray(case["target"]), np.asarray(case["minimiser_predicts"])
        assert p.max() < q.max() and abs(p.sum() - 1) < 1e-9
