"""The target options shared by ``check``, ``profile`` and ``compare``."""

from __future__ import annotations

import argparse
import json
from typing import Any

from .._suggest import bad_value
from ..errors import SpecError
from ..loading import load_target
from ..options import add_to_argparse
from .._range import DEFAULT_MAX_LOGIT
from ..spec import AUTOCAST_DTYPES, INPUTS, KINDS, LossSpec, declare
from ..tolerance import DTYPES

__all__ = ["add_target_options", "parse_params", "spec_from_args"]


def add_target_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--kind", required=True, choices=KINDS, help="what the targets are")
    parser.add_argument("--inputs", default="logits", choices=INPUTS, help="what the predictions are")
    parser.add_argument("--reference", metavar="NAME", help="registry loss it must equal (see `lossguard references`)")
    parser.add_argument("--param", action="append", default=[], metavar="KEY=VALUE",
                        help="parameter passed to the loss and the reference; VALUE parsed as JSON, else a string "
                        "(a VALUE that starts like JSON — [, {, \", a digit — must be valid JSON)")
    parser.add_argument("--classes", type=int, metavar="N", help="fix the class count")
    parser.add_argument("--ignore-label", type=int, metavar="INT", help="categorical: label meaning 'leave out'")
    parser.add_argument("--reduction", default="mean", choices=("mean", "sum"), help="how a scalar output was reduced")
    parser.add_argument("--grad", metavar="TARGET", help="closed-form gradient w.r.t. the predictions")
    parser.add_argument("--skip", action="append", default=[], metavar="NAME", help="turn a default check off")
    parser.add_argument("--expect", action="append", default=[], metavar="NAME", help="turn an optional check on")
    parser.add_argument("--dtypes", default=",".join(DTYPES), metavar="LIST",
                        help="the precisions the loss is used in, comma-separated (default: all four)")
    parser.add_argument("--max-logit", default=f"{DEFAULT_MAX_LOGIT:g}", metavar="X",
                        help=f"the largest |logit| the loss must handle (default {DEFAULT_MAX_LOGIT:g}, common "
                             "practice), or 'full' for the whole format; beyond it results are information")
    parser.add_argument("--train", action="store_true", help="torch module: judge it in train mode (default: eval)")
    parser.add_argument("--autocast", choices=AUTOCAST_DTYPES, metavar="DTYPE",
                        help="torch loss: it runs under CPU autocast to DTYPE (bfloat16 or float16)")
    add_to_argparse(parser)


def parse_params(items: list[str]) -> dict[str, Any]:
    """``["gamma=2", "weight=[1,2]", "mode=fast"]`` → ``{"gamma": 2, "weight": [1, 2], "mode": "fast"}``."""
    out: dict[str, Any] = {}
    for item in items:
        key, sep, text = item.partition("=")
        if not sep or not key:
            raise SpecError(bad_value("--param", item, "KEY=VALUE", "try --param gamma=2.0"))
        try:
            out[key] = json.loads(text)
        except json.JSONDecodeError as exc:
            if text[:1] in "[{\"" or text[:1].isdigit() or text[:1] in "-.":
                # it looks like JSON (a list, an object, a number): a typo, not a string
                raise SpecError(bad_value("--param", item, f"a valid JSON value ({exc.msg} at character "
                                          f"{exc.pos})", "try --param weight=[1,2,0.5]; quote a string "
                                          "as --param 'mode=\"fast\"'")) from None
            out[key] = text
    return out


def spec_from_args(args: argparse.Namespace, target: str) -> LossSpec:
    loss = load_target(target)
    grad = load_target(args.grad, "--grad") if args.grad else None
    return declare(
        loss, kind=args.kind, inputs=args.inputs, params=parse_params(args.param),
        reference=args.reference, ignore_label=args.ignore_label, grad=grad, classes=args.classes,
        reduction=args.reduction, skip=args.skip, expect=args.expect, name=target,
        dtypes=args.dtypes, max_logit=args.max_logit,
        train=getattr(args, "train", False), autocast=getattr(args, "autocast", None),
    )
