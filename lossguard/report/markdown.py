"""Markdown fit for a CI job summary or a pull-request comment.

A heading with the verdict, a table with one row per check (or per compared part), then, for
each failure, its allowance, its worst case and a replay line inside a collapsed ``<details>``
block so a long report stays readable in a comment thread.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from ..result import CAUTION, CheckResult, Example, Result
from .text import inline

if TYPE_CHECKING:
    from ..compare import Comparison

__all__ = ["to_markdown", "write_markdown", "comparison_to_markdown", "write_comparison_markdown"]

_WORD = {"pass": "passed", "fail": "**failed**", "skip": "skipped", "error": "**could not run**"}


def _cell(text: str) -> str:
    """Text safe inside a table cell: pipes escaped, one line."""
    return " ".join(str(text).split()).replace("|", "\\|")


def _example_block(e: Example, old_new: bool = False) -> list[str]:
    got, expected = ("NEW", "OLD") if old_new else ("got", "expected")
    def show(a: object) -> str:
        return inline(a, precision=6, threshold=40)

    lines = ["```", f"{e.what}" + (f"  [{e.note}]" if e.note else ""),
             f"predictions  {show(e.predictions)}", f"targets      {show(e.targets)}",
             f"{expected:<12} {show(e.expected)}", f"{got:<12} {show(e.got)}"]
    if e.replay:
        lines.append(e.replay)
    return lines + ["```"]


def _failure(c: CheckResult, old_new: bool = False) -> list[str]:
    lines = ["", "<details>", f"<summary><code>{c.name}</code>: {_cell(c.summary)}</summary>", ""]
    if c.allowance:
        lines += [f"Allowance: {_cell(c.allowance)}", ""]
    for e in c.worst[:1]:
        lines += _example_block(e, old_new) + [""]
    if c.smallest is not None:
        lines += _example_block(c.smallest, old_new) + [""]
    if c.hint:
        lines += [f"Hint: {_cell(c.hint)}", ""]
    return lines + ["</details>"]


def _table(rows: list[CheckResult], first: str) -> list[str]:
    lines = [f"| {first} | verdict | cases | what happened |", "| --- | --- | ---: | --- |"]
    for c in rows:
        lines.append(f"| `{c.name}` | {_WORD[c.verdict]} | {c.cases} | {_cell(c.summary)} |")
    return lines


def to_markdown(result: Result) -> str:
    """The battery report in markdown."""
    s = result.spec
    verdict = f"all checks passed ({CAUTION})" if result.ok else "some checks failed"
    lines = [
        f"### lossguard: `{result.target}` — {verdict}",
        "",
        f"kind `{s['kind']}`, inputs `{s['inputs']}`"
        + (f", reference `{s['reference']}`" if s.get("reference") else "")
        + f"; seed {result.seed}, effort {result.effort}; "
        f"lossguard {result.versions.get('lossguard', '?')}, jax {result.versions.get('jax', '?')}",
        "",
    ]
    lines += _table(result.checks, "check")
    for c in result.checks:
        if c.verdict in ("fail", "error"):
            lines += _failure(c)
    lines += ["", f"{len(result.checks)} checks in {result.seconds:.1f} s, {result.loss_evaluations} loss evaluations; "
              f"{CAUTION}."]
    return "\n".join(lines) + "\n"


def comparison_to_markdown(c: Comparison) -> str:
    """The comparison report in markdown."""
    verdict = "the implementations agree" if c.agree else "the implementations diverge"
    lines = [
        f"### lossguard compare: `{c.old}` vs `{c.new}` — {verdict}",
        "",
        f"kind `{c.spec['kind']}`, inputs `{c.spec['inputs']}`; seed {c.seed}, effort {c.effort}",
        "",
    ]
    lines += _table(c.parts, "part")
    for title, e in (("Largest divergence", c.largest), ("Smallest input that shows it", c.smallest)):
        if e is not None:
            lines += ["", f"**{title}**", ""] + _example_block(e, old_new=True)
    lines += ["", f"Compared in {c.seconds:.1f} s, {c.loss_evaluations} loss evaluations; agreement is "
              "evidence from the inputs tried, not proof."]
    return "\n".join(lines) + "\n"


def write_markdown(result: Result, path: str) -> None:
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(to_markdown(result))


def write_comparison_markdown(c: Comparison, path: str) -> None:
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(comparison_to_markdown(c))
