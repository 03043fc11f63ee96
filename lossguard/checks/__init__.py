"""The check registry: every module here that defines ``CHECK`` is a check.

Adding a check is adding one module (see DEVELOPERS.md); nothing else in the tree changes.
"""

from __future__ import annotations

import importlib
import pkgutil

from ..errors import CheckNameError
from .._suggest import did_you_mean
from ..spec import LossSpec
from ._base import Check, Context

__all__ = ["Check", "Context", "all_checks", "get_check", "select_checks"]

_REGISTRY: dict[str, Check] = {}


def all_checks() -> dict[str, Check]:
    """Every known check by name, in battery order."""
    if not _REGISTRY:
        found = []
        for info in pkgutil.iter_modules(__path__):
            if info.name.startswith("_"):
                continue
            module = importlib.import_module(f"{__name__}.{info.name}")
            check = getattr(module, "CHECK", None)
            if isinstance(check, Check):
                found.append(check)
        for check in sorted(found, key=lambda c: (c.order, c.name)):
            _REGISTRY[check.name] = check
    return dict(_REGISTRY)


def get_check(name: str) -> Check:
    checks = all_checks()
    if name not in checks:
        raise CheckNameError(f"check={name!r}: expected a check name; {did_you_mean(name, checks)}")
    return checks[name]


def select_checks(spec: LossSpec, only: list[str] | None = None) -> list[tuple[Check, str | None]]:
    """The battery for ``spec``: each check with ``None`` (run it) or the reason it is skipped.

    Defaults by kind and inputs, plus ``spec.expect``, minus ``spec.skip``; ``only`` restricts
    the battery to the named checks. Unknown names raise :class:`CheckNameError`.
    """
    checks = all_checks()
    for name in list(spec.skip) + list(spec.expect) + list(only or []):
        get_check(name)
    out: list[tuple[Check, str | None]] = []
    for check in checks.values():
        if only is not None and check.name not in only:
            continue
        reason = check.applies(spec)
        if reason is None and check.name in spec.skip:
            reason = "turned off with skip"
        elif reason is None and not (check.default(spec) or check.name in spec.expect or only):
            reason = f"optional: turn on with --expect {check.name} (expect=[{check.name!r}] in Python)"
        out.append((check, reason))
    return out
