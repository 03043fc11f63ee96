"""The ``lossguard`` command: a thin layer over :func:`lossguard.run` and friends.

Exit codes: 0 every check passed; 1 at least one failed; 2 the command or the loss could not
be used (a one-line message on stderr says why and what to do).
"""

from __future__ import annotations

import argparse
import importlib
import re
import sys

from .commands import COMMANDS
from ._deadline import Stopped
from .errors import LossguardError

__all__ = ["main", "build_parser", "for_the_command_line"]


def for_the_command_line(message: str) -> str:
    """A library message in the command's own syntax: the library's hint "try passing gamma=2.0"
    (a keyword of ``declare``'s ``params``) becomes "try --param gamma=2.0"."""
    return re.sub(r"\btry passing (\w+)=", r"try --param \1=", message)


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
    except (LossguardError, Stopped) as exc:  # Stopped: a call of the loss timed out or returned junk
        sys.stderr.write(f"lossguard: {for_the_command_line(str(exc))}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("lossguard: interrupted\n")
        return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
