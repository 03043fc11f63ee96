"""The engine: a declared spec in, a structured :class:`~lossguard.result.Result` out.

The command line and the pytest plugin are thin layers over :func:`run`.
"""

from __future__ import annotations

import platform
import time
from collections.abc import Sequence
from typing import Any

from ._deadline import BATTERY_SECONDS, CALL_SECONDS, BatteryClock, BatteryTimeout, Stopped, limits_from
from ._memory import enforce_memory
from ._replay import framework
from ._suggest import bad_value
from .adapters._base import first_line
from .cases import Cell
from .effort import validate_run
from .checks import Context, select_checks
from .checks._smallest import add_smallest
from .errors import LossCallError, SpecError
from .evaluate import Evaluator, NoGradient
from .result import CheckResult, Result
from .spec import LossSpec

__all__ = ["run", "run_check", "versions"]


def versions() -> dict[str, str]:
    """Versions of the pieces that decide the numbers, for reports."""
    import hypothesis
    import jax
    import numpy

    from . import __version__

    return {
        "lossguard": __version__,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "jax": jax.__version__,
        "hypothesis": hypothesis.__version__,
    }


def run_check(check: Any, ctx: Context) -> CheckResult:
    """Run one check; whatever the user's loss does, come back with a verdict, not a traceback."""
    t0 = time.perf_counter()
    guard = getattr(ctx.evaluator, "guard", None)
    if guard is not None:
        guard.check = check.name  # named in a timeout's message
    try:
        result = check.run(ctx)
    except (LossCallError, Stopped) as exc:  # Stopped: a call past its time limit, or a bad output
        result = CheckResult(name=check.name, verdict="error", summary=str(exc))
    except NoGradient:  # as the gradient check does: nothing to judge without a gradient
        result = CheckResult(
            name=check.name, verdict="skip",
            summary=("needs a gradient: the loss is not JAX-traceable and no grad was declared; "
                     f"declare grad=... (--grad) to run {check.name}"),
        )
    except Exception as exc:  # a defect in lossguard itself: say so in one line
        result = CheckResult(
            name=check.name, verdict="error",
            summary=f"lossguard could not complete this check ({first_line(exc)}); please report it with the seed",
        )
    finally:
        if guard is not None:
            guard.check = ""
    if not result.hint and not result.ok:
        result.hint = check.skip_hint
    if result.verdict == "pass" and result.cases == 0:  # nothing judged: not a pass
        result.verdict, result.summary = "skip", f"nothing to judge: {result.summary}"
    result.seconds = result.seconds or (time.perf_counter() - t0)
    return result


def _compile_ahead(ctx: Context, checks: list[Any]) -> None:
    """Hand the evaluator every function the checks will compile, in battery order, so XLA
    compiles them in the background while earlier checks run."""
    plan: list[tuple[str, str, Cell]] = []
    for check in checks:
        if check.compiles is None:
            continue
        try:
            wanted = check.compiles(ctx)
        except Exception:  # a plan is an optimisation: never let it stop the battery
            continue
        plan += [job for job in wanted if job not in plan]
    # first what the early checks need: value-and-gradient in float64, then lower precisions;
    # forward mode (the gradient check's) last
    rank = {"float64": 0, "float16": 1, "bfloat16": 2, "float32": 3}
    plan.sort(key=lambda job: (job[0] != "vg", rank.get(job[1], 4)))
    if plan:
        guard = ctx.evaluator.guard
        guard.phase = "while tracing the checks' functions ahead of them"
        try:
            ctx.evaluator.prepare(plan)
        except Stopped:  # a call timed out while tracing: the checks that need it will say so
            pass
        finally:
            guard.phase = "outside any check"


def _probe(spec: LossSpec, limits: Any, clock: BatteryClock) -> Evaluator:
    """A new evaluator (its probe calls bounded by ``limits`` and the battery's clock)."""
    from ._guard import Guard

    try:
        return clock.run(lambda: Evaluator(spec, Guard(limits)), "the probe")
    except BatteryTimeout:
        raise LossCallError(f"loss={spec.name}: probing it took longer than the battery's time budget; "
                            f"{clock.why().split('; ', 1)[1]}") from None


def _within(clock: BatteryClock, check: Any, ctx: Context) -> CheckResult:
    """:func:`run_check` inside what is left of the battery's time budget."""
    t0 = time.perf_counter()
    try:
        result: CheckResult = clock.run(lambda: run_check(check, ctx), check.name)
    except BatteryTimeout:
        return CheckResult(name=check.name, verdict="error", summary="stopped: " + clock.why(),
                           seconds=time.perf_counter() - t0)
    try:  # the smallest failing input, beside the worst case; never changes the verdict
        clock.run(lambda: add_smallest(check, ctx, result), f"shrinking the failure of {check.name}")
    except BatteryTimeout:
        result.details["shrink"] = "stopped: " + clock.why()
    result.seconds += result.details.get("shrink_seconds", 0.0)
    return result


def run(
    spec: LossSpec,
    *,
    seed: int = 0,
    effort: str = "default",
    only: list[str] | None = None,
    target: str | None = None,
    evaluator: Evaluator | None = None,
    cells: Sequence[Cell] | None = None,
    progress: Any = None,
    call_timeout: float = CALL_SECONDS,
    time_budget: float = BATTERY_SECONDS,
    memory_budget: float | None = None,
) -> Result:
    """Run the battery of checks that fits ``spec``.

    Args:
        spec: a declaration from :func:`lossguard.declare`.
        seed: every random choice derives from it; the same seed gives the same report.
        effort: ``"quick"``, ``"default"`` or ``"thorough"``.
        only: run just these checks (names as in ``lossguard checks``).
        target: how the loss was named on the command line (for reports).
        evaluator: reuse an evaluator (and its compiled functions) across calls.
        cells: use these shapes instead of the shape menu (``None``: the menu for ``effort``).
        progress: optional ``progress(check_name, done, total)`` called before each check
            (and once more with ``done == total``); see :mod:`lossguard.report.progress`.
        call_timeout: seconds one call of the loss may take (its Python code; for a JAX loss
            its tracing, not XLA's compilation); past it the check reports an error naming the
            call, and the battery goes on. Default 60.
        time_budget: seconds the whole battery may take; checks left when it runs out are
            reported as not run. Default 300.
        memory_budget: GiB the battery's largest check may need, by an estimate from the shapes
            made before anything runs; ``None``: half the machine's memory
            (:func:`lossguard._memory.default_budget`).

    Returns:
        A :class:`~lossguard.result.Result`; ``result.ok`` is True when nothing failed.

    Raises:
        SpecError, CheckNameError: bad arguments. LossCallError: the loss cannot be called at all.
        MemoryBudgetError: a check would need more memory than ``memory_budget``.

    Example:
        >>> import jax
        >>> from lossguard import declare, run
        >>> def ce(z, y):
        ...     return -jax.numpy.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1).mean()
        >>> run(declare(ce, kind="categorical", reference="categorical_ce"), effort="quick").ok
        True
    """
    validate_run(seed, effort)
    limits = limits_from(call_timeout, time_budget)
    t0 = time.perf_counter()
    battery = select_checks(spec, only)
    if not any(reason is None for _, reason in battery):
        raise SpecError(bad_value("checks", [c.name for c, _ in battery], "at least one check to run",
                                  "drop the --skip or --only that turns off every selected check"))
    clock = BatteryClock(limits.battery_seconds)
    ev = evaluator or _probe(spec, limits, clock)
    ev.guard.limits = limits
    ctx = Context(spec=spec, evaluator=ev, seed=seed, effort=effort,
                  cells_override=tuple(cells) if cells else None)
    try:  # reading the output at every menu shape calls the loss: inside the budget too
        clock.run(lambda: ev.left_out, "reading the loss's output at every shape")
    except BatteryTimeout:
        pass  # every check is then reported as not run
    enforce_memory(ctx, [check.name for check, reason in battery if reason is None], memory_budget)
    try:  # tracing runs the loss's code: inside the budget too
        # the one-time precision probe comes before any check counts its evaluations
        clock.run(lambda: (_compile_ahead(ctx, [check for check, reason in battery if reason is None]),
                           ev.rounding_grid()), "tracing ahead of the checks")
    except BatteryTimeout:
        pass  # every check is then reported as not run
    results = []
    for i, (check, reason) in enumerate(battery):
        if progress is not None:
            progress(check.name, i, len(battery))
        if reason is not None:
            results.append(CheckResult(name=check.name, verdict="skip", summary=reason))
        elif clock.spent_out():
            results.append(CheckResult(name=check.name, verdict="error", summary="not run: " + clock.why()))
        else:
            with framework(ev.adapter.name):  # replay lines call the loss as the battery did
                results.append(_within(clock, check, ctx))
    ev.settle()
    if progress is not None:
        progress("done", len(battery), len(battery))
    return Result(
        target=target or spec.name,
        spec=spec.describe(),
        seed=seed,
        effort=effort,
        checks=results,
        evaluation=ev.describe(),
        versions=versions(),
        seconds=time.perf_counter() - t0,
        loss_evaluations=ev.calls,
    )
