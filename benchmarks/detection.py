"""Detection over the self-test corpus: broken losses caught, correct losses left clean.

For each broken loss: the verdicts of the check(s) meant to catch it (``only=`` those checks)
and, with ``--full``, which checks of the whole default battery flag it. For each correct loss:
the whole default battery (plus its declared ``expect``) and whether anything flagged it.
Time is wall time per corpus entry in one warm process (the first entry pays JAX's start-up).
Known gaps and known false alarms (``tests/corpus/known.py``, each reported) are listed apart.

Target: every broken loss caught, no correct loss flagged.

    python benchmarks/detection.py [--effort quick] [--full]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))


def framework(entry: object) -> str:
    """``torch`` for the corpus's PyTorch entries, else ``jax/numpy``."""
    return "torch" if "torch" in entry.id.lower() else "jax/numpy"  # the corpus's torch ids say so


def main() -> None:
    from _common import corpus, header, table

    import lossguard
    from lossguard.checks import all_checks

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--effort", default="quick", choices=("quick", "default", "thorough"))
    parser.add_argument("--full", action="store_true", help="also run the whole default battery on each broken loss")
    args = parser.parse_args()
    header(f"detection over the corpus (effort {args.effort})")
    c = corpus()
    known = set(all_checks())

    rows, caught, gaps, missing_checks, by_any = [], 0, 0, 0, 0
    per: dict[tuple[str, str], list[tuple[bool, float]]] = {}  # (framework, broken|correct) → (ok, s)
    broken_time = 0.0
    for e in c.BROKEN:
        if not set(e.catches) <= known:
            rows.append([e.id, ",".join(e.catches), "check not registered", "-", "-"])
            missing_checks += 1
            continue
        t0 = time.perf_counter()
        res = lossguard.run(e.spec(), effort=args.effort, only=list(e.catches))
        verdicts = {n: res.check(n).verdict for n in e.catches}
        seconds = time.perf_counter() - t0
        broken_time += seconds
        meant = [n for n in e.catches if (e.id, n) not in c.KNOWN_GAPS]
        ok = all(verdicts[n] == "fail" for n in meant)
        is_gap = any((e.id, n) in c.KNOWN_GAPS and verdicts[n] != "fail" for n in e.catches)
        caught += ok
        gaps += is_gap
        per.setdefault((framework(e), "broken caught"), []).append((ok, seconds))
        flagged = "-"
        if args.full:
            spec = e.spec()
            expect = tuple(sorted(set(spec.expect) | ({n for n in e.catches} - {"reference"})))
            full = lossguard.run(e.spec(expect=tuple(n for n in expect if n in known)), effort=args.effort)
            names = [ch.name for ch in full.checks if ch.verdict in ("fail", "error")]
            by_any += bool(names)
            flagged = ",".join(names) or "nothing"
        status = ("caught" if ok else "MISSED") + (" (known gap)" if is_gap else "")
        rows.append([e.id, ",".join(f"{n}:{v}" for n, v in verdicts.items()), status, seconds, flagged])
    print(f"## broken losses ({len(c.BROKEN)}): the check meant to catch each")
    table(["entry", "meant check: verdict", "status", "seconds", "default battery flags" if args.full else "-"], rows)

    rows, clean, false_alarms = [], 0, 0
    correct_time = 0.0
    for e in c.CORRECT:
        expect = tuple(n for n in e.declaration.get("expect", ()) if n in known)
        t0 = time.perf_counter()
        res = lossguard.run(e.spec(expect=expect), effort=args.effort)
        seconds = time.perf_counter() - t0
        correct_time += seconds
        flagged = [ch.name for ch in res.checks if not ch.ok]
        known_fa = [n for n in flagged if (e.id, n) in c.KNOWN_FALSE_ALARMS]
        ran = sum(ch.verdict == "pass" for ch in res.checks)
        clean += not flagged
        per.setdefault((framework(e), "correct clean"), []).append((not flagged, seconds))
        false_alarms += bool(known_fa) and len(known_fa) == len(flagged)
        status = "clean" if not flagged else ("known false alarm" if len(known_fa) == len(flagged) else "FLAGGED")
        rows.append([e.id, ran, ",".join(flagged) or "-", status, seconds])
    print(f"## correct losses ({len(c.CORRECT)}): the whole default battery")
    table(["entry", "checks passed", "flagged by", "status", "seconds"], rows)

    n_b = len(c.BROKEN) - missing_checks
    print("## summary")
    table(["what", "count", "of", "seconds total", "seconds per entry"], [
        ["broken caught by the meant check", caught, n_b, broken_time, broken_time / max(n_b, 1)],
        ["  of which a known gap in one meant check", gaps, n_b, "", ""],
        ["  broken with a meant check not registered", missing_checks, len(c.BROKEN), "", ""],
        *([["broken flagged by the full default battery", by_any, n_b, "", ""]] if args.full else []),
        ["correct left clean", clean, len(c.CORRECT), correct_time, correct_time / len(c.CORRECT)],
        ["  correct flagged only by a known false alarm", false_alarms, len(c.CORRECT), "", ""],
    ])
    print("## by framework")
    table(["framework", "what", "count", "of", "seconds per entry"],
          [[fw, what, sum(ok for ok, _ in v), len(v), sum(t for _, t in v) / len(v)]
           for (fw, what), v in sorted(per.items())])
    met = caught == n_b and missing_checks == 0 and clean + false_alarms == len(c.CORRECT) and false_alarms == 0
    print(f"target (every broken loss caught, no correct loss flagged): {'met' if met else 'not met'}")


if __name__ == "__main__":
    main()
