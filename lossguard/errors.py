"""The one exception hierarchy of lossguard.

Every error the library raises on purpose derives from :class:`LossguardError` and carries a
one-line message of the form ``"name=value: expected …; try …"``.
"""

from __future__ import annotations

__all__ = [
    "LossguardError",
    "SpecError",
    "TargetLoadError",
    "LossCallError",
    "CheckNameError",
]


class LossguardError(Exception):
    """Base class of every error lossguard raises deliberately."""


class SpecError(LossguardError, ValueError):
    """A loss declaration is malformed (unknown kind, bad parameter, wrong signature …)."""


class TargetLoadError(LossguardError):
    """A ``path/to/file.py:function`` or ``package.module:function`` target could not be loaded."""


class LossCallError(LossguardError):
    """The user's loss raised, or returned something of the wrong shape or type, on a probe call."""


class CheckNameError(LossguardError, ValueError):
    """An unknown check name was given to ``skip`` or ``expect``."""
