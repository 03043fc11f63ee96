"""A markdown summary fit for a CI job summary or a pull-request comment."""

from __future__ import annotations

from ..result import Result

__all__ = ["to_markdown", "write_markdown"]

_ICON = {"pass": "passed", "fail": "**FAILED**", "skip": "skipped", "error": "**could not run**"}


def to_markdown(result: Result) -> str:
    s = result.spec
    lines = [
        f"### lossguard: `{result.target}`",
        "",
        f"kind `{s['kind']}`, inputs `{s['inputs']}`"
        + (f", reference `{s['reference']}`" if s.get("reference") else "")
        + f", seed {result.seed}, effort {result.effort}",
        "",
        "| check | verdict | cases | what happened |",
        "| --- | --- | ---: | --- |",
    ]
    for c in result.checks:
        summary = c.summary.replace("|", "\\|")
        lines.append(f"| `{c.name}` | {_ICON[c.verdict]} | {c.cases} | {summary} |")
    failed = [c for c in result.checks if c.verdict in ("fail", "error")]
    for c in failed:
        lines += ["", f"#### `{c.name}`", "", c.summary]
        if c.allowance:
            lines += ["", f"Allowance: {c.allowance}"]
        for e in c.worst[:1]:
            lines += ["", "```", f"{e.what}: got {e.got}, expected {e.expected}", f"{e.replay}", "```"]
        if c.hint:
            lines += ["", f"Hint: {c.hint}"]
    lines += ["", f"{'All checks passed' if result.ok else 'Some checks failed'} in {result.seconds:.1f} s."]
    return "\n".join(lines) + "\n"


def write_markdown(result: Result, path: str) -> None:
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(to_markdown(result))
