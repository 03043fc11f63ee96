"""False alarms on correct losses, each seen failing before its fix, and the true finding beside it.

Scenario: a glacier-monitoring team classifies crevasse patches from radar tiles (categorical:
open, bridged, none), flags melt-water pixels (binary) and fits the mix of ice types seen in a
tile (distribution). Each correct loss below was told it was wrong; each test also keeps a
broken twin that must still fail, so no fix hides a real error.
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import optax

from lossguard import declare, run
from lossguard.cases import Cell
from lossguard.checks import Context
from lossguard.checks._compare import examples_from, mismatch
from lossguard.checks._extremes import extreme_stack
from lossguard.checks.dtypes import check_dtypes, common_stack
from lossguard.evaluate import Evaluator
from lossguard._formats import common_grid
from lossguard.cases import CaseStack


def context(loss, **declared) -> Context:  # noqa: ANN001
    spec = declare(loss, **declared)
    return Context(spec=spec, evaluator=Evaluator(spec), seed=0, effort="quick")


# ------------------------------------------------ 1. KL: the targets' own term cancels (optax)


def ice_mix_kl(z: jax.Array, y: jax.Array) -> jax.Array:
    # optax.kl_divergence(log_predictions, targets) per example: Σ y (log y − log q) (optax 0.2.8)
    return optax.kl_divergence(jax.nn.log_softmax(z), y)


def ice_mix_kl_float32_entropy(z: jax.Array, y: jax.Array) -> jax.Array:
    # broken: Σ y log y taken in float32 inside a float64 call (errors of 1e-7 on terms of log C)
    ent = jnp.sum(jax.scipy.special.xlogy(y.astype(jnp.float32), y.astype(jnp.float32)), -1).astype(z.dtype)
    return ent - jnp.sum(y * jax.nn.log_softmax(z), -1)


def test_optax_kl_passes_in_float64_with_the_entropy_term_in_its_allowance() -> None:
    # before: FAIL in float64 on 1 case (|z| ≤ 0.001, error over an allowance that left out Σ y log y)
    r = check_dtypes(context(ice_mix_kl, kind="distribution", reference="kl_divergence"), ("float64",), large=False)
    assert r.verdict == "pass", r.summary
    assert "T = max Σ|y log y|" in r.allowance


def test_kl_with_its_entropy_term_in_float32_still_fails_in_float64() -> None:
    r = check_dtypes(context(ice_mix_kl_float32_entropy, kind="distribution", reference="kl_divergence"),
                     ("float64",), large=False)
    assert r.verdict == "fail", r.summary
    assert r.worst[0].abs_err > r.worst[0].allowance


def test_a_worst_case_reports_the_numbers_of_one_element() -> None:
    # element 0 has the largest absolute error, element 1 the largest error over its allowance:
    # the line must print element 1's error, relative error and allowance together
    got = np.array([[10.0, 1.0 + 1e-3, 5.0]])
    expected = np.array([[11.0, 1.0, 5.0]])
    atol = np.array([[10.0, 1e-6, 1.0]])
    m = mismatch(got, expected, atol)
    stack = CaseStack(np.zeros((1, 3, 2)), np.zeros((1, 3), int), Cell(3, 2), ["made up"])
    e = examples_from(m, declare(lambda z, y: z.sum(), kind="categorical"), stack, "value")[0]
    assert math.isclose(e.abs_err, 1e-3, rel_tol=1e-9) and math.isclose(e.allowance, 1e-6)
    assert math.isclose(e.rel_err, 1e-3, rel_tol=1e-9)
    assert e.abs_err > e.allowance  # the printed numbers themselves show the failure


# -------------------------------------------- 2. simplex targets stay on the simplex when rounded


def ice_mix_ce(z: jax.Array, y: jax.Array) -> jax.Array:
    return -jnp.mean(jnp.sum(y * jax.nn.log_softmax(z), -1))


def _row_sums(y: np.ndarray) -> np.ndarray:
    return np.array([math.fsum(row) for row in np.asarray(y, np.float64).reshape(-1, y.shape[-1])])


def test_rounding_each_entry_leaves_the_simplex_and_the_stacks_do_not() -> None:
    ctx = context(ice_mix_ce, kind="distribution", reference="categorical_ce")
    cell = ctx.cells[-1]
    raw = ctx.random_cases(cell).targets
    # the old way (entry by entry) sends rows summing to 1.00098 or 0.99805: the bug it fixed
    assert np.abs(_row_sums(common_grid(raw, ["float16", "bfloat16"])) - 1.0).max() > 1e-4
    for stack, grids in ((common_stack(ctx, cell), ["float16", "bfloat16", "float32"]),
                         (extreme_stack(ctx, cell, "bfloat16"), ["bfloat16"]),
                         (extreme_stack(ctx, cell, "float16"), ["float16"])):
        y = stack.targets
        assert np.all(_row_sums(y) == 1.0)  # exactly, in exact arithmetic (math.fsum)
        for d in grids:
            assert np.array_equal(common_grid(y, [d]), y)  # and every entry on every grid
        assert np.all(y >= 0)


# ------------------------------------------ 3. a loss that computes in float32 inside (downcast)


def crevasse_ce_in_float32(z: jax.Array, y: jax.Array) -> jax.Array:
    # a float32 computation whatever comes in, handed back in the input's dtype
    logp = jax.nn.log_softmax(z.astype(jnp.float32))
    return -jnp.mean(jnp.take_along_axis(logp, y[:, None], -1)).astype(z.dtype)


def crevasse_ce_in_float32_wrong_grad(z: jax.Array, y: jax.Array) -> jax.Array:
    @jax.custom_vjp
    def f(z):
        return crevasse_ce_in_float32(z, y)

    def bwd(z, g):  # broken: the softmax minus one-hot without the 1/N of the mean
        p = jax.nn.softmax(z)
        return (g * (p - jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)),)

    f.defvjp(lambda z: (f(z), z), bwd)
    return f(z)


def test_a_float32_computation_is_judged_at_float32_and_named() -> None:
    # before: "gradient wrong on 132 of 218 cases" against float64's allowances
    r = run(declare(crevasse_ce_in_float32, kind="categorical"), effort="quick", only=["gradient"])
    assert r.check("gradient").verdict == "pass", r.check("gradient").summary
    assert any("given float64, computes in float32" in n for n in r.evaluation["notes"])
    assert r.evaluation["computed_in"]["float64"] == "float32"


def test_a_wrong_gradient_is_still_caught_in_a_float32_computation() -> None:
    r = run(declare(crevasse_ce_in_float32_wrong_grad, kind="categorical"), effort="quick", only=["gradient"])
    assert r.check("gradient").verdict == "fail", r.check("gradient").summary


def test_a_loss_computed_in_float64_is_not_taken_for_a_downcast() -> None:
    ev = Evaluator(declare(ice_mix_ce, kind="distribution"))
    assert ev.rounding_grid() is None and ev.computed_dtype("float64") == "float64"


# ----------------------------------------------- 4. an output whose rank follows the input's


def melt_bce_per_row(z: jax.Array, y: jax.Array) -> jax.Array:
    # per-row mean over the last axis: a scalar for (N,) predictions, (N,) for (N, D)
    ell = jax.nn.softplus(z) - z * y
    return ell.mean(axis=-1)


def test_a_rank_dependent_output_leaves_shapes_out_instead_of_erroring() -> None:
    # before: ERR ("please report it") in finite, gradient, batch and dtypes
    r = run(declare(melt_bce_per_row, kind="binary", reference="bce"), effort="quick")
    assert not [c.name for c in r.checks if c.verdict == "error"], [c.summary for c in r.checks]
    assert r.ok, [c.summary for c in r.checks if not c.ok]
    assert any("give an output of shape (8,)" in n for n in r.evaluation["notes"])


def test_the_shapes_kept_still_catch_a_broken_loss() -> None:
    def broken(z: jax.Array, y: jax.Array) -> jax.Array:  # log σ without stabilising: inf at |z| = 90
        ell = -(y * jnp.log(jax.nn.sigmoid(z)) + (1 - y) * jnp.log(1 - jax.nn.sigmoid(z)))
        return ell.mean(axis=-1)

    r = run(declare(broken, kind="binary", reference="bce"), effort="quick", only=["finite"])
    assert r.check("finite").verdict == "fail", r.check("finite").summary


# ----------------------------------------------------- 5. float32 subnormals flushed by XLA


def melt_bce_on_probabilities(p: jax.Array, y: jax.Array) -> jax.Array:
    # log terms guarded where p is exactly 0 or 1
    lp = jnp.log(jnp.where(p > 0, p, 1.0))
    lq = jnp.log1p(-jnp.where(p < 1, p, 0.0))
    return -jnp.mean(y * lp + (1 - y) * lq)


def test_float32_gradient_is_compared_at_the_flushed_input() -> None:
    # before: "float32 reverse mode vs float64 on 5" at p = σ(−90) = 8.2e-40, a float32 subnormal
    # that XLA on CPU flushes to 0 (float64 was evaluated at 8.2e-40)
    r = run(declare(melt_bce_on_probabilities, kind="binary", inputs="probabilities"), effort="quick",
            only=["gradient"])
    assert r.check("gradient").verdict == "pass", r.check("gradient").summary


def test_a_float32_error_is_still_caught_on_probabilities() -> None:
    def lossy(p: jax.Array, y: jax.Array) -> jax.Array:
        # broken: 1 − p rounded to bfloat16, so log(1 − p) is off by up to 2^-9 relative
        q = (1 - p).astype(jnp.bfloat16).astype(p.dtype)
        return -jnp.mean(y * jnp.log(p) + (1 - y) * jnp.log(q))

    r = run(declare(lossy, kind="binary", inputs="probabilities", reference="bce", dtypes="float32,float64"),
            effort="quick", only=["dtypes"])
    assert r.check("dtypes").verdict == "fail", r.check("dtypes").summary


# ------------------------------------- 6. a JAX loss hidden behind float(...): not traced, why


def crevasse_ce_as_python_float(z: np.ndarray, y: np.ndarray) -> float:
    logp = jax.nn.log_softmax(jnp.asarray(z))
    return float(-jnp.mean(jnp.take_along_axis(logp, jnp.asarray(y)[:, None], -1)))


def test_an_untraced_jax_loss_is_judged_at_the_precision_it_ran_in() -> None:
    # before: shift, classes and batch FAIL at 1.2e-7 against allowances of 3e-14
    r = run(declare(crevasse_ce_as_python_float, kind="categorical"), effort="quick",
            only=["shift", "classes", "batch"])
    assert r.ok, [c.summary for c in r.checks]
    notes = " ".join(r.evaluation["notes"])
    assert "not traced by JAX (" in notes and "Error" in notes
    assert "given float64, computes in float32" in notes
