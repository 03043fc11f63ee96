"""Reports: text for the terminal, JSON for machines, markdown for CI summaries, a progress bar.

Rendering only: every function here reads a :class:`~lossguard.result.Result` (or a
:class:`~lossguard.compare.Comparison`) and nothing else.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from .._paths import writing
from ..result import Result
from .json_report import comparison_to_json, to_json, write_comparison_json, write_json
from .markdown import comparison_to_markdown, to_markdown, write_comparison_markdown, write_markdown
from .progress import progress_for
from .text import render, render_comparison, wants_colour

if TYPE_CHECKING:
    from ..compare import Comparison

__all__ = ["render", "render_comparison", "to_json", "comparison_to_json", "to_markdown",
           "comparison_to_markdown", "write_json", "write_markdown", "write_reports",
           "write_comparison_reports", "progress_for", "wants_colour"]


def write_reports(run: Result | Comparison, *, json_path: str | None = None,
                  markdown_path: str | None = None) -> None:
    """Write whichever reports were asked for, of a battery's result or of a comparison."""
    battery = isinstance(run, Result)
    for form, path, write in (("json", json_path, write_json if battery else write_comparison_json),
                              ("markdown", markdown_path, write_markdown if battery else write_comparison_markdown)):
        if path:
            with writing(form, path):
                write(run, path)  # type: ignore[arg-type]  (the writer matches the kind of run)


#: the same function, by the name the compare command first used
write_comparison_reports = write_reports
