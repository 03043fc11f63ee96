"""Adapters, output detection, scoping, and a misbehaving loss never crashing the harness."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from lossguard import LossCallError, declare, run
from lossguard.cases import random_stack, shape_menu
from lossguard.evaluate import Evaluator


def ce(z, y):
    return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], axis=-1))


def ce_rows(z, y):
    return -jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], axis=-1)[:, 0]


def ce_branchy(z, y):
    # Python control flow on a shape is fine under jit; on values it is not (see below)
    return ce(z, y) if z.shape[0] > 1 else 0.0 * ce(z, y)


def ce_numpy(z, y):
    m = z.max(-1, keepdims=True)
    lse = np.log(np.exp(z - m).sum(-1)) + m[:, 0]  # logsumexp(z) = m + log Σ exp(z − m)
    return float(np.mean(lse - z[np.arange(len(y)), y]))


def ce_numpy_grad(z, y):
    e = np.exp(z - z.max(-1, keepdims=True))
    p = e / e.sum(-1, keepdims=True)
    p[np.arange(len(y)), y] -= 1.0  # ∂CE/∂z = softmax(z) − onehot(y)  (common practice)
    return p / len(y)


def ce_value_branch(z, y):
    if float(np.asarray(z).sum()) > 1e300:  # control flow on a value: not traceable
        return 0.0
    return ce_numpy(np.asarray(z, dtype=np.float64), np.asarray(y))


def stack_for(spec, k=5):
    return random_stack(spec, shape_menu(spec)[0], np.random.default_rng(3), k)


@pytest.mark.parametrize(
    "loss, adapter, output",
    [(ce, "jax", "scalar"), (ce_rows, "jax", "per_example"), (ce_numpy, "numpy", "scalar"),
     (ce_value_branch, "numpy", "scalar")],
)
def test_adapter_and_output_are_detected(loss, adapter, output):
    ev = Evaluator(declare(loss, kind="categorical"))
    assert ev.adapter.name == adapter and ev.output == output


def test_all_adapters_agree_on_values_and_padding_does_not_leak():
    spec = declare(ce, kind="categorical")
    stack = stack_for(spec, k=5)  # padded to the shape's call size (128 cases) inside the JAX adapter
    a = Evaluator(spec).values(stack)
    b = Evaluator(declare(ce_numpy, kind="categorical")).values(stack)
    np.testing.assert_allclose(a, b, rtol=1e-13)  # same formula, float64 both: a few ulp apart
    assert a.shape == (5,)


def test_declared_grad_is_the_numpy_gradient_oracle():
    spec = declare(ce_numpy, kind="categorical", grad=ce_numpy_grad)
    stack = stack_for(spec)
    ev = Evaluator(spec)
    g_np = ev.grads(stack)
    g_jax = Evaluator(declare(ce, kind="categorical")).grads(stack)
    np.testing.assert_allclose(g_np, g_jax, atol=1e-15)


def test_computed_dtype_reads_a_downcasting_loss():
    def ce32(z, y):
        return ce(z.astype(jnp.float32), y)

    ev = Evaluator(declare(ce32, kind="categorical"))
    spec = declare(ce, kind="categorical")
    ev.values(stack_for(spec), "float64")
    assert ev.computed_dtype("float64") == "float32"


def test_wrong_output_shape_is_one_line():
    with pytest.raises(LossCallError) as info:
        Evaluator(declare(lambda z, y: z, kind="categorical"))
    assert "expected a scalar or one value per example" in str(info.value)


def test_a_loss_that_raises_mid_battery_gives_an_error_verdict_not_a_traceback():
    def flaky(z, y):
        z = np.asarray(z, dtype=np.float64)
        if np.max(np.abs(z)) > 50:  # fine on the probe's small logits, raises on the ladder
            raise RuntimeError("sensor cable unplugged")
        return ce_numpy(z, np.asarray(y))

    result = run(declare(flaky, kind="categorical"), effort="quick", only=["finite"])
    finite = result.check("finite")
    assert finite.verdict == "error" and "sensor cable unplugged" in finite.summary
    assert "\n" not in finite.summary
    assert result.exit_code == 1


def test_run_leaves_global_state_alone():
    x64_before = jax.config.jax_enable_x64
    err_before = np.geterr()
    run(declare(ce, kind="categorical", reference="categorical_ce"), effort="quick", only=["reference", "finite"])
    assert jax.config.jax_enable_x64 == x64_before
    assert np.geterr() == err_before
