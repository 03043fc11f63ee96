"""Shared helpers for the benchmark scripts: the header, tables, the corpus, compile counting.

Benchmarks are plain scripts (``python benchmarks/speed.py``); they print the date and the
machine first, then one table per measurement. Nothing here is imported by lossguard itself.
"""

from __future__ import annotations

import datetime as _dt
import os
import platform
import statistics
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
BENCH = ROOT / "benchmarks"

__all__ = ["ROOT", "BENCH", "header", "table", "corpus", "median_time", "run_subprocess",
           "CompileCounter", "profile_battery", "CheckProfile"]


def header(title: str) -> None:
    """Print the title, the date and the machine (platform, CPU count, versions)."""
    import jax
    import numpy

    print(f"# {title}")
    print(f"date: {_dt.datetime.now().isoformat(timespec='seconds')}")
    print(f"machine: {platform.platform()}; {platform.processor() or platform.machine()}; "
          f"cpu count {os.cpu_count()}; python {platform.python_version()}; "
          f"jax {jax.__version__}; numpy {numpy.__version__}")
    try:
        load = os.getloadavg()
        print(f"load average at start: {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}")
    except OSError:
        pass
    print()


def table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> None:
    """Print rows under headers as a fixed-width text table (floats to 3 significant digits)."""

    def cell(v: Any) -> str:
        if isinstance(v, float):
            return f"{v:.3g}"
        return str(v)

    text = [[cell(v) for v in r] for r in rows]
    widths = [max([len(h)] + [len(r[i]) for r in text]) for i, h in enumerate(headers)]
    print("  ".join(h.ljust(w) for h, w in zip(headers, widths)))
    print("  ".join("-" * w for w in widths))
    for r in text:
        print("  ".join(v.ljust(w) for v, w in zip(r, widths)))
    print()


def corpus() -> Any:
    """The self-test corpus package (``tests/corpus``)."""
    tests = str(ROOT / "tests")
    if tests not in sys.path:
        sys.path.insert(0, tests)
    import corpus as c

    return c


def run_subprocess(args: Sequence[str], cwd: Path = ROOT) -> tuple[float, int, str]:
    """(wall seconds, exit code, combined output) of one subprocess."""
    t0 = time.perf_counter()
    proc = subprocess.run(list(args), cwd=cwd, capture_output=True, text=True)
    return time.perf_counter() - t0, proc.returncode, proc.stdout + proc.stderr


def median_time(fn: Callable[[], float], repeats: int) -> tuple[float, list[float]]:
    """Median and all samples of ``fn()``, which returns one measured duration."""
    samples = [fn() for _ in range(repeats)]
    return statistics.median(samples), samples


class CompileCounter:
    """Counts XLA backend compilations (and their seconds) through ``jax.monitoring``.

    The listener stays registered for the life of the process (benchmarks only); ``label`` tags
    the events that arrive while it is set, so a profile can attribute them to a check.
    """

    _installed: CompileCounter | None = None

    def __init__(self) -> None:
        self.label = ""
        self.compiles: dict[str, int] = {}
        self.compile_seconds: dict[str, float] = {}
        self.trace_seconds: dict[str, float] = {}

    @classmethod
    def install(cls) -> CompileCounter:
        if cls._installed is None:
            import jax.monitoring

            counter = cls()
            jax.monitoring.register_event_duration_secs_listener(counter._on_duration)
            cls._installed = counter
        return cls._installed

    def _on_duration(self, name: str, seconds: float, **_: Any) -> None:
        if name.endswith("backend_compile_duration"):
            self.compiles[self.label] = self.compiles.get(self.label, 0) + 1
            self.compile_seconds[self.label] = self.compile_seconds.get(self.label, 0.0) + seconds
        elif name.endswith("jaxpr_trace_duration") or name.endswith("jaxpr_to_mlir_module_duration"):
            self.trace_seconds[self.label] = self.trace_seconds.get(self.label, 0.0) + seconds

    def total(self) -> tuple[int, float]:
        return sum(self.compiles.values()), sum(self.compile_seconds.values())

    def reset(self) -> None:
        self.compiles.clear()
        self.compile_seconds.clear()
        self.trace_seconds.clear()


@dataclass
class CheckProfile:
    """Where one check's time went."""

    name: str
    verdict: str
    seconds: float
    compiles: int
    compile_seconds: float
    trace_seconds: float
    evaluations: int


@dataclass
class BatteryProfile:
    checks: list[CheckProfile] = field(default_factory=list)
    setup_seconds: float = 0.0
    setup_compiles: int = 0
    total_seconds: float = 0.0


def profile_battery(spec: Any, *, effort: str = "default", seed: int = 0, cells: Any = None) -> BatteryProfile:
    """Run the battery for ``spec`` check by check (as the runner does), recording per check
    its wall time, XLA compilations, trace time and loss evaluations."""
    from lossguard.checks import Context, select_checks
    from lossguard.evaluate import Evaluator
    from lossguard.runner import run_check

    counter = CompileCounter.install()
    counter.reset()
    out = BatteryProfile()
    t0 = time.perf_counter()
    counter.label = "(evaluator set-up)"
    ev = Evaluator(spec)
    kwargs = {"cells_override": tuple(cells)} if cells else {}
    ctx = Context(spec=spec, evaluator=ev, seed=seed, effort=effort, **kwargs)
    out.setup_seconds = time.perf_counter() - t0
    out.setup_compiles = counter.compiles.get(counter.label, 0)
    for check, reason in select_checks(spec):
        if reason is not None:
            continue
        counter.label = check.name
        before = ev.calls
        t1 = time.perf_counter()
        res = run_check(check, ctx)
        out.checks.append(CheckProfile(
            check.name, res.verdict, time.perf_counter() - t1, counter.compiles.get(check.name, 0),
            counter.compile_seconds.get(check.name, 0.0), counter.trace_seconds.get(check.name, 0.0),
            ev.calls - before))
    counter.label = ""
    out.total_seconds = time.perf_counter() - t0
    return out
