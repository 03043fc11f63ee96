"""Resolve ``path/to/file.py:function`` and ``package.module:function`` targets."""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import os
import sys
from collections.abc import Callable
from typing import Any

from ._suggest import bad_value, did_you_mean
from .errors import TargetLoadError

__all__ = ["load_target"]


def _load_file(path: str, what: str = "TARGET") -> Any:
    if not os.path.isfile(path):
        raise TargetLoadError(
            bad_value(what, path, "an existing .py file", "check the path (relative to the current folder)")
        )
    abspath = os.path.abspath(path)
    # A name unique to the file, so two files called losses.py never collide in sys.modules.
    digest = hashlib.sha1(abspath.encode()).hexdigest()[:10]
    modname = f"_lossguard_target_{os.path.splitext(os.path.basename(path))[0]}_{digest}"
    if modname in sys.modules:
        return sys.modules[modname]
    spec = importlib.util.spec_from_file_location(modname, abspath)
    if spec is None or spec.loader is None:
        raise TargetLoadError(bad_value(what, path, "a Python source file", "give a .py file"))
    module = importlib.util.module_from_spec(spec)
    folder = os.path.dirname(abspath)
    added = folder not in sys.path
    if added:
        sys.path.insert(0, folder)  # let the file import its neighbours
    try:
        sys.modules[modname] = module
        spec.loader.exec_module(module)
    except Exception as exc:  # the user's module failed to import: say so in one line
        sys.modules.pop(modname, None)
        raise TargetLoadError(
            bad_value(what, path, "a module that imports cleanly",
                      f"fix the error it raised on import: {type(exc).__name__}: {exc}")
        ) from None
    finally:
        if added:
            try:
                sys.path.remove(folder)
            except ValueError:
                pass
    return module


def load_target(target: str, what: str = "TARGET") -> Callable[..., Any]:
    """Load the callable named by ``target``.

    Args:
        target: ``"path/to/file.py:function"`` or ``"package.module:function"``; the function
            part may be dotted (``Class.method``).
        what: the option name used in error messages.

    Returns:
        The callable.

    Example:
        >>> fn = load_target("os.path:join")
        >>> fn("a", "b")
        'a/b'
    """
    if not isinstance(target, str) or ":" not in target:
        raise TargetLoadError(
            bad_value(what, target, "FILE.py:FUNCTION or package.module:FUNCTION",
                      "try losses.py:my_loss")
        )
    where, _, attr = target.rpartition(":")
    if not where or not attr:
        raise TargetLoadError(bad_value(what, target, "both a module and a function name", "try losses.py:my_loss"))
    if os.path.isdir(where) or where.startswith("."):
        raise TargetLoadError(bad_value(what, target, "a .py file or an importable module before the colon, not a "
                                        "folder", f"try {os.path.join(where, 'losses.py')}:{attr}"))
    if where.endswith(".py") or os.sep in where or "/" in where:
        module = _load_file(where, what)
    else:
        try:
            module = importlib.import_module(where)
        except ImportError as exc:
            raise TargetLoadError(
                bad_value(what, target, "an importable module",
                          f"install it or give a file path instead ({exc})")
            ) from None
        except Exception as exc:
            raise TargetLoadError(
                bad_value(what, target, "a module that imports cleanly",
                          f"fix the error it raised on import: {type(exc).__name__}: {exc}")
            ) from None
    obj: Any = module
    for part in attr.split("."):
        if not hasattr(obj, part):
            names = [n for n in dir(obj) if not n.startswith("_") and callable(getattr(obj, n, None))]
            hint = did_you_mean(part, names) if names else f"{where} defines no functions; define {part} there"
            raise TargetLoadError(bad_value(what, target, f"a name defined in {where}", hint))
        obj = getattr(obj, part)
    if not callable(obj):
        raise TargetLoadError(bad_value(what, target, "a callable", "name a function, not a value"))
    return obj
