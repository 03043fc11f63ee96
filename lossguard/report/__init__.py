"""Reports: text for the terminal, JSON for machines, markdown for CI summaries."""

from __future__ import annotations

from ..result import Result
from .json_report import to_json, write_json
from .markdown import to_markdown, write_markdown
from .text import render

__all__ = ["render", "to_json", "to_markdown", "write_json", "write_markdown", "write_reports"]


def write_reports(result: Result, *, json_path: str | None = None, markdown_path: str | None = None) -> None:
    """Write whichever reports were asked for."""
    if json_path:
        write_json(result, json_path)
    if markdown_path:
        write_markdown(result, markdown_path)
