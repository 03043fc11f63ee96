"""The terminal report: one line per check, then the evidence for each failure.

Colour (ANSI escapes) is added only when the caller asks for it; callers ask when the output is a
terminal (:func:`wants_colour`). ``render`` reports a battery, ``render_comparison`` a comparison
of two implementations, ``one_line_example`` a worst case in one line (pytest's closing summary).
"""

from __future__ import annotations

import os
from typing import IO, TYPE_CHECKING, Any

import numpy as np

from ..result import CAUTION, CheckResult, Example, Result

if TYPE_CHECKING:
    from ..compare import Comparison

__all__ = ["render", "render_check", "render_example", "render_comparison", "one_line_example", "inline", "wants_colour"]


def wants_colour(stream: IO[Any]) -> bool:
    """Colour only on a terminal, and never when ``NO_COLOR`` is set (the no-color.org
    convention, common practice)."""
    isatty = getattr(stream, "isatty", None)
    return bool(isatty and isatty()) and not os.environ.get("NO_COLOR")


_MARK = {"pass": "ok  ", "fail": "FAIL", "skip": "skip", "error": "ERR "}
_COLOUR = {"pass": "32", "fail": "31", "skip": "90", "error": "33"}


def _paint(text: str, verdict: str, color: bool) -> str:
    return f"\x1b[{_COLOUR[verdict]}m{text}\x1b[0m" if color else text


def _short(a: object, indent: int = 21) -> str:
    """A value, or an array over several lines continued at column ``indent``."""
    if isinstance(a, str):
        return a
    arr = np.asarray(a)
    if arr.ndim == 0:
        return f"{float(arr):.9g}"
    with np.printoptions(precision=6, threshold=24, edgeitems=4, linewidth=100):
        return np.array2string(arr, separator=", ").replace("\n", "\n" + " " * indent)


def inline(a: object, *, precision: int = 4, threshold: int = 6) -> str:
    """A value or array on one line; arrays above ``threshold`` elements are shortened."""
    if isinstance(a, str):
        return a
    arr = np.asarray(a)
    if arr.ndim == 0:
        return f"{float(arr):.{precision + 2}g}"
    with np.printoptions(precision=precision, threshold=threshold, edgeitems=2, linewidth=10_000):
        return " ".join(np.array2string(arr, separator=", ").split())


def one_line_example(e: Example) -> str:
    """``what [note]: got …, expected …`` on one line."""
    note = f" [{e.note}]" if e.note else ""
    return f"{e.what}{note}: got {inline(e.got)}, expected {inline(e.expected)}"


def render_example(e: Example, smallest: bool = False) -> str:
    """A worst case, or (``smallest``) the smallest failing input found, whose note names its shape."""
    head = f"{e.note}: {e.what}" if smallest else f"worst case: {e.what}" + (f"  [{e.note}]" if e.note else "")
    lines = [f"      {head}"]
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
        if c.smallest is not None:
            lines.append(render_example(c.smallest, smallest=True))
        if c.hint:
            lines.append(f"      hint: {c.hint}")
    return "\n".join(lines)


def render(result: Result, color: bool = False) -> str:
    spec = result.spec
    head = (f"lossguard: {result.target}  (kind={spec['kind']}, inputs={spec['inputs']}"
            + (f", reference={spec['reference']}" if spec.get("reference") else "")
            + "".join(f", {k}={v}" for k, v in (spec.get("params") or {}).items())
            + (f", classes={spec['classes']}" if spec.get("classes") else "")
            + (f", dtypes={','.join(spec['dtypes'])}" if spec.get("dtypes") and len(spec["dtypes"]) < 4 else "")
            + (f", max_logit={spec['max_logit']}" if spec.get("max_logit") and spec.get("inputs") == "logits" else "")
            + f", seed={result.seed}, effort={result.effort}, output={result.evaluation.get('output')},"
            f" adapter={result.evaluation.get('adapter')})")
    lines = [head]
    lines += [f"  note: {n}" for n in result.evaluation.get("notes", [])]
    for c in result.checks:
        lines.append(render_check(c, color))
    counts = {v: sum(c.verdict == v for c in result.checks) for v in ("pass", "fail", "error", "skip")}
    tail = (f"{counts['pass']} passed, {counts['fail']} failed, {counts['error']} errors, "
            f"{counts['skip']} skipped in {result.seconds:.1f}s ({result.loss_evaluations} loss evaluations); "
            f"{CAUTION}")
    lines.append(_paint(tail, "pass" if result.ok else "fail", color))
    return "\n".join(lines) + "\n"


def _pair(title: str, e: Example) -> list[str]:
    """A comparison example: inputs, then OLD (``expected``) and NEW (``got``)."""
    lines = [f"{title}: {e.what}" + (f"  [{e.note}]" if e.note else "")]
    lines.append(f"    predictions  {_short(e.predictions, 17)}")
    lines.append(f"    targets      {_short(e.targets, 17)}")
    lines.append(f"    OLD          {_short(e.expected, 17)}")
    lines.append(f"    NEW          {_short(e.got, 17)}")
    if np.isfinite(e.abs_err):
        lines.append(f"    difference {e.abs_err:.3g}, allowed {e.allowance:.3g}")
    if e.replay:
        lines.append(f"    replay: {e.replay}")
    return lines


def render_comparison(c: Comparison, color: bool = False) -> str:
    """The terminal report of ``lossguard compare``."""
    spec, ev = c.spec, c.evaluation
    head = (f"lossguard compare: OLD {c.old}  vs  NEW {c.new}  (kind={spec['kind']}, inputs={spec['inputs']}"
            f", seed={c.seed}, effort={c.effort}, adapters {ev['old']['adapter']} / {ev['new']['adapter']})")
    lines = [head]
    for p in c.parts:
        lines.append(f"  {_paint(_MARK[p.verdict], p.verdict, color)}  {p.name:<17} {p.summary}")
        if p.verdict == "fail" and p.allowance:
            lines.append(f"      allowance: {p.allowance}")
    if c.largest is not None:
        lines += _pair("largest divergence", c.largest)
    if c.smallest is not None:
        lines += _pair("smallest input that shows it", c.smallest)
    verdict = "the implementations agree" if c.agree else "the implementations diverge"
    tail = (f"{verdict} (exit {c.exit_code}) in {c.seconds:.1f}s ({c.loss_evaluations} loss evaluations); "
            f"agreement is evidence from the inputs tried, not proof")
    lines.append(_paint(tail, "pass" if c.agree else "fail", color))
    return "\n".join(lines) + "\n"
