"""Which compiled executables each check of the battery adds, for one loss.

Every distinct (operation, dtype, padded stack shape) the JAX adapter evaluates is one XLA
compilation. This script runs the default battery check by check in a warm process and lists,
per check, the executables it was first to need (later checks reuse them), with the XLA
compile count and seconds measured through ``jax.monitoring``. It observes the adapter by
wrapping its ``_run`` method for the duration of the script (nothing in lossguard is changed).

    python benchmarks/compile_map.py [--loss small_loss|large_loss] [--effort default]
"""

from __future__ import annotations

import argparse
import sys
import time
from collections import defaultdict
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))


def main() -> None:
    from _common import CompileCounter, header, table

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--loss", default="small_loss", choices=("small_loss", "large_loss"))
    parser.add_argument("--effort", default="default", choices=("quick", "default", "thorough"))
    args = parser.parse_args()
    header(f"compile map: executables per check ({args.loss}, effort {args.effort})")

    import lossguard
    import speed_losses
    from lossguard._budget import call_size
    from lossguard.adapters import jax_loss
    from lossguard.checks import Context, select_checks
    from lossguard.evaluate import Evaluator
    from lossguard.runner import run_check

    first_needed: dict[tuple[Any, ...], str] = {}
    current = [""]
    original = jax_loss.JaxAdapter._run

    def recording(self: Any, op: str, arrays: list[Any], dtype: str, float_mask: list[bool], **kw: Any) -> Any:
        shape = ((call_size(int(np.prod(arrays[0].shape[1:]))) if self.vectorised else 1,)
                 + tuple(arrays[0].shape[1:]))
        first_needed.setdefault((id(self), op, dtype, shape), current[0])
        return original(self, op, arrays, dtype, float_mask, **kw)

    jax_loss.JaxAdapter._run = recording  # type: ignore[method-assign]
    try:
        warm = lossguard.declare(speed_losses.other_small_loss, kind="categorical", reference="categorical_ce")
        lossguard.run(warm, effort=args.effort)  # JAX start-up and shared eager primitives
        first_needed.clear()
        counter = CompileCounter.install()
        counter.reset()
        spec = lossguard.declare(getattr(speed_losses, args.loss), **speed_losses.DECLARATIONS[args.loss])
        ev = Evaluator(spec)
        ctx = Context(spec=spec, evaluator=ev, effort=args.effort)
        seconds: dict[str, float] = {}
        for check, reason in select_checks(spec):
            if reason is not None:
                continue
            current[0] = counter.label = check.name
            t0 = time.perf_counter()
            run_check(check, ctx)
            seconds[check.name] = time.perf_counter() - t0
    finally:
        jax_loss.JaxAdapter._run = original  # type: ignore[method-assign]

    by_check: dict[str, list[str]] = defaultdict(list)
    for (_, op, dtype, shape), name in first_needed.items():
        by_check[name].append(f"{op} {dtype} {'x'.join(map(str, shape))}")
    rows = [[name, s, counter.compiles.get(name, 0), counter.compile_seconds.get(name, 0.0),
             len(by_check.get(name, [])), "; ".join(by_check.get(name, [])) or "-"]
            for name, s in seconds.items()]
    table(["check", "seconds", "XLA compiles", "compile s", "new executables", "(op dtype stack shape)"], rows)
    total_c, total_s = counter.total()
    print(f"total: {sum(seconds.values()):.2f} s, {total_c} XLA compiles ({total_s:.2f} s), "
          f"{len(first_needed)} adapter executables")


if __name__ == "__main__":
    main()
