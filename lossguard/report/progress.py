"""A progress indicator for long runs, shown only when the output is a terminal.

:func:`progress_for` yields a callback ``update(label, done, total)`` that the runner and
``compare`` call before each step, or ``None`` when there is nothing to show (the stream is not a
terminal, or the optional ``rich`` package is missing). The bar is transient: it disappears
before the report is printed, so the report reads the same with and without it. When the output
is not a terminal (piped, or in CI) and a ``heartbeat`` stream is given, a run that lasts more
than :data:`HEARTBEAT_AFTER` seconds after its first step writes one line there every :data:`HEARTBEAT_EVERY` seconds
saying what it is doing, so a slow run is never silent.

Example:
    >>> import io
    >>> with progress_for(io.StringIO()) as update:   # not a terminal: nothing is drawn
    ...     update is None
    True
"""

from __future__ import annotations

import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import IO, Any

__all__ = ["progress_for", "Update", "HEARTBEAT_AFTER", "HEARTBEAT_EVERY"]

#: Seconds before the first heartbeat line, and between two.
HEARTBEAT_AFTER = 5.0
HEARTBEAT_EVERY = 15.0

#: ``update(label, done, total)``: ``done`` steps of ``total`` finished, ``label`` starting.
Update = Callable[[str, int, int], None]


def _is_terminal(stream: IO[Any]) -> bool:
    isatty = getattr(stream, "isatty", None)
    return bool(isatty and isatty())


@contextmanager
def _heartbeat(stream: IO[Any], title: str) -> Iterator[Update]:
    """Yield an update callback; a daemon thread writes the current step to ``stream`` after
    :data:`HEARTBEAT_AFTER` seconds and then every :data:`HEARTBEAT_EVERY` seconds."""
    now: dict[str, Any] = {"label": "", "done": 0, "total": 0}
    start, stop, begun = [time.monotonic()], threading.Event(), threading.Event()

    def beat() -> None:
        begun.wait()  # counted from the first step: before it, a bad input ends with one line
        wait = HEARTBEAT_AFTER
        while not stop.wait(wait):
            if now["total"] and now["done"] >= now["total"]:
                continue  # the steps are over; what is left is writing the report
            of = f", {now['done']} of {now['total']} done" if now["total"] else ""
            stream.write(f"{title}: still running: {now['label']}{of}, {time.monotonic() - start[0]:.0f} s\n")
            stream.flush()
            wait = HEARTBEAT_EVERY

    def update(label: str, done: int, total: int) -> None:
        now.update(label=label, done=done, total=total)
        if not begun.is_set():
            start[0] = time.monotonic()
            begun.set()

    thread = threading.Thread(target=beat, name="lossguard-heartbeat", daemon=True)
    thread.start()
    try:
        yield update
    finally:
        stop.set()
        begun.set()
        thread.join(1.0)


@contextmanager
def progress_for(stream: IO[Any] | None = None, *, title: str = "lossguard",
                 heartbeat: IO[Any] | None = None) -> Iterator[Update | None]:
    """A transient progress bar on ``stream`` (default stdout) if it is a terminal.

    Args:
        stream: where the bar is drawn.
        title: the word in front of the current step's label.
        heartbeat: where a slow run writes a line now and then when ``stream`` is not a
            terminal (the command line passes stderr); ``None``: nowhere.

    Yields:
        The update callback, or ``None`` when nothing is shown.
    """
    stream = sys.stdout if stream is None else stream
    bar = None
    if _is_terminal(stream):
        try:
            from rich.console import Console
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

            columns = (TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn())
            bar = Progress(*columns, console=Console(file=stream, force_terminal=True), transient=True)
        except ImportError:  # rich is optional (pip install lossguard[progress])
            bar = None
    if bar is None:
        if heartbeat is None:
            yield None
        else:
            with _heartbeat(heartbeat, title) as update:
                yield update
        return
    with bar:
        task = bar.add_task(title, total=None)

        def update(label: str, done: int, total: int) -> None:
            bar.update(task, description=f"{title}: {label}", completed=done, total=total)

        yield update
