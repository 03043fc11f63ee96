"""Report paths (``--json``, ``--markdown``, ``--png``): checked before the battery runs, and
every write failure turned into one line.

The convention: a report goes into an existing folder. A missing folder, a path that is a
folder, or a place this process cannot write is refused before any work (exit 2), with the fix;
nothing is created but the report itself. A write that still fails afterwards (a full disk) is
one line too, never a traceback.

Example:
    >>> check_report_paths(json=None)   # nothing asked for: nothing to check
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager

from ._suggest import bad_value
from .errors import LossguardError

__all__ = ["ReportPathError", "check_report_paths", "writing"]


class ReportPathError(LossguardError):
    """A report cannot be written where it was asked for."""


def _problem(path: str) -> tuple[str, str] | None:
    """(what was expected, what to try) for an unusable path, or ``None``."""
    folder = os.path.dirname(os.path.abspath(path))
    if os.path.isdir(path):
        return "a file path, not a folder", f"try {os.path.join(path, 'report')}"
    if not os.path.exists(folder):
        return "a file in an existing folder", f"create it first (mkdir -p {os.path.dirname(path) or '.'})"
    if not os.path.isdir(folder):
        return "a file in a folder", f"{os.path.dirname(path)} is a file; choose another path"
    existed = os.path.exists(path)
    try:  # the only test that holds for every user (root included) and file system: open it
        with open(path, "a", encoding="utf-8"):
            pass
    except OSError as exc:
        return "a path this process can write", f"choose another place ({exc.strerror or exc})"
    if not existed:
        os.remove(path)
    return None


def check_report_paths(**paths: str | None) -> None:
    """Raise :class:`ReportPathError` for the first unusable path; keyword names are the flags
    (``json="out/r.json"`` is ``--json``)."""
    for flag, path in paths.items():
        if not path:
            continue
        problem = _problem(path)
        if problem is not None:
            raise ReportPathError(bad_value(f"--{flag}", path, problem[0], problem[1]))


@contextmanager
def writing(flag: str, path: str) -> Iterator[None]:
    """Turn an ``OSError`` while writing ``path`` into one :class:`ReportPathError` line."""
    try:
        yield
    except OSError as exc:
        raise ReportPathError(bad_value(f"--{flag}", path, "a report written there",
                                        f"the write failed ({exc.strerror or exc}); choose another path")) from None
