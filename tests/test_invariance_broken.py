"""Deliberately broken losses: each fails exactly the property check named beside it.

Every loss here is a small, plausible mistake in a softmax cross-entropy. Each is run through the
property checks that its declaration selects by default (plus ``proper`` where it is expected),
and must fail the named one and pass the others.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from lossguard import declare, run
from lossguard.checks import select_checks
from lossguard.evaluate import Evaluator

MINE = ("shift", "classes", "batch", "padding", "nonnegative", "deterministic", "proper")
IGNORE = -100


def battery(spec: Any, **kw: Any) -> dict[str, Any]:
    """Run the property checks ``spec`` selects by default; results by name."""
    on = [c.name for c, why in select_checks(spec) if why is None and c.name in MINE]
    result = run(spec, effort="quick", only=on, **kw)
    return {c.name: c for c in result.checks}


def _nll(z: jax.Array, y: jax.Array) -> jax.Array:
    return -jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1)[:, 0]


# ------------------------------------------------------------------------------ the broken losses


def mean_counts_ignored_rows(z, y):
    keep = y != IGNORE
    return jnp.where(keep, _nll(z, jnp.where(keep, y, 0)), 0.0).sum() / y.shape[0]  # bug: N, not kept


def smoothing_over_ignored_rows(z, y, eps=0.1):
    keep = y != IGNORE
    nll = jnp.where(keep, _nll(z, jnp.where(keep, y, 0)), 0.0)
    uniform = -jax.nn.log_softmax(z).mean(-1)  # bug: the uniform term is not masked
    return ((1 - eps) * nll + eps * uniform).sum() / keep.sum()


def make_cached_normaliser() -> Callable[..., Any]:
    cache: dict[str, int] = {}

    def cached_normaliser(z, y):
        cache.setdefault("n", z.shape[0])  # bug: the batch size of the first call is kept
        return _nll(z, y).sum() / cache["n"]

    return cached_normaliser


def smoothing_class_count_from_axis_0(z, y, eps=0.1):
    c = z.shape[0]  # bug: the class count read from the batch axis
    return ((1 - eps) * _nll(z, y) - eps / c * jax.nn.log_softmax(z).sum(-1)).mean()


def focal_after_the_mean(z, y, gamma=2.0):
    m = _nll(z, y).mean()
    return (1 - jnp.exp(-m)) ** gamma * m  # bug: the focal factor of the batch mean


def shift_by_batch_max(z, y):
    e = jnp.exp(z - z.max())  # bug: one max for the whole batch, not one per row
    return -jnp.log(jnp.take_along_axis(e, y[:, None], -1)[:, 0] / e.sum(-1)).mean()


def softmax_without_max(z, y):
    e = jnp.exp(z)  # bug: overflows for logits above ~709 (float64)
    return -jnp.log(jnp.take_along_axis(e, y[:, None], -1)[:, 0] / e.sum(-1)).mean()


def make_call_history() -> Callable[..., Any]:
    calls = [0]

    def call_history(z, y):
        calls[0] += 1
        per = _nll(z, y)
        return (per if calls[0] % 2 else per[::-1]).sum() / per.shape[0]  # bug: order alternates per call

    return call_history


def ce_minus_log_classes(z, y):
    return (_nll(z, y) - jnp.log(z.shape[-1])).mean()  # bug: "normalised" by log C, goes negative


def smoothing_to_class_zero(z, y, eps=0.1):
    return ((1 - eps) * _nll(z, y) - eps * jax.nn.log_softmax(z)[:, 0]).mean()  # bug: mass to class 0 only


def ce_with_temperature(z, y):
    return _nll(z / 2.0, y).mean()  # a temperature inside the loss: the minimiser is not the target


BROKEN = [
    ("padding", mean_counts_ignored_rows, dict(ignore_label=IGNORE)),
    ("padding", smoothing_over_ignored_rows, dict(ignore_label=IGNORE)),
    ("batch", make_cached_normaliser(), {}),
    ("batch", smoothing_class_count_from_axis_0, {}),
    ("batch", focal_after_the_mean, {}),
    ("batch", shift_by_batch_max, {}),
    ("shift", softmax_without_max, {}),
    ("deterministic", make_call_history(), {}),
    ("nonnegative", ce_minus_log_classes, {}),
    ("classes", smoothing_to_class_zero, {}),
    ("proper", ce_with_temperature, dict(expect=["proper"])),
]


_RESULTS: dict[str, dict[str, Any]] = {}


def broken_results(loss: Callable[..., Any], **kw: Any) -> dict[str, Any]:
    """The battery of one broken loss, run once per test session (several tests read it)."""
    if loss.__name__ not in _RESULTS:
        _RESULTS[loss.__name__] = battery(declare(loss, kind="categorical", **kw))
    return _RESULTS[loss.__name__]


@pytest.mark.parametrize("named, loss, kw", BROKEN, ids=[f"{n}-{f.__name__}" for n, f, _ in BROKEN])
def test_broken_loss_fails_only_the_named_check(named, loss, kw):
    results = broken_results(loss, **kw)
    assert results[named].verdict == "fail", results[named].summary
    others = {name: r.verdict for name, r in results.items() if name != named}
    assert set(others.values()) <= {"pass"}, {n: results[n].summary for n in others if others[n] != "pass"}
    failed = results[named]
    assert failed.hint and failed.worst and failed.failed > 0
    first = failed.worst[0]
    assert "(loss)(np.array(" in first.replay and "# expected" in first.replay  # JAX: 64-bit mode scoped
    if named != "proper":  # proper puts the minimiser's prediction second
        assert "Hypothesis search (seed" in first.note and f"only={[named]!r}" in first.note


def zloss(z, y):
    lse = jax.nn.logsumexp(z, -1)
    return (lse - jnp.take_along_axis(z, y[:, None], -1)[:, 0] + 1e-4 * lse**2).mean()


def test_zloss_fails_shift_and_says_why_then_passes_with_skip():
    spec = declare(zloss, kind="categorical")
    ev = Evaluator(spec)
    results = battery(spec, evaluator=ev)
    shift = results["shift"]
    assert shift.verdict == "fail"
    assert "z-loss" in shift.hint and "not shift invariant by design" in shift.hint
    assert all(r.verdict == "pass" for n, r in results.items() if n != "shift")
    results = battery(declare(zloss, kind="categorical", skip=["shift"]), evaluator=ev)
    assert "shift" not in results  # turned off: not selected at all
    assert all(r.verdict == "pass" for r in results.values()) and len(results) == 4


def test_minimal_counterexample_replays_and_is_small():
    """The shrunk case of a shift failure is the first menu shape with simple values, and its
    copy-pasteable replay reproduces the failure."""
    first = broken_results(softmax_without_max)["shift"].worst[0]
    z = np.asarray(first.predictions)
    assert z.shape == (8, 3) and len(np.unique(z)) <= 2  # zeros and perhaps one other value
    namespace = {"np": np, "jax": jax, "loss": softmax_without_max}
    exec(first.replay, namespace)  # noqa: S102 - the replay is plain Python: a = loss(...); b = loss(...)
    assert np.isfinite(float(namespace["a"]))
    assert not np.isfinite(float(namespace["b"]))  # e^(z + 1e3) overflows: the failure reproduces


def test_failure_is_reproducible_from_the_seed():
    spec = declare(smoothing_class_count_from_axis_0, kind="categorical")
    ev = Evaluator(spec)  # shared: the second run compiles nothing
    one, two = battery(spec, seed=3, evaluator=ev)["batch"], battery(spec, seed=3, evaluator=ev)["batch"]
    assert one.summary == two.summary and one.details["search"] == two.details["search"]
    assert np.array_equal(np.asarray(one.worst[0].predictions), np.asarray(two.worst[0].predictions))


def test_losses_that_break_an_assumption_by_design_fail_it_and_are_told_when_skipping_is_fine():
    """Class weights break class-permutation equivariance; a normaliser by the number of positives
    breaks batch additivity. Both are deliberate, so the hint says skipping is legitimate."""

    def weighted_ce(z, y, weight):
        w = jnp.asarray(weight)[y]
        return (w * _nll(z, y)).sum() / w.sum()

    weighted = declare(weighted_ce, kind="categorical", params={"weight": [1.0, 2.0, 4.0]}, expect=["classes"])
    check = run(weighted, effort="quick", only=["classes"]).check("classes")
    assert check.verdict == "fail" and "class-weighted" in check.hint.lower()

    def per_positive_bce(z, y):
        per = jnp.logaddexp(0.0, z) - y * z  # softplus(z) − y z = −[y log σ(z) + (1 − y) log(1 − σ(z))]
        return per.sum() / jnp.maximum(y.sum(), 1.0)

    check = run(declare(per_positive_bce, kind="binary"), effort="quick", only=["batch"]).check("batch")
    assert check.verdict == "fail" and "number of positives" in check.hint
