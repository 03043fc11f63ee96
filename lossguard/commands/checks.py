"""``lossguard checks``: list every check with what it catches."""

from __future__ import annotations

import argparse
import sys

HELP = "list the checks, what each catches, and when it runs"


def add_parser(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    return sub.add_parser("checks", help=HELP, description=HELP)


def main(args: argparse.Namespace) -> int:
    from ..checks import all_checks

    width = max(len(n) for n in all_checks())
    for check in all_checks().values():
        sys.stdout.write(f"{check.name:<{width}}  {check.summary}\n")
    return 0
