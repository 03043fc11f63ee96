"""``lossguard compare OLD NEW --kind …``: do two implementations of one loss agree?

Exit codes: 0 they agree on every case, 1 they diverge (the report shows the largest divergence
and the smallest input that shows it), 2 a target or the declaration could not be used.
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import replace

from .._paths import check_report_paths
from .._suggest import bad_value
from ..compare import compare
from ..errors import SpecError
from ..loading import load_target
from ..report import progress_for, render_comparison, wants_colour, write_comparison_reports
from ._target import add_target_options, spec_from_args

HELP = "compare two implementations of one loss on shared generated and extreme cases"


def add_parser(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser("compare", help=HELP, description=HELP + ". The declaration options describe OLD; "
                       "NEW is the same declaration with another function. A --reference only restricts the "
                       "generated targets to its domain; --skip and --expect do not apply (given, they are refused).")
    p.add_argument("old", metavar="OLD", help="path/to/file.py:function or package.module:function")
    p.add_argument("new", metavar="NEW", help="the other implementation, same forms")
    add_target_options(p)
    p.add_argument("--new-grad", metavar="TARGET", help="closed-form gradient of NEW (--grad is OLD's)")
    p.add_argument("--json", metavar="PATH", help="write the comparison as JSON")
    p.add_argument("--markdown", metavar="PATH", help="write a markdown summary")
    return p


def main(args: argparse.Namespace) -> int:
    for flag in ("skip", "expect"):
        if getattr(args, flag):
            raise SpecError(bad_value(f"--{flag}", getattr(args, flag)[0], "no check names with compare (it "
                                      "compares values and gradients; it runs no checks)", f"drop --{flag}"))
    old = spec_from_args(args, args.old)
    check_report_paths(json=args.json, markdown=args.markdown)
    new = old.with_loss(load_target(args.new, "NEW"), name=args.new)
    if args.new_grad:
        new = replace(new, grad=load_target(args.new_grad, "--new-grad"))
    with progress_for(sys.stdout, title="compare", heartbeat=sys.stderr) as update:
        result = compare(old, new, seed=args.seed, effort=args.effort, progress=update,
                         call_timeout=args.call_timeout, time_budget=args.time_budget)
    sys.stdout.write(render_comparison(result, color=wants_colour(sys.stdout)))
    write_comparison_reports(result, json_path=args.json, markdown_path=args.markdown)
    return result.exit_code
