"""The ``gradient`` check: broken gradients fail with a clear message, correct ones pass.

The broken losses are the mistakes people make when they write a gradient by hand: a flipped
sign, a missing 1/N, a backward pass that ignores its incoming cotangent, a stop_gradient on the
softmax normaliser, branches whose derivatives disagree exactly at 0. Each correct twin passes.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from lossguard import declare, run
from lossguard.evaluate import Evaluator


def _ce_rows(z, y):
    # −log softmax(z)_y per row; log_softmax subtracts the max (logsumexp(z) = m + logsumexp(z − m))
    return -jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], axis=-1)[:, 0]


def _ce_grad(z, y):
    # ∂ mean CE / ∂z = (softmax(z) − onehot(y)) / N  (common practice)
    return (jax.nn.softmax(z) - jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)) / z.shape[0]


def _custom_ce(scale_grad=1.0, use_cotangent=True, divide_by_n=True, normaliser=True):
    """Mean CE with a hand-written backward pass, optionally broken."""

    @jax.custom_vjp
    def f(z, y):
        return jnp.mean(_ce_rows(z, y))

    def fwd(z, y):
        return f(z, y), (z, y)

    def bwd(res, cot):
        z, y = res
        g = _ce_grad(z, y) * (1.0 if divide_by_n else z.shape[0]) * scale_grad
        if not normaliser:  # the log-sum-exp treated as a constant: only −onehot(y)/N is left
            g = -jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype) / z.shape[0]
        return (g * cot if use_cotangent else g), None

    f.defvjp(fwd, bwd)
    return lambda z, y: f(z, y)


_EVALUATORS: dict = {}


def _gradient(loss, kind="categorical", seed=0, evaluator=None, **kw):
    """The gradient check alone, quick effort; evaluators (and their compilations) are reused."""
    spec = declare(loss, kind=kind, **kw)
    key = (loss, kind, repr(sorted(kw.items())))
    if evaluator is None:
        evaluator = _EVALUATORS.get(key) or _EVALUATORS.setdefault(key, Evaluator(spec))
    return run(spec, seed=seed, effort="quick", only=["gradient"], evaluator=evaluator).check("gradient")


def test_correct_custom_vjp_passes_and_reports_its_oracles():
    c = _gradient(_custom_ce())
    assert c.verdict == "pass", c.summary
    assert "reverse mode" in c.details["oracles"]
    # custom_vjp has no forward mode; that is reported, not a failure
    assert any("forward mode unavailable" in n for n in c.details["notes"])
    assert c.details["median_taylor_order"] > 1.8  # 2 for a correct gradient, 1 for a wrong one
    assert "Richardson" in c.allowance and "γ_n" in c.allowance


@pytest.mark.parametrize("broken", [
    dict(scale_grad=-1.0),          # flipped sign
    dict(divide_by_n=False),        # missing 1/N
    dict(use_cotangent=False),      # ignores the incoming cotangent
    dict(normaliser=False),         # stop-gradient on the normaliser
])
def test_broken_custom_vjp_fails_with_worst_point_and_taylor_order(broken):
    c = _gradient(_custom_ce(**broken))
    assert c.verdict == "fail"
    assert "reverse mode vs finite differences" in c.summary
    worst = c.worst[0]
    assert worst.abs_err > worst.allowance and "direction" in worst.what
    assert "Taylor remainder order" in worst.note
    assert "custom_vjp" in c.hint
    if not broken.get("use_cotangent", True):
        assert "ignores its incoming cotangent" in c.summary
    else:  # a wrong slope leaves a first-order Taylor remainder
        assert "order 1." in worst.note or "order 0.9" in worst.note


def test_stop_gradient_on_the_normaliser_fails():
    def loss(z, y):
        lse = jax.lax.stop_gradient(jax.nn.logsumexp(z, axis=-1))  # the bug: the normaliser is constant
        return jnp.mean(lse - jnp.take_along_axis(z, y[:, None], axis=-1)[:, 0])

    c = _gradient(loss)
    assert c.verdict == "fail" and "vs finite differences" in c.summary


def _bce_where(z, y):
    # max(z, 0) − z y + log1p(e^(−|z|)), with max and |z| written as where(): at z = 0 exactly the
    # two branches disagree (max picks the 0 side, |z| the z side), so autodiff is off by 1/2
    relu = jnp.where(z > 0, z, 0.0)
    absz = jnp.where(z >= 0, z, -z)
    return jnp.mean(relu - z * y + jnp.log1p(jnp.exp(-absz)))


def _bce_right(z, y):
    return jnp.mean(jnp.logaddexp(z, 0.0) - z * y)  # softplus(z) − z y = BCE in logits (common practice)


def test_where_written_branches_fail_exactly_at_zero_not_as_a_kink():
    c = _gradient(_bce_where, kind="binary")
    assert c.verdict == "fail"
    assert any("special" in e.note or "|z|=0" in e.note for e in c.worst)
    assert c.details["kinks"] == 0  # the function is smooth: both one-sided differences agree
    assert _gradient(_bce_right, kind="binary").verdict == "pass"


def test_kinks_are_judged_by_one_sided_derivatives():
    def relu_loss(z, y):  # a real kink at z = 0; jnp.maximum's derivative there lies between the sides
        return jnp.mean(jnp.maximum(z, 0.0) - z * y)

    def nan_at_kink(z, y):  # |z| as sqrt(z²): derivative 0/0 = nan at the kink
        return jnp.mean(jnp.sqrt(z * z) - z * y)

    good = _gradient(relu_loss, kind="binary")
    assert good.verdict == "pass", good.summary
    assert good.details["kinks"] > 0
    bad = _gradient(nan_at_kink, kind="binary")
    assert bad.verdict == "fail" and bad.details["kinks"] > 0


def _per_example(mode):
    @jax.custom_vjp
    def f(z, y):
        return _ce_rows(z, y)

    def fwd(z, y):
        return f(z, y), (z, y)

    def bwd(res, cot):
        z, y = res
        g = _ce_grad(z, y) * z.shape[0]  # per-row gradient of each example's own loss
        if mode == "right":
            return g * cot[:, None], None
        if mode == "ignored":
            return g, None
        return g * cot[::-1, None], None  # cotangent applied to the wrong rows

    f.defvjp(fwd, bwd)
    return lambda z, y: f(z, y)


@pytest.mark.parametrize("mode, verdict", [("right", "pass"), ("ignored", "fail"), ("reversed", "fail")])
def test_per_example_vjp_with_random_cotangents(mode, verdict):
    c = _gradient(_per_example(mode))
    assert c.verdict == verdict, c.summary
    if mode == "ignored":
        assert "ignores its incoming cotangent" in c.summary


def test_example_rows_must_not_leak():
    def mixing(z, y):  # each example's loss also depends on the batch mean of the logits
        return _ce_rows(z, y) + 0.1 * jnp.mean(z)

    c = _gradient(mixing)
    assert c.verdict == "fail" and "other rows" in c.summary
    assert "other rows" in c.hint


def _np_ce(z, y):
    m = z.max(-1, keepdims=True)
    lse = np.log(np.exp(z - m).sum(-1)) + m[:, 0]  # logsumexp(z) = m + log Σ exp(z − m)
    return np.mean(lse - z[np.arange(len(y)), y])


def _np_ce_grad(z, y, n_factor=1.0):
    e = np.exp(z - z.max(-1, keepdims=True))
    p = e / e.sum(-1, keepdims=True)
    p[np.arange(len(y)), y] -= 1.0  # softmax − onehot (common practice)
    return p / len(y) * n_factor


def test_numpy_loss_declared_grad_is_checked_by_finite_differences():
    good = _gradient(_np_ce, grad=_np_ce_grad)
    assert good.verdict == "pass", good.summary
    assert good.details["oracles"] == ["declared grad"]
    bad = _gradient(_np_ce, grad=lambda z, y: _np_ce_grad(z, y, len(y)))  # missing 1/N
    assert bad.verdict == "fail" and "declared grad vs finite differences" in bad.summary


def test_no_gradient_oracle_is_a_skip_with_the_reason():
    c = _gradient(_np_ce)
    assert c.verdict == "skip" and "no gradient oracle" in c.summary


def _ce_rows_mean(z, y):
    return jnp.mean(_ce_rows(z, y))


def _shared_ce_evaluator() -> Evaluator:
    """One evaluator for _ce_rows_mean, with a (wrong) declared grad that only specs naming it use:
    the check reads ``grad`` from the spec it is given, so the compilations can be shared."""
    key = "shared _ce_rows_mean"
    if key not in _EVALUATORS:
        _EVALUATORS[key] = Evaluator(declare(_ce_rows_mean, kind="categorical", grad=_flipped_grad))
    return _EVALUATORS[key]


def _flipped_grad(z, y):
    return -_np_ce_grad(np.asarray(z), np.asarray(y))


def test_jax_loss_with_a_wrong_declared_grad():
    c = _gradient(_ce_rows_mean, grad=_flipped_grad, evaluator=_shared_ce_evaluator())
    assert c.verdict == "fail" and "declared grad vs finite differences" in c.summary
    assert "reverse mode vs" not in c.summary


def test_registry_gradient_is_an_oracle():
    def smoothed(z, y, epsilon=0.1):  # label smoothing, declared first as plain cross-entropy
        ls = jax.nn.log_softmax(z)
        return jnp.mean(-(1 - epsilon) * jnp.take_along_axis(ls, y[:, None], -1)[:, 0] - epsilon * ls.mean(-1))

    c = _gradient(smoothed, reference="categorical_ce")
    assert c.verdict == "fail" and "registry closed form" in c.summary
    assert "vs finite differences" not in c.summary  # autodiff itself is right
    # (the registry oracle passing on a correct loss: test_correct_losses_pass_on_other_seeds)


def test_forward_and_reverse_mode_must_agree(monkeypatch):
    ev = _shared_ce_evaluator()
    good = _gradient(_ce_rows_mean, evaluator=ev)
    assert good.verdict == "pass" and "forward mode" in good.details["oracles"]
    jvp = ev.jvp

    def off(stack, directions, dtype="float64"):  # forward mode off by 1e-6 relative (a framework fault)
        vals, t = jvp(stack, directions, dtype)
        return vals, t * (1.0 + 1e-6)

    monkeypatch.setattr(ev, "jvp", off)
    bad = _gradient(_ce_rows_mean, evaluator=ev)
    assert bad.verdict == "fail" and "forward mode vs reverse mode" in bad.summary
    assert "finite differences side with reverse mode" in bad.worst[0].note


def test_float32_only_gradient_fault():
    @jax.custom_vjp
    def f(z, y):
        return jnp.mean(_ce_rows(z, y))

    def bwd(res, cot):
        z, y = res
        lse = jax.nn.logsumexp(z, axis=-1, keepdims=True)
        if z.dtype == jnp.float32:  # a half-precision normaliser in the float32 backward pass
            lse = lse.astype(jnp.float16).astype(z.dtype)
        p = jnp.exp(z - lse)
        return cot * (p - jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)) / z.shape[0], None

    f.defvjp(lambda z, y: (f(z, y), (z, y)), bwd)
    c = _gradient(lambda z, y: f(z, y))
    assert c.verdict == "fail" and "float32 reverse mode vs float64" in c.summary
    assert "vs finite differences" not in c.summary


def _ce_p(p, y):
    return -jnp.mean(jnp.log(jnp.take_along_axis(p, y[:, None], -1)))


@pytest.mark.parametrize("loss, kw", [
    (_bce_right, dict(kind="binary")),
    (_ce_p, dict(kind="categorical", inputs="probabilities", reference="categorical_ce")),
    (_ce_rows_mean, dict(kind="categorical", reference="categorical_ce")),
])
def test_correct_losses_pass_on_other_seeds(loss, kw):
    ev = _shared_ce_evaluator() if loss is _ce_rows_mean else None
    for seed in (1, 2, 3):
        res = _gradient(loss, seed=seed, evaluator=ev, **kw)
        assert res.verdict == "pass", (seed, res.summary)
    assert "reference" not in kw or any("registry" in o for o in res.details["oracles"])
