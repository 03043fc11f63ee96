"""Scale-out: a suite of 6 losses under pytest with ``-n 1`` and ``-n 2`` (pytest-xdist).

Three ways of writing the suite are timed, each in a generated test module in a temporary
directory:

- ``plugin``: ``test_x = battery(loss, **declaration)`` per loss (one item per check), default
  xdist distribution (``--dist load``);
- ``plugin+group``: the same with ``marks=[pytest.mark.xdist_group(<loss>)]`` and
  ``--dist loadgroup``, so all items of one loss go to one worker;
- ``plain``: one test function per loss calling ``lossguard.run`` (no plugin API).

Wall time is that of the whole ``python -m pytest`` process (collection, worker start-up and
all). Target: ``-n 2`` at least 1.6× faster than ``-n 1`` on the 6-loss suite.

    python benchmarks/scale_out.py [--repeats 1] [--effort default]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import textwrap
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

#: (name in the generated module, where the loss comes from)
LOSSES = (
    ("small", "speed_losses:small_loss"),
    ("large", "speed_losses:large_loss"),
    ("handwritten", "corpus:correct-ce_handwritten_logsumexp"),
    ("focal_binary", "corpus:correct-focal_binary_log_space"),
    ("focal_multiclass", "corpus:correct-focal_multiclass_expm1"),
    ("bce_weighted", "corpus:correct-bce_log_sigmoid_weighted"),
)

_PRELUDE = '''
import sys
sys.path[:0] = [{bench!r}, {tests!r}]
import pytest
import lossguard
import speed_losses
import corpus


def _loss(where):
    source, name = where.split(":")
    if source == "speed_losses":
        return getattr(speed_losses, name), dict(speed_losses.DECLARATIONS[name])
    entry = corpus.by_id(name)
    return entry.fn, dict(entry.declaration)
'''


def _module(style: str) -> str:
    from _common import BENCH, ROOT

    text = textwrap.dedent(_PRELUDE).format(bench=str(BENCH), tests=str(ROOT / "tests"))
    if style.startswith("plugin"):
        text += "from lossguard.pytest_plugin import battery\n\n"
        for name, where in LOSSES:
            marks = f"[pytest.mark.xdist_group({name!r})]" if style == "plugin+group" else "[]"
            text += (f"_fn, _decl = _loss({where!r})\n"
                     f"test_{name} = battery(_fn, marks={marks}, **_decl)\n")
    else:
        for name, where in LOSSES:
            text += (f"\ndef test_{name}():\n"
                     f"    fn, decl = _loss({where!r})\n"
                     f"    assert lossguard.run(lossguard.declare(fn, **decl), effort=_EFFORT).ok\n")
    return text


def main() -> None:
    from _common import header, median_time, run_subprocess, table

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--effort", default="default", choices=("quick", "default", "thorough"))
    args = parser.parse_args()
    header(f"scale-out: 6 losses under pytest -n 1 and -n 2 (effort {args.effort})")
    rows = []
    with tempfile.TemporaryDirectory(prefix="lossguard-scale-") as tmp:
        for style in ("plugin", "plugin+group", "plain"):
            path = Path(tmp) / f"test_suite_{style.replace('+', '_')}.py"
            body = _module(style)
            if style == "plain":
                body = body.replace("import corpus\n", f"import corpus\n_EFFORT = {args.effort!r}\n", 1)
            path.write_text(body)
            times: dict[int, float] = {}
            outcomes: dict[int, str] = {}
            for n in (1, 2):
                cmd = [sys.executable, "-m", "pytest", str(path), "-q", "-p", "no:cacheprovider",
                       "-o", "addopts=", "--rootdir", tmp, "-n", str(n),
                       f"--lossguard-effort={args.effort}"]
                if style == "plugin+group":
                    cmd += ["--dist", "loadgroup"]

                def once() -> float:
                    seconds, code, out = run_subprocess(cmd, cwd=Path(tmp))
                    if code not in (0, 1):  # 1: some check failed; the timing still stands
                        raise SystemExit(f"{style} -n {n} failed ({code}):\n{out[-3000:]}")
                    outcome[n] = next((ln.strip("= ") for ln in reversed(out.splitlines())
                                       if " in " in ln and ("passed" in ln or "failed" in ln)), "?")
                    return seconds

                outcome: dict[int, str] = {}
                times[n], _ = median_time(once, args.repeats)
                outcomes[n] = outcome[n]
            speedup = times[1] / times[2]
            rows.append([style, times[1], times[2], speedup, "yes" if speedup >= 1.6 else "no",
                         outcomes[2].split(" in ")[0]])
    table(["suite style", "-n 1 s", "-n 2 s", "speed-up", "≥ 1.6×", "outcome (-n 2)"], rows)


if __name__ == "__main__":
    main()
