"""Torch batteries beside JAX ones: alone, side by side, and with or without torch.func.vmap.

Each measurement is a fresh process that imports its framework and lossguard, then times one
default battery (``lossguard.run``) of one loss; the printed seconds are the battery's, import
excluded. Ratios are taken within this one run. Losses (a wildlife camera-trap team's, invented):
a plain cross-entropy, a class-weighted focal loss with an ignore label, and a sequence loss over
(B·T, C) frames, each written once in torch and once in JAX, at the default shape menu and as a
single (1024, 300) cell.

Rows:
    alone       one battery (torch with the shipped rule: small cases under torch.func.vmap, large ones
                one at a time); torch / JAX ratio beside it (target ≤ 1.3×)
    vmap        CPU seconds of the torch battery with every case under vmap, against every case one
                at a time (the first vmap in a process imports torch.func's machinery, ~1.2 CPU s)
    pair        two torch batteries started together on the machine's cores, against one alone
                (target ≤ 1.5×), with lossguard's thread scoping and without it (the user's
                thread count left in force for every call, as before it was scoped)

    python benchmarks/torch_speed.py [--repeats 1] [--quick] [--no-pairs | --pairs-only]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

from _common import header, table

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
IGNORE = -100
ALPHA = [0.5, 0.6, 0.7, 0.8, 0.9, 1.0, 1.1, 1.2, 1.3, 1.4]
DECL = {
    "ce": {"kind": "categorical", "reference": "categorical_ce"},
    "focal": {"kind": "categorical", "reference": "focal_multiclass",
              "params": {"gamma": 2.0, "alpha": ALPHA}, "ignore_label": IGNORE, "classes": 10},
    "sequence": {"kind": "categorical", "reference": "categorical_ce"},
}


def torch_losses() -> dict:
    import torch
    import torch.nn.functional as F

    def ce(z, y):
        return F.cross_entropy(z if z.dtype == torch.float64 else z.float(), y)

    def focal(z, y, gamma=2.0, alpha=ALPHA):
        z = z if z.dtype == torch.float64 else z.float()
        keep = y != IGNORE
        safe = torch.where(keep, y, 0)
        logp = torch.log_softmax(z, -1).gather(-1, safe[:, None])[:, 0]
        a = torch.tensor(alpha, dtype=z.dtype)[safe] / keep.sum()
        return torch.sum(torch.where(keep, -a * (-torch.expm1(logp)) ** gamma * logp, 0.0))

    def sequence(z, y):  # (B·T, C) frames of B clips, T frames each, flattened by the caller
        z = z if z.dtype == torch.float64 else z.float()
        return F.cross_entropy(z.reshape(-1, z.shape[-1]), y.reshape(-1))

    return {"ce": ce, "focal": focal, "sequence": sequence}


def jax_losses() -> dict:
    import jax
    import jax.numpy as jnp

    def ce(z, y):
        return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z, -1), y[:, None], -1))

    def focal(z, y, gamma=2.0, alpha=ALPHA):
        keep = y != IGNORE
        safe = jnp.where(keep, y, 0)
        logp = jnp.take_along_axis(jax.nn.log_softmax(z, -1), safe[:, None], -1)[:, 0]
        a = jnp.asarray(alpha, dtype=z.dtype)[safe] / jnp.sum(keep)
        return jnp.sum(jnp.where(keep, -a * (-jnp.expm1(logp)) ** gamma * logp, 0.0))

    def sequence(z, y):
        return ce(z.reshape(-1, z.shape[-1]), y.reshape(-1))

    return {"ce": ce, "focal": focal, "sequence": sequence}


def child(framework: str, loss: str, shape: str, vmap: bool | None, scoped: bool) -> None:
    """Time one battery in this process and print {"seconds": …} as JSON."""
    losses = torch_losses() if framework == "torch" else jax_losses()
    import lossguard
    from lossguard.adapters import _torch_scope, torch_loss
    from lossguard.cases import Cell

    torch_loss.BATCHED_DEFAULT = vmap  # None: the shipped rule (vmap small cases); True/False: always/never
    if not scoped:  # the user's thread count for every call, as before scoping
        _torch_scope.threads_for = lambda elements, user: user
    decl = dict(DECL[loss])
    if loss == "focal" and shape != "menu":
        decl["params"] = {"gamma": 2.0, "alpha": [1.0] * 300}
        decl["classes"] = 300
    cells = None if shape == "menu" else [Cell(*map(int, shape.split("x")))]
    spec = lossguard.declare(losses[loss], **decl)
    t0, c0 = time.perf_counter(), time.process_time()
    result = lossguard.run(spec, cells=cells)
    print(json.dumps({"seconds": time.perf_counter() - t0, "cpu": time.process_time() - c0, "ok": result.ok,
                      "failed": [c.name for c in result.checks if c.verdict in ("fail", "error")]}))


def _cmd(framework: str, loss: str, shape: str, vmap: bool | None = None, scoped: bool = True) -> list[str]:
    how = "rule" if vmap is None else str(int(vmap))
    return [sys.executable, str(Path(__file__)), "--child", framework, loss, shape, how, str(int(scoped))]


def _start(cmd: list[str]) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    return subprocess.Popen(cmd, cwd=HERE, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _seconds(procs: list[subprocess.Popen]) -> list[tuple[float, float]]:
    out = []
    for p in procs:
        stdout, stderr = p.communicate()
        if p.returncode != 0:
            raise SystemExit(f"child failed: {stderr.strip().splitlines()[-1] if stderr.strip() else p.returncode}")
        doc = json.loads(stdout.strip().splitlines()[-1])
        out.append((doc["seconds"], doc["cpu"]))
    return out


def timed(cmd: list[str], together: int = 1, repeats: int = 1) -> tuple[float, float]:
    """Median over ``repeats`` of the slowest of ``together`` batteries started at once:
    (wall seconds, CPU seconds of that battery's process)."""
    runs = sorted(max(_seconds([_start(cmd) for _ in range(together)])) for _ in range(repeats))
    return runs[len(runs) // 2]


def main() -> None:
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        framework, loss, shape, vmap, scoped = sys.argv[2:7]
        child(framework, loss, shape, None if vmap == "rule" else vmap == "1", scoped == "1")
        return
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--quick", action="store_true", help="the default shapes only")
    parser.add_argument("--no-pairs", action="store_true", help="leave out the side-by-side rows")
    parser.add_argument("--pairs-only", action="store_true", help="only the side-by-side rows")
    args = parser.parse_args()
    if not args.pairs_only:
        alone(args)
    if args.no_pairs:
        return
    pairs(args)


def alone(args: argparse.Namespace) -> None:
    """The torch-beside-JAX table."""
    header("torch beside JAX: one default battery (seconds, import excluded)")
    rows = []
    shapes = ["menu"] if args.quick else ["menu", "1024x300"]
    for shape in shapes:
        for loss in DECL:
            (j, jc), (t, tc) = timed(_cmd("jax", loss, shape), repeats=args.repeats), \
                timed(_cmd("torch", loss, shape), repeats=args.repeats)
            lc = timed(_cmd("torch", loss, shape, vmap=False), repeats=args.repeats)[1]
            vc = timed(_cmd("torch", loss, shape, vmap=True), repeats=args.repeats)[1]
            rows.append([loss, shape, f"{j:.2f}", f"{t:.2f}", f"{t / j:.2f}x", f"{tc / jc:.2f}x",
                         f"{lc:.2f}", f"{vc:.2f}", f"{vc / lc:.2f}x"])
    table(["loss", "shape", "jax s", "torch s", "torch/jax", "cpu torch/jax", "loop cpu s", "vmap cpu s",
           "vmap/loop cpu"], rows)
    print("target: torch/jax <= 1.3x (JAX's CPU seconds include its background compile threads)")


def pairs(args: argparse.Namespace) -> None:
    """Two batteries started together against one alone."""
    header("two torch batteries side by side against one alone (plain CE, default shapes)")
    rows = []
    for scoped in (True, False):
        one, one_cpu = timed(_cmd("torch", "ce", "menu", scoped=scoped), repeats=args.repeats)
        two, two_cpu = timed(_cmd("torch", "ce", "menu", scoped=scoped), together=2, repeats=args.repeats)
        rows.append(["scoped threads" if scoped else "user's threads", f"{one:.2f}", f"{two:.2f}", f"{two / one:.2f}x",
                     f"{one_cpu:.2f}", f"{two_cpu:.2f}"])
    j1, j1c = timed(_cmd("jax", "ce", "menu"), repeats=args.repeats)
    j2, j2c = timed(_cmd("jax", "ce", "menu"), together=2, repeats=args.repeats)
    rows.append(["jax", f"{j1:.2f}", f"{j2:.2f}", f"{j2 / j1:.2f}x", f"{j1c:.2f}", f"{j2c:.2f}"])
    table(["torch threads", "one alone s", "two together s", "ratio", "CPU s alone", "CPU s in the pair"], rows)
    print("the same CPU seconds in a pair as alone: no oversubscription; then the wall ratio is the machine's load")
    print("target: two together <= 1.5x one alone. A pass is evidence, not proof: timings on a shared machine.")


if __name__ == "__main__":
    main()
