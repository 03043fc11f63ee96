"""``lossguard check TARGET --kind …``: run the battery on one loss."""

from __future__ import annotations

import argparse
import sys

from .._paths import check_report_paths
from ..report import progress_for, write_reports
from ..report.text import render, wants_colour
from ..runner import run
from ._target import add_target_options, spec_from_args

HELP = "run the battery of checks on one loss"


def add_parser(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser("check", help=HELP, description=HELP)
    p.add_argument("target", metavar="TARGET", help="path/to/file.py:function or package.module:function")
    add_target_options(p)
    p.add_argument("--only", action="append", metavar="NAME", help="run just this check (repeatable)")
    p.add_argument("--json", metavar="PATH", help="write the result as JSON")
    p.add_argument("--markdown", metavar="PATH", help="write a markdown summary")
    return p


def main(args: argparse.Namespace) -> int:
    spec = spec_from_args(args, args.target)
    check_report_paths(json=args.json, markdown=args.markdown)  # before the battery, not after it
    with progress_for(sys.stdout, heartbeat=sys.stderr) as update:
        result = run(spec, seed=args.seed, effort=args.effort, only=args.only, target=args.target, progress=update,
                     call_timeout=args.call_timeout, time_budget=args.time_budget, memory_budget=args.memory_budget)
    sys.stdout.write(render(result, color=wants_colour(sys.stdout)))
    write_reports(result, json_path=args.json, markdown_path=args.markdown)
    return result.exit_code
