"""Speed of the default battery against the floor, cold and warm, for a small and a large loss.

The floor is the least any test of a JAX loss costs: a process that imports JAX and takes one
value-and-gradient of the loss (jit-compiled, at the battery's largest default shape).

- cold: wall time of ``python -m lossguard check …`` in a fresh process, over the wall time of a
  fresh process that imports JAX and takes that one value-and-gradient;
- warm: in a process that has already run the battery on another loss, the battery time for
  this loss with a fresh Evaluator, over the same floor (the issue's definition: the floor is
  "a process that imports JAX and takes one value-and-gradient of the same loss"). Printed
  beside it, for information, the stricter ratio over this loss's *marginal* first jitted
  value-and-gradient in such a warm process (compilation only, no imports; each measured in its
  own fresh process, so neither warms the other);
- efforts: the cold command at ``--effort quick``, ``default`` and ``thorough``;
- profile: per check, wall time, XLA compilations and loss evaluations (default effort, warm).

- torch: the same losses written in PyTorch (``speed_losses_torch.py``), cold command over a
  process that imports torch and takes one value-and-gradient, and over the JAX battery.

Targets: cold default battery ≤ 5× the floor, warm ≤ 2× the floor.

    python benchmarks/speed.py [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

LOSSES = ("small_loss", "large_loss")
WARM_UP = {"small_loss": "large_loss", "large_loss": "small_loss"}
SHAPE = (16, 10)  # the largest cell of the default shape menu for a categorical loss


def _cli_args(name: str, effort: str, module: str = "speed_losses") -> list[str]:
    from speed_losses import DECLARATIONS

    d = DECLARATIONS[name]
    args = [sys.executable, "-m", "lossguard", "check", f"benchmarks/{module}.py:{name}",
            "--kind", d["kind"], "--reference", d["reference"], "--effort", effort]
    for k, v in d.get("params", {}).items():
        args += ["--param", f"{k}={json.dumps(v)}"]
    if d.get("ignore_label") is not None:
        args += ["--ignore-label", str(d["ignore_label"])]
    return args


# -- children: each runs in a fresh interpreter ------------------------------------------------
def _inputs(jnp: object) -> tuple[object, object]:
    import numpy as np

    rng = np.random.default_rng(0)
    z = rng.standard_normal(SHAPE).astype(np.float32)
    y = rng.integers(0, SHAPE[1], size=SHAPE[0])
    return jnp.asarray(z), jnp.asarray(y)  # type: ignore[attr-defined]


def _one_value_and_grad(name: str) -> float:
    import jax
    import jax.numpy as jnp
    import speed_losses

    z, y = _inputs(jnp)
    t0 = time.perf_counter()
    v, g = jax.jit(jax.value_and_grad(getattr(speed_losses, name)))(z, y)
    jax.block_until_ready(g)
    return time.perf_counter() - t0


def child_floor_cold(name: str) -> None:
    """Import JAX, take one jitted value-and-gradient, exit (the cold floor's whole process)."""
    _one_value_and_grad(name)


def child_floor_cold_torch(name: str) -> None:
    """Import torch, take one value-and-gradient of the torch twin, exit."""
    import numpy as np
    import speed_losses_torch
    import torch

    rng = np.random.default_rng(0)
    z = torch.tensor(rng.standard_normal(SHAPE), dtype=torch.float32, requires_grad=True)
    y = torch.tensor(rng.integers(0, SHAPE[1], size=SHAPE[0]))
    torch.autograd.grad(getattr(speed_losses_torch, name)(z, y), z)


def _warm_up(other: str) -> None:
    import lossguard
    import speed_losses

    spec = lossguard.declare(getattr(speed_losses, other), **speed_losses.DECLARATIONS[other])
    lossguard.run(spec)


def child_floor_warm(name: str) -> None:
    _warm_up(WARM_UP[name])
    print(json.dumps({"seconds": _one_value_and_grad(name)}))


def child_battery_warm(name: str) -> None:
    import lossguard
    import speed_losses

    _warm_up(WARM_UP[name])
    spec = lossguard.declare(getattr(speed_losses, name), **speed_losses.DECLARATIONS[name])
    t0 = time.perf_counter()
    result = lossguard.run(spec)  # run() builds a fresh Evaluator
    print(json.dumps({"seconds": time.perf_counter() - t0, "ok": result.ok,
                      "evaluations": result.loss_evaluations}))


# -- the parent ------------------------------------------------------------------------------
def _child(mode: str, name: str) -> list[str]:
    return [sys.executable, str(Path(__file__).resolve()), "--child", mode, name]


def main() -> None:
    from _common import header, median_time, profile_battery, run_subprocess, table

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3, help="runs per measurement (median reported)")
    args = parser.parse_args()
    header("speed: battery time over the floor")

    def wall(cmd: list[str]) -> float:
        seconds, code, out = run_subprocess(cmd)
        if code not in (0, 1):
            raise SystemExit(f"command failed ({code}): {' '.join(cmd)}\n{out[-2000:]}")
        return seconds

    def reported(cmd: list[str]) -> float:
        _, code, out = run_subprocess(cmd)
        if code != 0:
            raise SystemExit(f"command failed ({code}): {' '.join(cmd)}\n{out[-2000:]}")
        line = [ln for ln in out.splitlines() if ln.startswith("{")][-1]  # stderr may follow
        return float(json.loads(line)["seconds"])

    rows, effort_rows = [], []
    for name in LOSSES:
        floor_cold, _ = median_time(lambda: wall(_child("floor-cold", name)), args.repeats)
        efforts = {}
        for effort in ("quick", "default", "thorough"):
            efforts[effort], _ = median_time(lambda: wall(_cli_args(name, effort)), args.repeats)
        floor_warm, _ = median_time(lambda: reported(_child("floor-warm", name)), args.repeats)
        battery_warm, _ = median_time(lambda: reported(_child("battery-warm", name)), args.repeats)
        rows.append([name, "cold", floor_cold, efforts["default"], efforts["default"] / floor_cold, "≤ 5",
                     "yes" if efforts["default"] / floor_cold <= 5 else "no", "-", "-"])
        rows.append([name, "warm", floor_cold, battery_warm, battery_warm / floor_cold, "≤ 2",
                     "yes" if battery_warm / floor_cold <= 2 else "no", floor_warm, battery_warm / floor_warm])
        effort_rows.append([name] + [efforts[e] for e in ("quick", "default", "thorough")]
                           + [efforts[e] / floor_cold for e in ("quick", "default", "thorough")])
    print(f"## default battery over the floor (median of {args.repeats}; seconds)")
    table(["loss", "process", "floor s", "battery s", "ratio", "target", "met",
           "marginal compile s", "battery ÷ marginal"], rows)
    print(f"## effort profiles, cold command (median of {args.repeats}; seconds, and ratio to the cold floor)")
    table(["loss", "quick s", "default s", "thorough s", "quick ×", "default ×", "thorough ×"], effort_rows)

    if _has_torch():
        _torch_rows(args.repeats, wall, {r[0]: r[3] for r in rows if r[1] == "cold"})

    import lossguard
    import speed_losses

    for name in LOSSES:
        spec = lossguard.declare(getattr(speed_losses, name), **speed_losses.DECLARATIONS[name])
        lossguard.run(spec, effort="quick")  # warm the process (imports, JAX's own start-up)
        prof = profile_battery(spec, effort="default")
        print(f"## profile: {name}, default effort, warm process (total {prof.total_seconds:.2f} s; "
              f"evaluator set-up {prof.setup_seconds:.2f} s, {prof.setup_compiles} compiles)")
        table(["check", "verdict", "seconds", "XLA compiles", "compile s", "trace+lower s", "loss evals"],
              [[c.name, c.verdict, c.seconds, c.compiles, c.compile_seconds, c.trace_seconds, c.evaluations]
               for c in prof.checks])


def _has_torch() -> bool:
    try:
        import torch  # noqa: F401
    except ImportError:
        return False
    return True


def _torch_rows(repeats: int, wall: Any, jax_cold: dict[str, float]) -> None:
    """The same table for the torch twins (benchmarks/speed_losses_torch.py), beside JAX's."""
    from _common import median_time, table

    rows = []
    for name in LOSSES:
        floor, _ = median_time(lambda: wall(_child("floor-cold-torch", name)), repeats)
        battery, _ = median_time(lambda: wall(_cli_args(name, "default", "speed_losses_torch")), repeats)
        rows.append([name, floor, battery, battery / floor, jax_cold[name], battery / jax_cold[name]])
    print(f"## torch twins, cold command, default effort (median of {repeats}; seconds)")
    table(["loss", "torch floor s", "torch battery s", "ratio to torch floor", "jax battery s",
           "torch ÷ jax"], rows)


if __name__ == "__main__":
    if len(sys.argv) >= 4 and sys.argv[1] == "--child":
        mode, loss_name = sys.argv[2], sys.argv[3]
        {"floor-cold": child_floor_cold, "floor-warm": child_floor_warm, "floor-cold-torch": child_floor_cold_torch,
         "battery-warm": child_battery_warm}[mode](loss_name)
    else:
        main()
