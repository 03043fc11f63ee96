"""The ``lossguard`` command: a thin layer over :func:`lossguard.run` and friends.

Exit codes: 0 every check passed; 1 at least one failed; 2 the command or the loss could not
be used (a one-line message on stderr says why and what to do).
"""

from __future__ import annotations

import argparse
import importlib
import sys

from .commands import COMMANDS
from .errors import LossguardError

__all__ = ["main", "build_parser"]


def build_parser() -> tuple[argparse.ArgumentParser, dict[str, object]]:
    parser = argparse.ArgumentParser(
        prog="lossguard",
        description="Numerical test battery for classification losses.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    modules = {}
    for name in COMMANDS:
        try:
            module = importlib.import_module(f"lossguard.commands.{name}")
        except ImportError:  # a command whose optional module is not there
            continue
        module.add_parser(sub)
        modules[name] = module
    return parser, modules


def main(argv: list[str] | None = None) -> int:
    parser, modules = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(modules[args.command].main(args))  # type: ignore[attr-defined]
    except LossguardError as exc:
        sys.stderr.write(f"lossguard: {exc}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("lossguard: interrupted\n")
        return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
