"""The opt-in ``second-order`` check: Hessian-vector products and convexity."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from lossguard import declare, run
from lossguard.checks import select_checks


def _ce(z, y):
    return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], axis=-1))


def _second(loss, **kw):
    return run(declare(loss, kind="categorical", **kw), effort="quick", only=["second-order"]).check("second-order")


def _stopped_backward():
    @jax.custom_vjp
    def f(z, y):
        return _ce(z, y)

    def bwd(res, cot):
        z, y = res
        p = jax.lax.stop_gradient(jax.nn.softmax(z))  # right value, but its derivative is lost
        return cot * (p - jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)) / z.shape[0], None

    f.defvjp(lambda z, y: (f(z, y), (z, y)), bwd)
    return lambda z, y: f(z, y)


def test_correct_loss_passes_and_a_convex_reference_shows_no_negative_curvature():
    c = _second(_ce, reference="categorical_ce")
    assert c.verdict == "pass", c.summary
    assert c.details["convexity_checked"] and "curvature vᵀHv ≥ 0" in c.summary
    assert "Richardson" in c.allowance


def test_it_is_opt_in():
    battery = dict((chk.name, why) for chk, why in select_checks(declare(_ce, kind="categorical")))
    assert "optional" in battery["second-order"]
    spec = declare(_ce, kind="categorical", expect=["second-order"])
    assert dict((chk.name, why) for chk, why in select_checks(spec))["second-order"] is None


def test_a_backward_pass_right_in_value_but_not_differentiable_fails():
    c = _second(_stopped_backward())
    assert c.verdict == "fail" and "H v differs from finite differences" in c.summary
    assert "not differentiable" in c.hint
    assert c.worst[0].abs_err > c.worst[0].allowance


def test_a_non_convex_loss_declared_as_a_convex_reference_fails():
    def brier(z, y):  # squared error of the probabilities: not convex in the logits
        p = jax.nn.softmax(z)
        return jnp.mean(jnp.sum((p - jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)) ** 2, axis=-1))

    c = _second(brier, reference="categorical_ce")
    assert c.verdict == "fail" and "negative curvature" in c.summary
    assert "H v differs" not in c.summary  # its second derivatives themselves are right
    assert c.details["min_curvature"] < 0


def test_numpy_loss_is_skipped_with_the_reason():
    def np_ce(z, y):
        z = np.asarray(z)
        if float(z.sum()) > 1e300:  # control flow on a value: not traceable by JAX
            return 0.0
        m = z.max(-1, keepdims=True)
        return float(np.mean(np.log(np.exp(z - m).sum(-1)) + m[:, 0] - z[np.arange(len(y)), y]))

    c = _second(np_ce)
    assert c.verdict == "skip" and "JAX-traceable" in c.summary


def test_evaluator_hvp_matches_the_closed_form_softmax_hessian():
    from lossguard.cases import random_stack, shape_menu
    from lossguard.evaluate import Evaluator
    from lossguard.references import softmax_ce_hessian
    from lossguard.tolerance import gamma, op_count

    spec = declare(_ce, kind="categorical")
    stack = random_stack(spec, shape_menu(spec, "quick")[0], np.random.default_rng(5), 3)
    v = np.random.default_rng(6).standard_normal(stack.predictions.shape)
    g, hv = Evaluator(spec).hvp(stack, v, "float64", cotangent=np.full(3, 2.0))
    n = stack.predictions.shape[1]
    for k in range(3):  # H of mean CE is block diagonal: (diag(p) − p pᵀ)/N per row, times the cotangent 2
        want = np.stack([softmax_ce_hessian(stack.predictions[k, i]) @ v[k, i] for i in range(n)]) * 2.0 / n
        # both sides round about n = 16 + 2C + N operations: normwise bound 2 γ_n (1 + max|z|) ‖Hv‖∞
        tol = 2 * gamma(op_count(n, want.shape[1]), "float64") * (1 + np.abs(stack.predictions[k]).max())
        assert np.max(np.abs(hv[k] - want)) <= tol * np.abs(want).max()
    assert g.shape == stack.predictions.shape


def test_large_cases_are_judged_one_at_a_time_with_the_same_findings(monkeypatch):
    # at large shapes the point gradients of a whole stack are (K, D, 2, J, *S): 2.3 GB at
    # (4096, 1000) logits (measured: the check then peaked at 20 GB); there each case is judged
    # alone, from the same draws, and must find what the whole stack finds
    import lossguard.checks.second_order as so

    sizes: list[int] = []
    judge = so._judge
    monkeypatch.setattr(so, "_judge", lambda ctx, stack, *a: (sizes.append(len(stack)), judge(ctx, stack, *a))[1])
    for loss, kw, verdict in ((_stopped_backward(), {}, "fail"), (_ce, {"reference": "categorical_ce"}, "pass")):
        sizes.clear()
        whole = _second(loss, **kw)
        assert max(sizes) > 1
        sizes.clear()
        monkeypatch.setattr(so, "large_case", lambda elements: True)
        alone = _second(loss, **kw)
        monkeypatch.setattr(so, "large_case", lambda elements: False)
        assert set(sizes) == {1}
        assert alone.verdict == whole.verdict == verdict
        assert (alone.summary, alone.cases, alone.failed) == (whole.summary, whole.cases, whole.failed)


def test_blocks_of_the_tables_change_nothing(monkeypatch):
    # the Richardson tables are built in blocks of elements (cache-sized at large shapes); every
    # step is element by element, so the findings and the worst examples must not depend on it
    import lossguard.checks.second_order as so

    found = []
    for block in (7, 1 << 30):  # 7 splits a (16, 10) case's 160 elements unevenly
        monkeypatch.setattr(so, "BLOCK", block)
        c = _second(_stopped_backward())
        found.append((c.verdict, c.summary, c.failed, [(e.what, e.got, e.expected, e.allowance) for e in c.worst]))
    assert found[0][0] == "fail" and found[0] == found[1]
