"""lossguard: a numerical test battery for classification loss functions.

Declare what a loss is with :func:`declare`, run the battery with :func:`run`, read the
:class:`Result`. The command line (``lossguard check``) and the pytest plugin sit on top.

Names are imported on first use (PEP 562), so that installing lossguard — whose pytest plugin
loads in every pytest session — does not make every test run import JAX.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

_EXPORTS: dict[str, tuple[str, str]] = {
    "declare": ("spec", "declare"),
    "LossSpec": ("spec", "LossSpec"),
    "run": ("runner", "run"),
    "load_target": ("loading", "load_target"),
    "Result": ("result", "Result"),
    "CheckResult": ("result", "CheckResult"),
    "Example": ("result", "Example"),
    "battery": ("pytest_plugin", "battery"),
    "compare_losses": ("compare", "compare"),
    "Comparison": ("compare", "Comparison"),
    "precision_profile": ("profile", "profile"),
    "LossguardError": ("errors", "LossguardError"),
    "SpecError": ("errors", "SpecError"),
    "TargetLoadError": ("errors", "TargetLoadError"),
    "LossCallError": ("errors", "LossCallError"),
    "CheckNameError": ("errors", "CheckNameError"),
}

__all__ = ["__version__", *_EXPORTS]

if TYPE_CHECKING:  # pragma: no cover - for type checkers and IDEs only
    from .compare import Comparison
    from .compare import compare as compare_losses
    from .errors import CheckNameError, LossCallError, LossguardError, SpecError, TargetLoadError
    from .loading import load_target
    from .profile import profile as precision_profile
    from .pytest_plugin import battery
    from .result import CheckResult, Example, Result
    from .runner import run
    from .spec import LossSpec, declare


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        module, attr = _EXPORTS[name]
        value = getattr(importlib.import_module(f"{__name__}.{module}"), attr)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'lossguard' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)
