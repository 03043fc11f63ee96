"""Close-match suggestions for unknown names in error messages."""

from __future__ import annotations

import difflib
from collections.abc import Iterable


def did_you_mean(name: str, choices: Iterable[str]) -> str:
    """Return ``"try 'x'"`` for the closest choice, or a list of all choices if none is close."""
    options = sorted(choices)
    close = difflib.get_close_matches(str(name), options, n=1, cutoff=0.6)
    if close:
        return f"try {close[0]!r}"
    return "choose one of " + ", ".join(repr(o) for o in options)


def bad_value(name: str, value: object, expected: str, hint: str) -> str:
    """Format the house error message ``"name=value: expected …; try …"``."""
    return f"{name}={value!r}: expected {expected}; {hint}"
