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


def write_reports(result: Result, *, json_path: str | None = None, markdown_path: str | None = None) -> None:
    """Write whichever reports were asked for."""
    if json_path:
        with writing("json", json_path):
            write_json(result, json_path)
    if markdown_path:
        with writing("markdown", markdown_path):
            write_markdown(result, markdown_path)


def write_comparison_reports(c: Comparison, *, json_path: str | None = None, markdown_path: str | None = None) -> None:
    """Write whichever comparison reports were asked for."""
    if json_path:
        with writing("json", json_path):
            write_comparison_json(c, json_path)
    if markdown_path:
        with writing("markdown", markdown_path):
            write_comparison_markdown(c, markdown_path)
