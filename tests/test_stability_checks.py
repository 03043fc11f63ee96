"""``masking``, ``dtypes`` and ``live-gradient``: each fails on its bug and passes a sound loss.

Scenario: a seed bank sorts seed scans into species (categorical, with species ruled out per
scan masked to −inf), estimates a germination-stage mix (distribution) and flags damaged seeds
(binary); their training runs partly in float16 on an old accelerator.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from lossguard import declare, run
from lossguard.checks import Context
from lossguard.checks.dtypes import LARGE_BATCH, check_dtypes
from lossguard.checks.masking import check_masking
from lossguard.evaluate import Evaluator
from lossguard.examples.reef_survey import tile_loss
from lossguard.result import CheckResult
from lossguard.tolerance import unit_roundoff


def context(loss, **declared: object) -> Context:  # noqa: ANN001
    spec = declare(loss, **declared)  # type: ignore[arg-type]
    return Context(spec=spec, evaluator=Evaluator(spec), seed=0, effort="quick")


def only(loss, check: str, **declared: object) -> CheckResult:  # noqa: ANN001
    return run(declare(loss, **declared), effort="quick", only=[check]).check(check)  # type: ignore[arg-type]


# ------------------------------------------------------------------------------------ masking


def species_onehot_ce(z: jax.Array, y: jax.Array) -> jax.Array:
    onehot = jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)
    return -jnp.mean(jnp.sum(onehot * jax.nn.log_softmax(z), -1))  # 0 · (−inf) = nan at a masked class


def species_smoothed(z: jax.Array, y: jax.Array) -> jax.Array:
    c = z.shape[-1]
    t = 0.9 * jax.nn.one_hot(y, c, dtype=z.dtype) + 0.1 / c  # target mass on every class
    return -jnp.mean(jnp.sum(t * jax.nn.log_softmax(z), -1))


def test_onehot_times_log_softmax_breaks_on_a_masked_class() -> None:
    r = check_masking(context(species_onehot_ce, kind="categorical", reference="categorical_ce"), ("float32",))
    assert r.verdict == "fail", r.summary
    # jit may rewrite onehot · log p into a gather that hides the nan; the plain call shows it
    assert "first: value in float64 (plain call, no jit) [masked" in r.summary
    assert np.isneginf(np.asarray(r.worst[0].predictions)).any()


def test_the_limit_oracle_catches_it_without_a_reference() -> None:
    r = check_masking(context(species_onehot_ce, kind="categorical"), ("float32",))
    assert r.verdict == "fail" and "limit" in r.allowance, r.summary


def test_sound_loss_passes_and_a_fully_masked_row_is_only_reported() -> None:
    r = check_masking(context(tile_loss, kind="categorical", reference="categorical_ce"), ("float64",))
    assert r.verdict == "pass", r.summary
    assert "a fully masked row gives value nan" in r.summary and "reported, not failed" in r.summary
    assert r.details["fully_masked_row"]["value"] == "nan"


def test_target_mass_on_a_masked_class_is_not_judged() -> None:
    # label smoothing puts ε/C on every class: with a −inf logit the true loss is +inf
    r = check_masking(context(species_smoothed, kind="categorical"), ("float64",))
    assert r.verdict == "pass" and r.details["cases_not_judged"] > 0, r.summary


def test_a_closed_form_gradient_that_leaks_into_masked_classes() -> None:
    def softmax(z: np.ndarray) -> np.ndarray:
        e = np.exp(z - z.max(-1, keepdims=True))  # softmax(z) = softmax(z − max z)
        return e / e.sum(-1, keepdims=True)

    def loss(z: np.ndarray, y: np.ndarray) -> np.ndarray:
        if not isinstance(z, np.ndarray):
            raise TypeError("numpy only")  # keeps JAX from tracing it
        return -np.mean(np.log(np.clip(softmax(z), 1e-12, 1.0))[np.arange(len(y)), y])

    def grad(z: np.ndarray, y: np.ndarray) -> np.ndarray:
        p = np.clip(softmax(z), 1e-12, 1.0)  # the floor leaks 1e-12 into every masked class
        return (p - np.eye(z.shape[-1])[y]) / len(y)

    r = check_masking(context(loss, kind="categorical", reference="categorical_ce", grad=grad), ("float64",))
    assert r.verdict == "fail", r.summary
    assert "gradient at a masked class in float64" in r.summary


# ------------------------------------------------------------------------------------- dtypes


def species_sum_then_divide(z: jax.Array, y: jax.Array) -> jax.Array:
    per = -jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1)[:, 0]
    return jnp.sum(per) / per.shape[0]  # the float16 sum of 4096 losses ≈ 32 overflows 65504


def species_silent_downcast(z: jax.Array, y: jax.Array) -> jax.Array:
    low = jax.nn.log_softmax(z.astype(jnp.bfloat16))  # computed in bfloat16 whatever comes in
    return -jnp.mean(jnp.take_along_axis(low, y[:, None], -1)).astype(z.dtype)


def test_sum_then_divide_mean_overflows_in_the_large_float16_batch() -> None:
    r = check_dtypes(context(species_sum_then_divide, kind="categorical", reference="categorical_ce"),
                     (), large=True)  # the large batch alone (it runs in float16)
    assert r.verdict == "fail", r.summary
    assert "first: value in float16 [large batch" in r.summary
    assert r.details["failed_per_dtype"]["float16 large batch"] >= 1
    assert np.asarray(r.worst[0].predictions).shape[0] == LARGE_BATCH


def test_a_silent_downcast_is_beyond_float32s_error_model() -> None:
    r = check_dtypes(context(species_silent_downcast, kind="categorical", reference="categorical_ce"),
                     ("float32",), large=False)
    assert r.verdict == "fail", r.summary
    assert "float32" in r.summary and r.worst[0].abs_err > r.worst[0].allowance


def test_sound_loss_passes_the_large_float16_batch() -> None:
    # every dtype, for every registry twin: test_stability_registry.py
    r = check_dtypes(context(tile_loss, kind="categorical", reference="categorical_ce"), ())
    assert r.verdict == "pass", r.summary
    assert f"{LARGE_BATCH}-example batch in float16" in r.summary and r.cases == 2


# ------------------------------------------------------------------------------ live-gradient


def species_clipped_probabilities(z: jax.Array, y: jax.Array) -> jax.Array:
    p = jnp.clip(jax.nn.softmax(z), 1e-7, 1.0)  # below 1e-7 the clip's derivative is 0
    return -jnp.mean(jnp.log(jnp.take_along_axis(p, y[:, None], -1)))


def species_probabilities_as_logits(z: jax.Array, y: jax.Array) -> jax.Array:
    p = jax.nn.softmax(z)  # then treated as logits again: the Jacobian p(1 − p) kills the signal
    return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(p), y[:, None], -1))


def damaged_bce(z: jax.Array, y: jax.Array) -> jax.Array:
    return jnp.mean(jnp.maximum(z, 0) - z * y + jnp.log1p(jnp.exp(-jnp.abs(z))))  # stable BCE


def test_clipped_probabilities_stop_learning() -> None:
    r = only(species_clipped_probabilities, "live-gradient", kind="categorical")
    assert r.verdict == "fail", r.summary
    assert "at |z|=10 row" in r.summary and "gets 0 against" in r.summary
    assert r.worst[0].got == 0.0


def test_probabilities_fed_back_as_logits_stop_learning() -> None:
    r = only(species_probabilities_as_logits, "live-gradient", kind="categorical")
    assert r.verdict == "fail", r.summary
    assert r.details["smallest_ratio_per_magnitude"]["30"] < unit_roundoff("float32")


def test_sound_losses_keep_their_gradient() -> None:
    for loss, kind in ((tile_loss, "categorical"), (damaged_bce, "binary")):
        r = only(loss, "live-gradient", kind=kind)
        assert r.verdict == "pass", r.summary
        assert min(r.details["smallest_ratio_per_magnitude"].values()) > 0.5
