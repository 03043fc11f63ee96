"""How the battery's cost grows with the size of the logits, from (8, 4) to (4096, 1000).

Each shape (N, C) is run as the only cell of the battery (``lossguard.run(..., cells=[Cell(N, C)])``
replaces the shape menu) at the default effort, for the small cross-entropy of
``speed_losses.py`` with its reference, in a fresh process that has first warmed JAX up on another
loss. Reported: the load average when the shape starts, battery wall time, loss evaluations
(``Result.loss_evaluations``), the wall seconds spent inside the loss's evaluations (moving
arrays to and from XLA and waiting for its results; waits for a background compilation are left
out), the CPU seconds of the process during the battery (all
threads: XLA's and the background compiles too), XLA compiles, peak resident memory, and the
slowest checks (and any that did not pass). A watchdog stops a shape that exceeds the memory or time limit (the
machine is shared), and says so. The last line is the ratio and whether the target is met.

Target: the (4096, 1000) battery costs at most 3× the (64, 10) battery. Two floors are printed
beside the ratio, both as multiples of the (64, 10) battery: the evaluations alone (the battery
cannot finish faster than its evaluations take, unless it evaluates less, evaluates more cheaply
or overlaps them with its other work) and the battery's CPU seconds over the machine's cores (no
schedule finishes faster without computing less).

    python benchmarks/growth.py [--effort default] [--max-rss-gb 8] [--timeout 900]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

SHAPES = ((8, 4), (64, 10), (256, 100), (1024, 300), (4096, 1000))
#: The issue's target: the (4096, 1000) battery costs at most this many times the (64, 10) one.
TARGET = 3.0


def child(n: int, c: int, effort: str) -> None:
    """Warm up, then run the battery on one (N, C) cell and print one JSON line."""
    import lossguard
    import speed_losses
    from _common import CompileCounter
    from lossguard.cases import Cell

    warm = lossguard.declare(speed_losses.other_small_loss, kind="categorical", reference="categorical_ce")
    lossguard.run(warm, effort="quick")
    counter = CompileCounter.install()
    counter.reset()
    inside = _time_evaluations()
    spec = lossguard.declare(speed_losses.small_loss, **speed_losses.DECLARATIONS["small_loss"])
    t0, cpu0 = time.perf_counter(), time.process_time()
    result = lossguard.run(spec, effort=effort, cells=[Cell(n, c)])
    seconds, cpu = time.perf_counter() - t0, time.process_time() - cpu0
    print(json.dumps({
        "seconds": seconds, "evaluations": result.loss_evaluations, "ok": result.ok,
        "compiles": counter.total()[0], "compile_seconds": counter.total()[1],
        "eval_seconds": inside[0] - inside[1], "compile_wait_seconds": inside[1], "cpu_seconds": cpu,
        "checks": {ch.name: [ch.verdict, ch.seconds] for ch in result.checks},
    }))


def _time_evaluations() -> list[float]:
    """Wrap the JAX adapter's calls (jitted and eager) so that the wall seconds spent inside
    them — moving the arrays to XLA, the loss's evaluations, moving the results back — add up in
    the returned list's first entry; the second holds the part of it spent waiting for a
    background compilation (``_await``), which is not evaluation. Benchmark instrumentation only;
    the library is not changed."""
    from lossguard.adapters.jax_loss import JaxAdapter

    inside = [0.0, 0.0]
    for name, slot in (("_run", 0), ("_eager_values", 0), ("_await", 1)):
        original = getattr(JaxAdapter, name)

        def timed(self, *args, _original=original, _slot=slot, **kwargs):  # type: ignore[no-untyped-def]
            t = time.perf_counter()
            try:
                return _original(self, *args, **kwargs)
            finally:
                inside[_slot] += time.perf_counter() - t

        setattr(JaxAdapter, name, timed)
    return inside


def _rss_gb(pid: int) -> float:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 2**20
    except OSError:
        pass
    return 0.0


def _load() -> str:
    try:
        return f"{os.getloadavg()[0]:.1f}"
    except OSError:
        return "-"


def _measure(n: int, c: int, effort: str, max_rss: float, timeout: float) -> dict:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", str(n), str(c), effort]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    t0, peak, stopped = time.perf_counter(), 0.0, ""
    while proc.poll() is None:
        peak = max(peak, _rss_gb(proc.pid))
        if peak > max_rss:
            stopped = f"stopped: resident memory passed {max_rss:g} GB"
        elif time.perf_counter() - t0 > timeout:
            stopped = f"stopped: took longer than {timeout:g} s"
        if stopped:
            proc.kill()
            proc.wait()
            break
        time.sleep(0.25)
    wall = time.perf_counter() - t0
    out = proc.stdout.read() if proc.stdout else ""
    lines = [ln for ln in out.splitlines() if ln.startswith("{")]
    if stopped or not lines:
        return {"stopped": stopped or f"child failed with exit code {proc.returncode}", "wall": wall, "peak": peak}
    data = json.loads(lines[-1])
    data["peak"], data["wall"] = peak, wall
    return data


def main() -> None:
    from _common import header, table

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--effort", default="default", choices=("quick", "default", "thorough"))
    parser.add_argument("--max-rss-gb", type=float, default=8.0, help="stop a shape above this resident memory")
    parser.add_argument("--timeout", type=float, default=900.0, help="stop a shape after this many seconds")
    args = parser.parse_args()
    header(f"growth: battery cost against the size of the logits (effort {args.effort})")
    rows, base, top = [], None, None
    for n, c in SHAPES:
        load = _load()  # the machine is shared: the load when each shape starts
        d = _measure(n, c, args.effort, args.max_rss_gb, args.timeout)
        if "stopped" in d:
            rows.append([f"({n}, {c})", load, "-", "-", "-", "-", "-", "-", d["peak"], d["stopped"]])
            continue
        slow = sorted(d["checks"].items(), key=lambda kv: -kv[1][1])[:4]
        bad = [k for k, v in d["checks"].items() if v[0] in ("fail", "error")]
        rows.append([f"({n}, {c})", load, d["seconds"], d["evaluations"], d["eval_seconds"], d["cpu_seconds"],
                     d["compiles"], d["compile_seconds"], d["peak"], ", ".join(f"{k} {v[1]:.2g}s" for k, v in slow)
                     + (f" (not ok: {', '.join(bad)})" if bad else "")])
        if (n, c) == (64, 10):
            base = d
        if (n, c) == SHAPES[-1]:
            top = d
    table(["logits", "load", "battery s", "loss evals", "in evals s", "CPU s", "XLA compiles", "compile s",
           "peak RSS GB", "slowest checks"], rows)
    if base and top:
        ratio = top["seconds"] / base["seconds"]
        print(f"(4096, 1000) / (64, 10) = {ratio:.2f}  (target ≤ {TARGET:g}; met: {'yes' if ratio <= TARGET else 'no'})")
        cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1
        print(f"work floors at (4096, 1000), as multiples of the (64, 10) battery: the loss evaluations "
              f"alone {top['eval_seconds'] / base['seconds']:.2f}×; its CPU seconds spread over all "
              f"{cores} cores {top['cpu_seconds'] / cores / base['seconds']:.2f}×")
    else:
        print(f"(4096, 1000) / (64, 10): not measured to completion (see the table); target ≤ {TARGET:g}; met: no")


if __name__ == "__main__":
    if len(sys.argv) >= 5 and sys.argv[1] == "--child":
        child(int(sys.argv[2]), int(sys.argv[3]), sys.argv[4])
    else:
        main()
