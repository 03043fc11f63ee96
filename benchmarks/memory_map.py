"""Peak memory of each check at a fixed class count: one subprocess per check, its peak RSS.

Prints, for each check of a categorical cross-entropy at ``--classes C`` (quick or default
effort), the child's peak resident set size (``ru_maxrss``) and wall time, next to the estimate
of :mod:`lossguard._memory`. Use it to calibrate that estimate.

    python benchmarks/memory_map.py --classes 2000 5000 --effort quick
"""

from __future__ import annotations

import argparse
import datetime
import os
import platform
import resource
import subprocess
import sys
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
TARGET = os.path.join(ROOT, "lossguard", "examples", "reef_survey.py") + ":tile_loss"
CHECKS = ["reference", "finite", "gradient", "masking", "shift", "classes", "batch", "nonnegative",
          "deterministic", "dtypes", "live-gradient", "inputs-intact"]


def child(check: str, classes: int, effort: str) -> tuple[float, float, int]:
    """(peak RSS in MB, seconds, exit code) of one check in a fresh process."""
    code = (f"import resource, sys; from lossguard.cli import main; rc = main(['check', {TARGET!r}, '--kind', "
            f"'categorical', '--reference', 'categorical_ce', '--classes', '{classes}', '--effort', {effort!r}, "
            f"'--only', {check!r}, '--memory-budget', '1000']); "
            f"print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, file=sys.stderr); sys.exit(rc)")
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          env={**os.environ, "PYTHONPATH": ROOT})
    seconds = time.perf_counter() - t0
    lines = [ln for ln in proc.stderr.strip().splitlines() if ln.strip().isdigit()]
    peak = int(lines[-1]) / 1024 if lines else float("nan")
    return peak, seconds, proc.returncode


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--classes", type=int, nargs="+", default=[1000, 5000])
    ap.add_argument("--effort", default="quick")
    ap.add_argument("--checks", nargs="*", default=CHECKS)
    args = ap.parse_args()
    sys.path.insert(0, ROOT)
    from lossguard import declare
    from lossguard._memory import check_peaks
    from lossguard.examples.reef_survey import tile_loss

    print(f"# {datetime.date.today()} {platform.machine()} {os.cpu_count()} cores, Python {platform.python_version()}")
    print(f"{'classes':>8} {'check':<17} {'peak MB':>9} {'estimate MB':>12} {'seconds':>8} {'exit':>5}")
    for c in args.classes:
        spec = declare(tile_loss, kind="categorical", reference="categorical_ce", classes=c)
        est = check_peaks(spec, args.effort)
        for check in args.checks:
            peak, secs, rc = child(check, c, args.effort)
            e = est.get(check)
            print(f"{c:>8} {check:<17} {peak:>9.0f} {e / 2**20 if e else float('nan'):>12.0f} {secs:>8.1f} {rc:>5}",
                  flush=True)


if __name__ == "__main__":
    main()
