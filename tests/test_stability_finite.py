"""``finite``: each classic overflow, underflow and 0 · log 0 bug fails it, naming the input.

Scenario: a beekeeping cooperative trains classifiers on hive-sound clips: the hive's state
(categorical: calm, swarming, queenless, robbed), a varroa alarm per clip (binary) and the mix of
bee castes heard (distribution). Each loss below is one they wrote on the way to a stable one.
Most tests run the check in the one dtype that shows the bug (a dtype is a compilation); the
end-to-end tests run the battery's path in all four.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from lossguard import declare, run
from lossguard.checks import Context
from lossguard.checks.finite import check_finite
from lossguard.evaluate import Evaluator
from lossguard.examples.reef_survey import tile_loss
from lossguard.result import CheckResult


def finite_in(loss, dtypes: tuple[str, ...], **declared: object) -> CheckResult:  # noqa: ANN001
    spec = declare(loss, **declared)  # type: ignore[arg-type]
    return check_finite(Context(spec=spec, evaluator=Evaluator(spec), seed=0, effort="quick"), dtypes)


def assert_fails_at(result: CheckResult, what: str, where: str) -> None:
    """Failed, and the message names the broken quantity, the dtype and the input."""
    assert result.verdict == "fail", result.summary
    assert f"first: {what}" in result.summary and where in result.summary, result.summary
    first = result.worst[0]
    assert first.note in result.summary and first.replay.startswith("loss(np.array(")


# ------------------------------------------------------------------------- the broken losses


def hive_naive_softmax(z: jax.Array, y: jax.Array) -> jax.Array:
    e = jnp.exp(z)  # overflows at z ≈ 710 in float64, 89 in float32
    p = e / e.sum(-1, keepdims=True)
    return -jnp.mean(jnp.log(jnp.take_along_axis(p, y[:, None], -1)))


def hive_log_of_softmax(z: jax.Array, y: jax.Array) -> jax.Array:
    return -jnp.mean(jnp.log(jax.nn.softmax(z))[jnp.arange(z.shape[0]), y])  # log 0 once p underflows


def varroa_naive_bce(z: jax.Array, y: jax.Array) -> jax.Array:
    p = 1.0 / (1.0 + jnp.exp(-z))  # 1 − p rounds to 0 from z ≈ 37 in float64
    return -jnp.mean(y * jnp.log(p) + (1 - y) * jnp.log(1 - p))


def varroa_bce_on_probabilities(p: jax.Array, y: jax.Array) -> jax.Array:
    return -jnp.mean(y * jnp.log(p) + (1 - y) * jnp.log(1 - p))  # 0 · log 0 = nan at p = y


def varroa_clipped_bce(z: jax.Array, y: jax.Array) -> jax.Array:
    p = jnp.clip(jax.nn.sigmoid(z), 1e-7, 1 - 1e-7)  # 1 − 1e-7 is 1.0 in bfloat16
    return -jnp.mean(y * jnp.log(p) + (1 - y) * jnp.log(1 - p))


def varroa_focal_pow(z: jax.Array, y: jax.Array, gamma: float = 0.5, alpha: object = None) -> jax.Array:
    s = jnp.where(y == 1, z, -z)
    # d/dx x^0.5 = inf at x = 0: the chain rule meets inf · 0 once p_t rounds to 1
    return jnp.mean((1 - jax.nn.sigmoid(s)) ** gamma * -jax.nn.log_sigmoid(s))


def hive_confidence_penalty(z: jax.Array, y: jax.Array) -> jax.Array:
    """CE minus 0.1 × entropy of p: the penalty of Pereyra, Tucker, Chorowski, Kaiser, Hinton,
    "Regularizing Neural Networks by Penalizing Confident Output Distributions", ICLR 2017
    (workshop), with a where-guarded p log p whose discarded branch still differentiates log 0."""
    p = jax.nn.softmax(z)
    entropy = -jnp.sum(jnp.where(p > 0, p * jnp.log(p), 0.0), -1)
    ce = -jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1)[:, 0]
    return jnp.mean(ce - 0.1 * entropy)


def castes_naive_kl(z: jax.Array, t: jax.Array) -> jax.Array:
    return jnp.mean(jnp.sum(t * (jnp.log(t) - jax.nn.log_softmax(z)), -1))  # 0 · log 0 at zero targets


def castes_sum_then_divide(z: jax.Array, y: jax.Array) -> jax.Array:
    per = -jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1)[:, 0]
    return jnp.sum(per) / per.shape[0]  # the float16 sum overflows before the division


# ---------------------------------------------------------------------------------- failures


def test_naive_softmax_overflows() -> None:
    r = finite_in(hive_naive_softmax, ("float64",), kind="categorical", reference="categorical_ce")
    assert_fails_at(r, "value in float64", "ladder right |z|=1e+03")


def test_log_of_softmax_meets_log_zero() -> None:
    r = finite_in(hive_log_of_softmax, ("float64",), kind="categorical", reference="categorical_ce")
    assert_fails_at(r, "gradient in float64", "|z|=1e+03")


def test_naive_log_sigmoid_bce() -> None:
    r = finite_in(varroa_naive_bce, ("float64",), kind="binary", reference="bce")
    assert_fails_at(r, "value in float64", "|z|=90")


def test_bce_on_probabilities_without_a_guard() -> None:
    r = finite_in(varroa_bce_on_probabilities, ("float64",), kind="binary", inputs="probabilities",
                  reference="bce")
    assert_fails_at(r, "value in float64", "|z|=100")
    got = r.worst[0]
    assert np.any((np.asarray(got.predictions) == 0) | (np.asarray(got.predictions) == 1))


def test_fixed_clip_breaks_only_in_low_precision() -> None:
    r = finite_in(varroa_clipped_bce, ("float32", "bfloat16"), kind="binary", reference="bce")
    assert_fails_at(r, "value in bfloat16", "|z|=10")
    assert r.details["failed_per_dtype"]["float32"] == 0 < r.details["failed_per_dtype"]["bfloat16"]


def test_focal_with_a_power_of_one_minus_p() -> None:
    r = finite_in(varroa_focal_pow, ("float64",), kind="binary", reference="focal_binary",
                  params={"gamma": 0.5, "alpha": None})
    assert_fails_at(r, "gradient in float64", "ladder right |z|=90")


def test_where_guarded_p_log_p_without_a_reference() -> None:
    r = finite_in(hive_confidence_penalty, ("float64",), kind="categorical")
    assert_fails_at(r, "gradient in float64", "|z|=1e+03")
    assert "rule 4" in r.allowance  # no reference: float64 is judged under the stated assumption


def test_zero_log_zero_kl() -> None:
    r = finite_in(castes_naive_kl, ("float64",), kind="distribution", reference="kl_divergence")
    assert_fails_at(r, "value in float64", "ladder")
    t = np.asarray(r.worst[0].targets)
    assert (t == 0).any()  # the failing case has a class with no target mass


def test_sum_then_divide_overflows_float16_though_the_mean_fits() -> None:
    # 16 rows wrong by 1e4: the sum overflows float16 only past the default |z| ≤ 1e3, so the
    # whole format has to be declared for it to count as a failure ...
    r = finite_in(castes_sum_then_divide, ("float16",), kind="categorical", reference="categorical_ce",
                  max_logit="full")
    assert_fails_at(r, "value in float16", "ladder wrong |z|=1e+04")
    # ... and at the default range it passes, naming where it first broke as information
    info = finite_in(castes_sum_then_divide, ("float16",), kind="categorical", reference="categorical_ce")
    assert info.verdict == "pass", info.summary
    assert "finite up to |z| = 1e+03 in float16; beyond, first at |z| = 1e+04: value is inf" in info.summary


# ------------------------------------------------------------------- the oracle's four rules


def test_without_a_reference_the_limit_decides_the_endpoints() -> None:
    # rule 3: at p = 0 with target 0 the limit from inside is finite, so nan is a bug ...
    r = finite_in(varroa_bce_on_probabilities, ("float64",), kind="binary", inputs="probabilities")
    assert r.verdict == "fail" and "rule 3" in r.allowance

    # ... while a guarded BCE's inf at p = 0 with target 1 diverges in the limit: not a bug
    def guarded(p: jax.Array, y: jax.Array) -> jax.Array:
        safe_p, safe_q = jnp.where(y == 0, 1.0, p), jnp.where(y == 1, 0.0, p)  # double-where guards
        pos = jnp.where(y == 0, 0.0, y * jnp.log(safe_p))
        return -jnp.mean(pos + jnp.where(y == 1, 0.0, (1 - y) * jnp.log1p(-safe_q)))

    ok = finite_in(guarded, ("float64",), kind="binary", inputs="probabilities")
    assert ok.verdict == "pass", ok.summary
    assert ok.details["cases_where_true_value_not_representable"] > 0


def test_below_float64_the_loss_itself_in_float64_is_the_oracle() -> None:
    # rule 2: fine in float64 at |z| = 30, broken in float16 there: flagged without any reference
    r = finite_in(hive_naive_softmax, ("float16",), kind="categorical")
    assert_fails_at(r, "value in float16", "|z|=30")
    assert "rule 2" in r.allowance


def test_an_exact_overflow_is_not_a_bug() -> None:
    # wrong by 65504 in float16: the true loss 131008 exceeds float16, so inf is the right answer
    r = finite_in(tile_loss, ("float16",), kind="categorical", reference="categorical_ce", max_logit="full")
    assert r.verdict == "pass", r.summary
    assert r.details["cases_where_true_value_not_representable"] > 0


def test_no_oracle_is_reported_not_guessed() -> None:
    # no reference, and the loss's own float64 value is nan too: float16 has nothing to go by
    r = finite_in(hive_naive_softmax, ("float16", "float64"), kind="categorical")
    assert r.details["cases_without_oracle"] > 0
    assert "had no oracle" in r.summary


# --------------------------------------------------------------------------------- end to end


def test_battery_path_in_every_dtype() -> None:
    bad = run(declare(hive_log_of_softmax, kind="categorical", reference="categorical_ce"),
              effort="quick", only=["finite"]).check("finite")
    assert bad.verdict == "fail"
    assert set(bad.details["failed_per_dtype"]) == {"float16", "bfloat16", "float32", "float64"}
    assert all(n > 0 for n in bad.details["failed_per_dtype"].values())
    # the sound counterpart, in every dtype, is the registry's own twin: test_stability_registry.py
