"""A progress indicator for long runs, shown only when the output is a terminal.

:func:`progress_for` yields a callback ``update(label, done, total)`` that the runner and
``compare`` call before each step, or ``None`` when there is nothing to show (the stream is not a
terminal, or the optional ``rich`` package is missing). The bar is transient: it disappears
before the report is printed, so the report reads the same with and without it.

Example:
    >>> import io
    >>> with progress_for(io.StringIO()) as update:   # not a terminal: nothing is drawn
    ...     update is None
    True
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import IO, Any

__all__ = ["progress_for", "Update"]

#: ``update(label, done, total)``: ``done`` steps of ``total`` finished, ``label`` starting.
Update = Callable[[str, int, int], None]


def _is_terminal(stream: IO[Any]) -> bool:
    isatty = getattr(stream, "isatty", None)
    return bool(isatty and isatty())


@contextmanager
def progress_for(stream: IO[Any] | None = None, *, title: str = "lossguard") -> Iterator[Update | None]:
    """A transient progress bar on ``stream`` (default stdout) if it is a terminal.

    Args:
        stream: where the bar is drawn.
        title: the word in front of the current step's label.

    Yields:
        The update callback, or ``None`` when no bar is drawn.
    """
    stream = sys.stdout if stream is None else stream
    if not _is_terminal(stream):
        yield None
        return
    try:
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
    except ImportError:  # rich is optional (pip install lossguard[progress])
        yield None
        return
    console = Console(file=stream, force_terminal=True)
    columns = (TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn())
    with Progress(*columns, console=console, transient=True) as bar:
        task = bar.add_task(title, total=None)

        def update(label: str, done: int, total: int) -> None:
            bar.update(task, description=f"{title}: {label}", completed=done, total=total)

        yield update
