"""What showing the smallest failing input costs ``lossguard check``: default battery, broken losses.

For each broken loss of the self-test corpus below (one per check that shrinks its failures) the
whole default battery runs in one warm process (after a first battery on a correct loss has
paid JAX's start-up), alternately with shrinking on (the default profile) and off (the same
profile with ``shrink_calls=0``), each run with a fresh Evaluator, so every compilation is paid
each time. Printed: the median battery time of each, their difference, and for the last run with
shrinking on, per failed check, the shape of the smallest failing input found and the seconds
shrinking took (``-``: not shrunk; the property checks shrink by their own Hypothesis search).

    python benchmarks/shrink_cost.py [--repeats 3]
"""

from __future__ import annotations

import argparse
import dataclasses
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

#: (corpus id, the check its bug is meant for)
LOSSES = (
    ("numerics-log_of_softmax", "finite"),
    ("conventions-weight_of_predicted_class", "reference"),
    ("custom-grad-vjp_sign_flipped", "gradient"),
    ("masks-onehot_dot_picks_target", "masking"),
)


def _battery(spec, effort) -> tuple[float, object]:  # noqa: ANN001
    import lossguard

    t0 = time.perf_counter()
    result = lossguard.run(spec, effort=effort)
    return time.perf_counter() - t0, result


def _shrunk(result) -> str:  # noqa: ANN001
    out = []
    for c in result.checks:
        if c.verdict != "fail":
            continue
        shape = "x".join(str(n) for n in __import__("numpy").shape(c.smallest.predictions)) if c.smallest else "-"
        out.append(f"{c.name} {shape} {c.details.get('shrink_seconds', 0.0):.2f}s")
    return ", ".join(out)


def main() -> None:
    from _common import corpus, header, table

    from lossguard.effort import get_effort

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    header("cost of shrinking failures: default battery, warm process, shrinking on and off")
    c = corpus()
    on = get_effort("default")
    off = dataclasses.replace(on, shrink_calls=0)
    _battery(c.CORRECT[0].spec(), on)  # warm-up: JAX start-up paid once
    rows = []
    for entry_id, meant in LOSSES:
        spec = c.by_id(entry_id).spec()
        t_on, t_off, last = [], [], None
        for _ in range(args.repeats):
            s, last = _battery(spec, on)
            t_on.append(s)
            t_off.append(_battery(spec, off)[0])
        m_on, m_off = statistics.median(t_on), statistics.median(t_off)
        rows.append([entry_id, meant, m_off, m_on, m_on - m_off, _shrunk(last)])
    table(["loss", "meant for", "off s", "on s", "on − off s", "failed checks: smallest shape, shrinking s (last run)"],
          rows)


if __name__ == "__main__":
    main()
