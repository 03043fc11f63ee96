"""How many functions a battery compiles: one per (dtype, shape), shared by every check.

Each test fails if the economy it guards is undone: a stack size that compiles anew, a value
function compiled beside the value-and-gradient one, lower precisions at every shape, plain
calls at several shapes or dtypes, a background compilation that the real call repeats.
"""

from __future__ import annotations

import jax
import jax.monitoring
import jax.numpy as jnp
import numpy as np
import pytest

from lossguard import declare, run
from lossguard.adapters import jax_loss
from lossguard.cases import Cell, random_stack, shape_menu
from lossguard.checks import Context
from lossguard.checks._base import EAGER_DTYPE
from lossguard.evaluate import Evaluator


def ce(z, y):
    return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], axis=-1))


def counts_positive(z, y):
    # computed on the host: values exist, gradients do not (a pure callback has no derivative);
    # an integer output, which also has none, is refused at the probe (tests/test_hostile.py)
    return jax.pure_callback(lambda a: np.asarray(np.sum(a > 0), dtype=a.dtype), jax.ShapeDtypeStruct((), z.dtype),
                             z, vmap_method="sequential")


class Compiles:
    """Counts XLA backend compilations while active (jax.monitoring duration events)."""

    _live: list[Compiles] = []
    _installed = False

    def __init__(self) -> None:
        self.n = 0

    @classmethod
    def _listen(cls, name: str, seconds: float, **_: object) -> None:
        if name.endswith("backend_compile_duration"):
            for c in cls._live:
                c.n += 1

    def __enter__(self) -> Compiles:
        if not Compiles._installed:
            jax.monitoring.register_event_duration_secs_listener(Compiles._listen)
            Compiles._installed = True
        Compiles._live.append(self)
        return self

    def __exit__(self, *exc: object) -> None:
        Compiles._live.remove(self)


def _record_runs(monkeypatch: pytest.MonkeyPatch) -> list[tuple[str, str, tuple[int, ...]]]:
    seen: list[tuple[str, str, tuple[int, ...]]] = []
    original = jax_loss.JaxAdapter._run

    def recording(self, op, arrays, dtype, float_mask, **kw):  # type: ignore[no-untyped-def]
        seen.append((op, dtype, tuple(arrays[0].shape[1:])))
        return original(self, op, arrays, dtype, float_mask, **kw)

    monkeypatch.setattr(jax_loss.JaxAdapter, "_run", recording)
    return seen


def test_any_number_of_cases_compiles_once_per_dtype_and_shape():
    spec = declare(ce, kind="categorical")
    ev = Evaluator(spec)
    cell = Cell(6, 5)
    rng = np.random.default_rng(3)
    with Compiles() as c:
        for k in (1, 5, 128, 300):  # shorter than one call, exactly one, several calls
            stack = random_stack(spec, cell, rng, k)
            v, g = ev.value_and_grad(stack, "float32")
            assert v.shape == (k,) and g.shape == (k, 6, 5)
            assert np.array_equal(ev.values(stack, "float32"), v)  # values come from the same function
    assert c.n == 1


def test_values_fall_back_to_a_plain_function_when_there_is_no_gradient():
    spec = declare(counts_positive, kind="categorical")
    ev = Evaluator(spec)
    stack = random_stack(spec, Cell(4, 3), np.random.default_rng(0), 7)
    got = ev.values(stack, "float64")
    want = np.sum(stack.predictions > 0, axis=(1, 2))
    assert np.array_equal(got, want)
    assert ev.calls == 7  # the failed attempt through the gradient is not counted


def test_planned_functions_compile_in_the_background_and_are_reused():
    spec = declare(ce, kind="categorical")
    ev = Evaluator(spec)
    cell = Cell(7, 4)
    stack = random_stack(spec, cell, np.random.default_rng(1), 9)
    ev.prepare([("vg", "bfloat16", cell), ("jvp", "float64", cell)])
    for fut in list(ev.adapter._pending.values()):
        fut.result()
    with Compiles() as c:
        ev.value_and_grad(stack, "bfloat16")
        ev.jvp(stack, np.ones_like(stack.predictions), "float64")
    assert c.n == 0


def test_a_plan_that_cannot_compile_leaves_the_error_to_the_real_call():
    def broken_in_low_precision(z, y):
        if z.dtype == jnp.float16:
            raise ValueError("no float16 here")
        return ce(z, y)

    spec = declare(broken_in_low_precision, kind="categorical")
    ev = Evaluator(spec)
    cell = Cell(3, 3)
    ev.prepare([("vg", "float16", cell)])  # must not raise
    with pytest.raises(Exception, match="no float16 here"):
        ev.value_and_grad(random_stack(spec, cell, np.random.default_rng(0), 2), "float16")


def test_battery_uses_one_function_per_dtype_and_shape(monkeypatch):
    seen = _record_runs(monkeypatch)
    spec = declare(ce, kind="categorical", reference="categorical_ce")
    result = run(spec, seed=4)
    assert result.ok, result
    cells = [c.pred_shape() for c in shape_menu(spec)]
    low = {(op, d, s) for op, d, s in seen if d != "float64"}
    # below float64 only the last menu shape, plus the dtypes check's one long float16 batch
    long = {(op, d, s) for op, d, s in low if s[0] == 4096}
    assert len(long) == 1 and {d for _, d, _ in long} == {"float16"}, long
    assert {s for _, _, s in low - long} == {cells[-1]}, low
    assert {op for op, _, _ in seen} <= {"vg", "jvp"}  # no separate value function
    assert {s for op, _, s in seen if op == "jvp"} == {cells[-1]}  # forward mode at one shape


def test_plain_calls_share_one_shape_and_dtype(monkeypatch):
    seen: list[tuple[tuple[int, ...], str]] = []
    original = jax_loss.JaxAdapter._eager_values

    def recording(self, z, y, dtype):  # type: ignore[no-untyped-def]
        seen.append((tuple(z.shape[1:]), dtype))
        return original(self, z, y, dtype)

    monkeypatch.setattr(jax_loss.JaxAdapter, "_eager_values", recording)
    spec = declare(ce, kind="categorical", reference="categorical_ce")
    run(spec, only=["masking", "deterministic"])
    ctx = Context(spec=spec, evaluator=Evaluator(spec))
    assert seen and set(seen) == {(ctx.eager_cell.pred_shape(), EAGER_DTYPE)}


def test_cells_for_keeps_float64_everywhere_and_lower_precisions_at_one_shape():
    spec = declare(ce, kind="categorical")
    ev = Evaluator(spec)
    default = Context(spec=spec, evaluator=ev)
    thorough = Context(spec=spec, evaluator=ev, effort="thorough")
    assert default.cells_for("float64") == default.cells
    assert default.cells_for("float16") == default.cells[-1:]
    assert thorough.cells_for("bfloat16") == thorough.cells


def test_background_threads_step_aside_when_xdist_has_a_worker_per_core(monkeypatch):
    monkeypatch.setattr(jax_loss.os, "sched_getaffinity", lambda pid: {0, 1}, raising=False)
    monkeypatch.delenv("PYTEST_XDIST_WORKER_COUNT", raising=False)
    assert jax_loss.compile_threads() == jax_loss.COMPILE_THREADS
    monkeypatch.setenv("PYTEST_XDIST_WORKER_COUNT", "1")
    assert jax_loss.compile_threads() == jax_loss.COMPILE_THREADS
    monkeypatch.setenv("PYTEST_XDIST_WORKER_COUNT", "2")
    assert jax_loss.compile_threads() == 1


def test_planned_compilations_nobody_asked_for_are_dropped_when_the_battery_ends():
    spec = declare(ce, kind="categorical")
    ev = Evaluator(spec)
    cells = [Cell(n, 5) for n in range(2, 12)]
    ev.prepare([("vg", "float32", c) for c in cells])  # ten compilations, two threads
    ev.settle()
    assert not ev.adapter._pending
    # the ones that never started can be planned again by a later battery on this evaluator
    assert len(ev.adapter._prepared) < len(cells)


def ce_host_count(z, y):
    # a host callback with no vmap rule: JAX can jit it but not vmap it
    n = jax.pure_callback(lambda a: np.float32(a.shape[0]), jax.ShapeDtypeStruct((), jnp.float32), y)
    return ce(z, y) * (n / n).astype(z.dtype)


def test_a_loss_that_cannot_be_vmapped_gives_the_same_numbers_one_case_at_a_time():
    looped = Evaluator(declare(ce_host_count, kind="categorical"))
    assert looped.adapter.name == "jax (one case at a time)"
    spec = declare(ce, kind="categorical")
    stack = random_stack(spec, Cell(5, 4), np.random.default_rng(2), 3)
    v1, g1 = looped.value_and_grad(stack, "float64")
    v2, g2 = Evaluator(spec).value_and_grad(stack, "float64")
    assert v1.shape == (3,) and g1.shape == (3, 5, 4)
    np.testing.assert_allclose(v1, v2, rtol=1e-14)  # same formula in float64: a few ulp apart at most
    np.testing.assert_allclose(g1, g2, rtol=1e-13, atol=1e-16)
    assert np.array_equal(looped.values(stack, "float64"), v1)
