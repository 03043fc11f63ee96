"""Every registry reference, as a loss (its JAX twin reduced by a mean), passes the four stability
checks in every dtype: the checks never flag a correct implementation.

Where a twin has a defect of its own, the pair is marked ``xfail(strict=True)`` with the input
that shows it: the check is right to fail there, and the mark turns into a failure (to remove)
the day the twin is fixed.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from lossguard import declare
from lossguard.checks import Context
from lossguard.checks.dtypes import check_dtypes
from lossguard.checks.finite import check_finite
from lossguard.checks.live_gradient import CHECK as LIVE
from lossguard.checks.masking import check_masking
from lossguard.evaluate import Evaluator
from lossguard.references import REFERENCES
from lossguard.result import CheckResult
from lossguard.tolerance import DTYPES

#: (reference, kind, inputs, params)
CONFIGS: dict[str, tuple[str, str, str, dict[str, Any]]] = {
    "bce": ("bce", "binary", "logits", {}),
    "categorical_ce": ("categorical_ce", "categorical", "logits", {}),
    "smoothed_ce": ("smoothed_ce", "categorical", "logits", {}),
    "focal_binary": ("focal_binary", "binary", "logits", {"gamma": 0.5}),
    "focal_multiclass": ("focal_multiclass", "categorical", "logits", {"gamma": 0.5}),
    "kl_divergence": ("kl_divergence", "distribution", "logits", {}),
    "bce/probabilities": ("bce", "binary", "probabilities", {}),
    "categorical_ce/distribution": ("categorical_ce", "distribution", "logits", {}),
    "categorical_ce/probabilities": ("categorical_ce", "categorical", "probabilities", {}),
    "categorical_ce/distribution/probabilities": ("categorical_ce", "distribution", "probabilities", {}),
}
#: one configuration per reference runs by default; the other input spaces are opt-in
DEFAULT = ("bce", "categorical_ce", "smoothed_ce", "focal_binary", "focal_multiclass", "kl_divergence")
CHECKS = ("finite", "masking", "dtypes", "live-gradient")

#: (configuration, check) → why the twin itself fails there
# Known defects of the registry's JAX twins, as (config, check) → reason; each entry is an
# xfail(strict=True), so a fix forces its removal. The four found by these checks (softplus's
# derivative at 0, log before gather on probabilities, an overflowing smoothing sum, a fully
# masked log(1 − p_y)) are fixed; the list is empty.
DEFECTS: dict[tuple[str, str], str] = {}


def twin_loss(name: str, inputs: str):  # noqa: ANN201
    twin = REFERENCES[name].jax_per_example

    def loss(z: jnp.ndarray, y: jnp.ndarray, **params: Any) -> jnp.ndarray:
        return jnp.mean(twin(z, y, inputs=inputs, **params))

    loss.__qualname__ = f"mean_of_{name}_twin"
    return loss


@lru_cache(maxsize=None)
def results(config: str) -> dict[str, CheckResult]:
    """All four checks on one evaluator (their compilations are shared), every dtype."""
    name, kind, inputs, params = CONFIGS[config]
    spec = declare(twin_loss(name, inputs), kind=kind, inputs=inputs, reference=name, params=params)
    ctx = Context(spec=spec, evaluator=Evaluator(spec), seed=0, effort="quick")
    out = {"finite": check_finite(ctx, DTYPES), "dtypes": check_dtypes(ctx, DTYPES)}
    if kind != "binary" and inputs == "logits":
        out["masking"] = check_masking(ctx, DTYPES)
    if inputs == "logits":
        out["live-gradient"] = LIVE.run(ctx)
    return out


def _params() -> list[Any]:
    out = []
    for config in CONFIGS:
        for check in CHECKS:
            marks = []
            if (config, check) in DEFECTS:
                marks.append(pytest.mark.xfail(strict=True, reason=DEFECTS[(config, check)]))
            if config not in DEFAULT:
                marks.append(pytest.mark.slow)
            out.append(pytest.param(config, check, marks=marks, id=f"{config}-{check}"))
    return out


@pytest.mark.parametrize(("config", "check"), _params())
def test_registry_twin_passes(config: str, check: str) -> None:
    found = results(config)
    if check not in found:
        pytest.skip(f"{check} does not apply to {CONFIGS[config][1]} {CONFIGS[config][2]}")
    r = found[check]
    assert r.verdict == "pass", f"{r.summary}\n{[(w.what, w.note) for w in r.worst]}"
    if check in ("finite", "dtypes"):
        assert r.cases > 0 and r.failed == 0


def test_ce_twin_on_probabilities_keeps_a_finite_gradient_where_an_unused_class_has_p_0() -> None:
    # ∂/∂p of −Σ_c y_c log p_c is −y_c/p_c, and 0 where y_c = 0 (common practice: 0 · log 0 = 0);
    # found by the dtypes check's ladder once its mixed rows underflowed a probability to 0
    loss = twin_loss("categorical_ce", "probabilities")
    p = jnp.array([[0.5, 0.5, 0.0], [0.25, 0.0, 0.75]])
    y = jnp.array([[1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    g = np.asarray(jax.grad(loss)(p, y))
    assert np.all(np.isfinite(g))
    # −y/p over a mean of 2, in float32: within a few units of float32 rounding (common practice)
    assert np.allclose(g, [[-1.0, 0.0, 0.0], [0.0, 0.0, -0.5 / 0.75]], rtol=4 * 2.0**-24, atol=0.0)
