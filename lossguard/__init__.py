"""lossguard: a numerical test battery for classification loss functions.

Declare what a loss is with :func:`declare`, run the battery with :func:`run`, read the
:class:`Result`. The command line (``lossguard check``) and the pytest plugin sit on top.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .errors import CheckNameError, LossCallError, LossguardError, SpecError, TargetLoadError
from .loading import load_target
from .result import CheckResult, Example, Result
from .runner import run
from .spec import LossSpec, declare

__all__ = [
    "__version__",
    "declare",
    "run",
    "load_target",
    "LossSpec",
    "Result",
    "CheckResult",
    "Example",
    "LossguardError",
    "SpecError",
    "TargetLoadError",
    "LossCallError",
    "CheckNameError",
]
