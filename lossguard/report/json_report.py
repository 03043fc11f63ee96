"""The JSON report. Schema (``schema`` = "lossguard-result/1"):

``{"schema", "target", "spec", "seed", "effort", "versions", "evaluation", "seconds",
"loss_evaluations", "ok", "checks": [{"name", "verdict", "summary", "cases", "failed",
"allowance", "hint", "details", "seconds", "worst": [{"what", "predictions", "targets", "got",
"expected", "abs_err", "rel_err", "allowance", "note", "replay"}]}]}``. Non-finite floats are
written as the strings "nan", "inf", "-inf" so the file is strict JSON.
"""

from __future__ import annotations

import json
import math
from typing import Any

from ..result import Result

__all__ = ["SCHEMA", "to_json", "write_json"]

SCHEMA = "lossguard-result/1"


def _strict(x: Any) -> Any:
    if isinstance(x, float) and not math.isfinite(x):
        return "nan" if math.isnan(x) else ("inf" if x > 0 else "-inf")
    if isinstance(x, dict):
        return {k: _strict(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_strict(v) for v in x]
    return x


def to_json(result: Result) -> str:
    data = {"schema": SCHEMA, **result.to_dict()}
    return json.dumps(_strict(data), indent=2, allow_nan=False)


def write_json(result: Result, path: str) -> None:
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(to_json(result) + "\n")
