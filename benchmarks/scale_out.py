"""Scale-out: a suite of 6 losses under pytest with ``-n 1`` and ``-n 2`` (pytest-xdist), written
in JAX and (``--suite torch``, on by default where torch is installed) in PyTorch.

The headline is the plugin style under xdist's default distribution. Each style is a generated
test module in a temporary directory:

- ``plugin``: ``test_x = battery(loss, **declaration)`` per loss (one item per check), default
  distribution (``--dist load``: items go to whichever worker is free, so one declaration's
  items can be split between the workers; each worker runs only the checks it receives);
- ``plugin-loadgroup``: the same module with ``--dist loadgroup``: the plugin gives each
  declaration's items one ``xdist_group``, so one worker runs all of a declaration;
- ``plugin-worksteal``: the same module with ``--dist worksteal`` (each worker starts on one
  contiguous half of the items, then takes items from the other's queue when idle);
- ``plain``: one test function per loss calling ``lossguard.run`` (no plugin API);
- ``startup``: the plugin module with every item deselected: what a run costs before any check
  (interpreter, pytest and its plugins, xdist workers, JAX import, collection).

Below the table: the best speed-up the CPU time allows (``-n 1`` already keeps more than one
core busy, since XLA compiles in background threads while checks run), and the start-up costs.

``--pinned`` times the ``-n 1`` run of the ``plugin`` style (or the first style timed) once more,
pinned to one core (``taskset -c 0``): if it takes about as long as the all-core run's CPU
seconds, the extra core a ``-n 1`` run keeps busy does work the run needs, and the CPU ceiling
printed with the table binds.

``--env NAME=VALUE`` (repeatable) adds the plugin rows again with these variables set in the
environment of both runs: an opt-in a user could make (such as JAX's persistent compilation
cache, ``JAX_COMPILATION_CACHE_DIR``); lossguard never sets them itself. Those rows start
with one untimed ``-n 1`` run, so that a cache they turn on is warm for every timed run.

Wall time is that of the whole ``python -m pytest`` process (collection, worker start-up and
all); CPU time is user + system time of that process and all its workers. A run without xdist
(``no -n``) is timed too, for reference. The runs alternate (no -n, 1, 2, no -n, 1, 2, …) so
that a change in the machine's load falls on all; each figure is the median of ``--repeats``
runs. Target: ``-n 2`` at least 1.6× faster than ``-n 1`` on the 6-loss suite. The machine is
shared: the load average is printed at the start and after each style, and a ratio is only
meaningful within one run of this script.

    python benchmarks/scale_out.py [--repeats 1] [--effort default] [--styles plugin,plain]
        [--env JAX_COMPILATION_CACHE_DIR=/tmp/jax-cache --env JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS=0]
"""

from __future__ import annotations

import argparse
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

TARGET = 1.6

#: (name in the generated module, where the loss comes from)
LOSSES = (
    ("small", "speed_losses:small_loss"),
    ("large", "speed_losses:large_loss"),
    ("handwritten", "corpus:correct-ce_handwritten_logsumexp"),
    ("focal_binary", "corpus:correct-focal_binary_log_space"),
    ("focal_multiclass", "corpus:correct-focal_multiclass_expm1"),
    ("bce_weighted", "corpus:correct-bce_log_sigmoid_weighted"),
)

#: the same suite written in PyTorch (``--suite torch``): the speed losses' torch twins and four
#: correct torch losses of the corpus (a function, a module class, a custom Function, focal)
TORCH_LOSSES = (
    ("small", "speed_losses_torch:small_loss"),
    ("large", "speed_losses_torch:large_loss"),
    ("functional", "corpus:correct-torch_ce_functional"),
    ("module_class", "corpus:correct-TorchSmoothedModule"),
    ("custom_function", "corpus:correct-torch_ce_function"),
    ("focal", "corpus:correct-torch_focal_functional"),
)
SUITES = {"jax": LOSSES, "torch": TORCH_LOSSES}

#: style → (module body kind, extra pytest arguments)
STYLES = {
    "plugin": ("plugin", []),
    "plugin-loadgroup": ("plugin", ["--dist", "loadgroup"]),
    "plugin-worksteal": ("plugin", ["--dist", "worksteal"]),
    "plain": ("plain", []),
    "startup": ("plugin", ["-k", "no_such_test"]),
}

_PRELUDE = '''
import sys
sys.path[:0] = [{bench!r}, {tests!r}]
import pytest
import lossguard
import speed_losses
import corpus

_EFFORT = {effort!r}


def _loss(where):
    source, name = where.split(":")
    if source.startswith("speed_losses"):
        module = __import__(source)
        return getattr(module, name), dict(module.DECLARATIONS[name])
    entry = corpus.by_id(name)
    return entry.fn, dict(entry.declaration)
'''


def _module(kind: str, effort: str, losses: tuple[tuple[str, str], ...] = LOSSES) -> str:
    from _common import BENCH, ROOT

    text = textwrap.dedent(_PRELUDE).format(bench=str(BENCH), tests=str(ROOT / "tests"), effort=effort)
    if kind == "plugin":
        text += "from lossguard.pytest_plugin import battery\n\n"
        for name, where in losses:
            text += f"_fn, _decl = _loss({where!r})\ntest_{name} = battery(_fn, **_decl)\n"
    else:
        for name, where in losses:
            text += (f"\ndef test_{name}():\n"
                     f"    fn, decl = _loss({where!r})\n"
                     f"    assert lossguard.run(lossguard.declare(fn, **decl), effort=_EFFORT).ok\n")
    return text


def _timed(cmd: list[str], cwd: Path, env: dict[str, str]) -> tuple[float, float, int, str]:
    """(wall s, CPU s of the process and its workers, exit code, output) of one pytest run."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu, proc.returncode, proc.stdout + proc.stderr


def _outcome(out: str) -> str:
    return next((ln.strip("= ").split(" in ")[0] for ln in reversed(out.splitlines())
                 if " in " in ln and any(w in ln for w in ("passed", "failed", "deselected", "no tests"))), "?")


def _load() -> str:
    return " ".join(f"{x:.2f}" for x in os.getloadavg())


def measure(path: Path, extra: list[str], effort: str, repeats: int, env: dict[str, str],
            warm_up: bool = False, ns: tuple[int, ...] = (1, 2)) -> dict[str, Any]:
    """Median wall and CPU seconds of ``-n N`` runs (N in ``ns``, alternating) of the module at
    ``path``; ``-n 0`` is a run without xdist."""
    walls: dict[int, list[float]] = {n: [] for n in ns}
    cpus: dict[int, list[float]] = {n: [] for n in ns}
    outcome = "?"
    order = ([ns[0]] if warm_up else []) + list(ns) * repeats
    for i, n in enumerate(order):
        cmd = [sys.executable, "-m", "pytest", str(path), "-q", "-p", "no:cacheprovider",
               "-o", "addopts=", "--rootdir", str(path.parent), "-n", str(n),
               f"--lossguard-effort={effort}", *extra]
        wall, cpu, code, out = _timed(cmd, path.parent, env)
        if code not in (0, 1, 5):  # 1: some check failed, 5: none selected; the timing stands
            raise SystemExit(f"{path.name} -n {n} failed ({code}):\n{out[-3000:]}")
        if warm_up and i == 0:
            continue
        walls[n].append(wall)
        cpus[n].append(cpu)
        outcome = _outcome(out)
    out: dict[str, Any] = {"outcome": outcome}
    for n in ns:
        out[f"w{n}"], out[f"c{n}"] = statistics.median(walls[n]), statistics.median(cpus[n])
    out["speedup"] = out["w1"] / out["w2"]
    return out


def _torch_installed() -> bool:
    try:
        import torch  # noqa: F401
    except ImportError:
        return False
    return True


def main() -> None:
    from _common import header, table

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--effort", default="default", choices=("quick", "default", "thorough"))
    parser.add_argument("--styles", default="startup,plugin,plugin-loadgroup,plain",
                        help=f"comma-separated, from: {', '.join(STYLES)}")
    parser.add_argument("--env", action="append", default=[], metavar="NAME=VALUE",
                        help="also time the plugin styles with these environment variables set")
    parser.add_argument("--suite", default="jax,torch" if _torch_installed() else "jax",
                        help="comma-separated: jax, torch (the same suite written in PyTorch; needs torch)")
    parser.add_argument("--pinned", action="store_true",
                        help="also time the plugin style's -n 1 run pinned to one core (taskset -c 0)")
    args = parser.parse_args()
    styles = [s.strip() for s in args.styles.split(",") if s.strip()]
    unknown = [s for s in styles if s not in STYLES]
    if unknown:
        raise SystemExit(f"--styles: unknown {unknown}; expected some of {list(STYLES)}")
    header(f"scale-out: 6 losses under pytest -n 1 and -n 2 (effort {args.effort}, "
           f"{args.repeats} alternating run(s) each)")
    base_env = dict(os.environ)
    extra_env = dict(item.split("=", 1) for item in args.env)
    suites = [s.strip() for s in args.suite.split(",") if s.strip()]
    if any(s not in SUITES for s in suites):
        raise SystemExit(f"--suite: expected some of {list(SUITES)}")
    runs = [(s, False, suite) for suite in suites for s in styles]
    if extra_env:
        runs += [(s, True, "jax") for s in styles if STYLES[s][0] == "plugin" and s != "startup"]
    rows, figures = [], {}
    with tempfile.TemporaryDirectory(prefix="lossguard-scale-") as tmp:
        for style, with_env, suite in runs:
            kind, extra = STYLES[style]
            path = Path(tmp) / f"test_suite_{suite}_{kind}.py"
            if not path.exists():
                path.write_text(_module(kind, args.effort, SUITES[suite]))
            env = {**base_env, **(extra_env if with_env else {})}
            label = (f"{style} +env" if with_env else style) + ("" if suite == "jax" else f" ({suite})")
            f = measure(path, extra, args.effort, args.repeats, env, warm_up=with_env, ns=(0, 1, 2))
            figures[label] = f
            met = "-" if style == "startup" else "yes" if f["speedup"] >= TARGET else "no"
            rows.append([label, f["w0"], f["w1"], f["w2"], f["speedup"], met,
                         f["c1"], f["c2"], f["outcome"], _load()])
    if extra_env:
        print(f"+env: {' '.join(args.env)} (after one untimed warm-up run)")
    table(["suite style", "no -n s", "-n 1 s", "-n 2 s", "speed-up", f"≥ {TARGET}×", "-n 1 CPU s",
           "-n 2 CPU s", "outcome (-n 2)", "load after"], rows)
    if "plugin" in figures:
        f = figures["plugin"]
        print(f"headline (plugin, --dist load): -n 1 {f['w1']:.1f} s, -n 2 {f['w2']:.1f} s, "
              f"speed-up {f['speedup']:.2f}×; target ≥ {TARGET}× met: {'yes' if f['speedup'] >= TARGET else 'no'}")
        cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 2
        print(f"ceiling from CPU: -n 1 used {f['c1']:.1f} CPU s in {f['w1']:.1f} s ({f['c1'] / f['w1']:.2f} cores); "
              f"on {cores} cores -n 2 cannot take less than {f['c1'] / cores:.1f} s without doing less work: "
              f"at most {f['w1'] * cores / f['c1']:.2f}×")
    for style in ("plugin", "plugin-loadgroup"):
        if f"{style} (torch)" in figures:
            t = figures[f"{style} (torch)"]
            jax_part = (f"; the JAX suite {figures[style]['speedup']:.2f}×" if style in figures else "")
            print(f"torch suite ({style}): -n 1 {t['w1']:.1f} s, -n 2 {t['w2']:.1f} s, speed-up {t['speedup']:.2f}×"
                  + jax_part)
    timed = [k for k in figures if k != "startup" and "(torch)" not in k]
    if args.pinned and timed:
        first = "plugin" if "plugin" in timed else timed[0]
        kind, extra = STYLES[first]
        with tempfile.TemporaryDirectory(prefix="lossguard-pinned-") as tmp:
            path = Path(tmp) / f"test_suite_{kind}.py"
            path.write_text(_module(kind, args.effort))
            cmd = ["taskset", "-c", "0", sys.executable, "-m", "pytest", str(path), "-q", "-p", "no:cacheprovider",
                   "-o", "addopts=", "--rootdir", tmp, "-n", "1", f"--lossguard-effort={args.effort}", *extra]
            wall, cpu, code, out = _timed(cmd, path.parent, base_env)
        if code not in (0, 1):
            raise SystemExit(f"pinned run failed ({code}):\n{out[-3000:]}")
        f = figures[first]
        # on one core the wall time is at least the CPU time; if it comes close to the CPU time the
        # two-core run used, that CPU time is work the run needs (not threads spinning idle)
        print(f"pinned ({first}, -n 1 on one core, one run): {wall:.1f} s, {cpu:.1f} CPU s; on all cores "
              f"(median) {f['w1']:.1f} s, {f['c1']:.1f} CPU s: one core takes {wall / f['w1']:.2f}× as long, "
              f"{wall / f['c1']:.2f}× the all-core run's CPU seconds")
    if "plugin" in figures:
        if "startup" in figures:
            s0 = figures["startup"]
            print(f"start-up: -n 1 spends {s0['w1']:.1f} s and -n 2 {s0['w2']:.1f} s before any check "
                  f"({s0['c1']:.1f} and {s0['c2']:.1f} CPU s)")

if __name__ == "__main__":
    main()
