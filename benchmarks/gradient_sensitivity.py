"""How small a gradient error the ``gradient`` check catches, whether it ever cries wolf, and
what it costs as the input grows.

    python benchmarks/gradient_sensitivity.py                  # full run (tens of minutes)
    python benchmarks/gradient_sensitivity.py --sens-seeds 5 --spec-seeds 10   # a smoke run

Three tables:

1. Sensitivity. Each registry reference loss (its ``jax_per_example`` twin, reduced by mean) is
   wrapped in a ``jax.custom_vjp`` whose backward pass is wrong by a relative δ: either one
   coordinate of the gradient multiplied by (1 + δ), or noise of norm δ‖g‖ added. The
   coordinate and the noise are drawn from the case itself, so they move with every case and
   seed. No reference is declared, so finite differences are the only judge. Reported: the
   smallest δ (powers of ten) caught on 100% of the seeds, and the catch rate one step lower.
2. Specificity. The correct twins, declared with their reference, over many seeds (random,
   extreme-ladder and special cases; float64 oracles and the float32 comparison). A failure
   that the registry's hand-derived gradient confirms (autodiff differs from it too) is a true
   finding about the twin, not a false alarm; both counts are printed.
3. Cost. Loss evaluations (``evaluator.calls``) of the check on 4 cases of logits (64, 10) and
   (4096, 1000): the number of evaluations per case does not depend on the input size.
"""

from __future__ import annotations

import argparse
import sys
import time

import jax
import jax.numpy as jnp
import numpy as np

from _common import header, table
from lossguard import declare, run
from lossguard.cases import Cell, random_stack
from lossguard.checks import Context
from lossguard.checks.gradient import check_stacks
from lossguard.evaluate import Evaluator
from lossguard.references import REFERENCES

CASES = [("categorical_ce", "categorical"), ("categorical_ce", "distribution"), ("smoothed_ce", "categorical"),
         ("bce", "binary"), ("focal_binary", "binary"), ("focal_multiclass", "categorical"),
         ("kl_divergence", "distribution")]
DELTAS = [10.0**-e for e in range(1, 14)]


def mean_twin(ref: str):
    twin = REFERENCES[ref].jax_per_example

    def loss(z, y):
        return jnp.mean(twin(z, y))

    loss.__name__ = f"{ref}_mean"
    return loss


def wrong_by(ref: str, how: str, delta: float):
    """The twin with a backward pass off by a relative ``delta`` (``how``: coordinate or noise)."""
    base = mean_twin(ref)

    @jax.custom_vjp
    def f(z, y):
        return base(z, y)

    def fwd(z, y):
        return base(z, y), (z, y)

    def bwd(res, cot):
        z, y = res
        g = jax.grad(base)(z, y)
        seed = (jnp.sum(jnp.abs(z)) * 100.0 % 2.0**30).astype(jnp.int32)  # varies with the case
        key = jax.random.PRNGKey(seed)
        if how == "coordinate":
            i = jax.random.randint(key, (), 0, g.size)
            flat = g.reshape(-1)
            g = flat.at[i].multiply(1.0 + delta).reshape(g.shape)
        else:
            u = jax.random.normal(key, g.shape, dtype=g.dtype)
            g = g + delta * jnp.linalg.norm(g) * u / jnp.linalg.norm(u)
        return cot * g, None

    f.defvjp(fwd, bwd)
    return lambda z, y: f(z, y)


def caught_rate(ref: str, kind: str, how: str, delta: float, seeds: int, effort: str) -> float:
    spec = declare(wrong_by(ref, how, delta), kind=kind, name=f"{ref} {how} δ={delta:g}")
    ev = Evaluator(spec)
    hits = sum(run(spec, seed=s, effort=effort, only=["gradient"], evaluator=ev).check("gradient").verdict == "fail"
               for s in range(seeds))
    return hits / seeds


def sensitivity(seeds: int, effort: str) -> None:
    rows = []
    for ref, kind in CASES:
        for how in ("coordinate", "noise"):
            t0 = time.perf_counter()
            best, below = None, None
            start = DELTAS.index(1e-6)  # the target; walk down while every seed catches it, else up
            rate = caught_rate(ref, kind, how, DELTAS[start], seeds, effort)
            step = 1 if rate == 1.0 else -1
            i = start
            while True:
                if rate == 1.0:
                    best = DELTAS[i]
                else:
                    below = (DELTAS[i], rate)
                if (step == 1 and rate < 1.0) or (step == -1 and rate == 1.0):
                    break
                i += step
                if not 0 <= i < len(DELTAS):
                    break
                rate = caught_rate(ref, kind, how, DELTAS[i], seeds, effort)
            control = caught_rate(ref, kind, how, 0.0, seeds, effort)  # the same wrapper, no error
            rows.append([ref, kind, how, f"{best:.0e}" if best else "none",
                         f"{below[1]:.0%} at {below[0]:.0e}" if below else "-", f"{control:.0%}",
                         f"{time.perf_counter() - t0:.0f}s"])
            print(" | ".join(rows[-1]), file=sys.stderr, flush=True)
    print(f"## Sensitivity: smallest relative gradient error caught on all {seeds} seeds (effort={effort})")
    table(["reference", "kind", "error", "smallest δ caught 100%", "one step lower", "flagged at δ = 0", "time"],
          rows)


def specificity(seeds: int, effort: str) -> None:
    rows = []
    for ref, kind in CASES:
        spec = declare(mean_twin(ref), kind=kind, reference=ref)
        ev = Evaluator(spec)
        t0 = time.perf_counter()
        fails = confirmed = cases = kinks = unjudged = 0
        worst = 0.0
        notes = set()
        for s in range(seeds):
            c = run(spec, seed=s, effort=effort, only=["gradient"], evaluator=ev).check("gradient")
            cases += c.cases
            kinks += c.details.get("kinks", 0)
            unjudged += c.details.get("directions_not_judged", 0)
            if c.verdict == "fail":
                fails += 1
                pairs = c.details.get("failed_pairs", {})
                if "registry closed form" in pairs:
                    confirmed += 1
                    notes.add(c.worst[0].note.split(";")[0] if c.worst else "")
            else:
                worst = max(worst, float(c.details.get("max_error_over_allowance", 0.0)))
        rows.append([ref, kind, seeds, cases, fails, confirmed, fails - confirmed, f"{worst:.2g}", kinks, unjudged,
                     f"{time.perf_counter() - t0:.0f}s", "; ".join(sorted(notes))[:60]])
        print(" | ".join(map(str, rows[-1])), file=sys.stderr, flush=True)
    print(f"## Specificity: correct reference twins (effort={effort}, float64 oracles + float32 comparison)")
    table(["reference", "kind", "seeds", "cases", "failed runs", "confirmed by registry", "false alarms",
           "largest error/allowance (passing runs)", "kinks", "not judged", "time", "confirmed at"], rows)


def cost() -> None:
    spec = declare(mean_twin("categorical_ce"), kind="categorical")
    rows, per_case = [], []
    for cell in (Cell(64, 10), Cell(4096, 1000)):
        ev = Evaluator(spec)
        ctx = Context(spec=spec, evaluator=ev, seed=0, effort="default")
        stack = random_stack(spec, cell, np.random.default_rng(0), 4)
        t0 = time.perf_counter()
        res = check_stacks(ctx, [stack])
        n = ev.calls
        per_case.append(n / len(stack))
        rows.append([f"({cell.n}, {cell.c})", len(stack), n, n / len(stack), res.verdict, f"{time.perf_counter() - t0:.1f}s"])
    print("## Cost: loss evaluations of the gradient check (categorical_ce twin, effort=default)")
    table(["logits", "cases", "loss evaluations", "per case", "verdict", "time"], rows)
    print(f"ratio (4096, 1000) / (64, 10): {per_case[1] / per_case[0]:.2f} (target: within 3)\n")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sens-seeds", type=int, default=50)
    ap.add_argument("--spec-seeds", type=int, default=200)
    ap.add_argument("--effort", default="default")
    ap.add_argument("--skip", nargs="*", default=[], choices=["sensitivity", "specificity", "cost"])
    ap.add_argument("--only", nargs="*", default=[], help="reference names to keep (default: all)")
    args = ap.parse_args()
    header("gradient check: sensitivity, specificity, cost")
    if args.only:
        CASES[:] = [c for c in CASES if c[0] in args.only]
    if "cost" not in args.skip:
        cost()
    if "sensitivity" not in args.skip:
        sensitivity(args.sens_seeds, args.effort)
    if "specificity" not in args.skip:
        specificity(args.spec_seeds, args.effort)


if __name__ == "__main__":
    main()
