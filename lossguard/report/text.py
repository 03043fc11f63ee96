"""The terminal report: one line per check, then the evidence for each failure."""

from __future__ import annotations

import numpy as np

from ..result import CheckResult, Example, Result

__all__ = ["render", "render_check", "render_example"]

_MARK = {"pass": "ok  ", "fail": "FAIL", "skip": "skip", "error": "ERR "}
_COLOUR = {"pass": "32", "fail": "31", "skip": "90", "error": "33"}


def _paint(text: str, verdict: str, color: bool) -> str:
    return f"\x1b[{_COLOUR[verdict]}m{text}\x1b[0m" if color else text


def _short(a: object) -> str:
    if isinstance(a, str):
        return a
    arr = np.asarray(a)
    if arr.size == 1:
        return f"{float(arr.reshape(-1)[0]):.9g}"
    with np.printoptions(precision=6, threshold=24, edgeitems=4, linewidth=100):
        return np.array2string(arr, separator=", ").replace("\n", "\n                 ")


def render_example(e: Example) -> str:
    lines = [f"      worst case: {e.what}" + (f"  [{e.note}]" if e.note else "")]
    lines.append(f"        predictions  {_short(e.predictions)}")
    lines.append(f"        targets      {_short(e.targets)}")
    lines.append(f"        got          {_short(e.got)}")
    lines.append(f"        expected     {_short(e.expected)}")
    if np.isfinite(e.abs_err) or np.isfinite(e.allowance):
        lines.append(f"        abs error {e.abs_err:.3g}, rel error {e.rel_err:.3g}, allowed {e.allowance:.3g}")
    if e.replay:
        lines.append(f"        replay: {e.replay}")
    return "\n".join(lines)


def render_check(c: CheckResult, color: bool = False, most: int = 2) -> str:
    head = f"  {_paint(_MARK[c.verdict], c.verdict, color)}  {c.name:<14} {c.summary}"
    lines = [head]
    if c.verdict == "fail":
        if c.allowance:
            lines.append(f"      allowance: {c.allowance}")
        for e in c.worst[:most]:
            lines.append(render_example(e))
        if c.hint:
            lines.append(f"      hint: {c.hint}")
    return "\n".join(lines)


def render(result: Result, color: bool = False) -> str:
    spec = result.spec
    head = (f"lossguard: {result.target}  (kind={spec['kind']}, inputs={spec['inputs']}"
            + (f", reference={spec['reference']}" if spec.get("reference") else "")
            + f", seed={result.seed}, effort={result.effort}, output={result.evaluation.get('output')},"
            f" adapter={result.evaluation.get('adapter')})")
    lines = [head]
    for c in result.checks:
        lines.append(render_check(c, color))
    counts = {v: sum(c.verdict == v for c in result.checks) for v in ("pass", "fail", "error", "skip")}
    tail = (f"{counts['pass']} passed, {counts['fail']} failed, {counts['error']} errors, "
            f"{counts['skip']} skipped in {result.seconds:.1f}s ({result.loss_evaluations} loss evaluations)")
    lines.append(_paint(tail, "pass" if result.ok else "fail", color))
    return "\n".join(lines) + "\n"
