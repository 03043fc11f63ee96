"""The JSON reports: one document per battery (``--json`` of ``check``) or comparison.

The files are strict JSON (RFC 8259): non-finite floats are written as the strings ``"nan"``,
``"inf"`` and ``"-inf"``; arrays are nested lists of numbers (float64 values). Keys are only
ever added within a schema version; a removal or a change of meaning bumps the version.

Battery, ``"schema": "lossguard-result/1"``::

    schema            "lossguard-result/1"
    target            how the loss was named (the command-line TARGET, or module:function)
    spec              the declaration: name, kind, inputs, params, reference, ignore_label,
                      grad, classes, reduction, skip, expect, train, autocast
    seed, effort      the run settings (the same seed gives the same report)
    versions          lossguard, python, numpy, jax, hypothesis
    evaluation        adapter ("jax", "jax (one case at a time)", "torch", "numpy"), output
                      ("scalar" | "per_example"), reduction ("mean" | "sum" | "none"), notes
                      (one-line remarks: module mode, fallbacks, the precision each dtype was
                      judged at)
    seconds           wall time of the battery
    loss_evaluations  how many times the loss was evaluated (one per case per pass)
    ok                true when no check failed or errored
    checks            one object per check, in battery order:
        name          the check's name (as in ``lossguard checks``)
        verdict       "pass" | "fail" | "skip" | "error"
        summary       one line: what was checked and what happened
        cases         how many cases were tried;   failed: how many of them failed
        allowance     the tolerance rule, in words (from the error model)
        hint          for a failure: which assumption broke, when skipping is legitimate
        details       check-specific figures (JSON numbers, strings, lists)
        seconds       wall time of the check
        worst         up to 3 worst cases, worst first, each:
            what, note           what was compared; where the case came from
            predictions, targets the inputs of the case
            got, expected        the loss's output and what it should have been (numbers,
                                 lists, or a sentence such as "finite …")
            abs_err, rel_err     |got − expected| and that over |expected| (worst element)
            allowance            the allowed absolute error for this case
            replay               a copy-pasteable call reproducing the case
            dtype                the dtype the case was evaluated in
        smallest      the smallest failing input found from the first worst case (rows and
                      classes removed while the check still fails; its note names its shape),
                      in the same form, or null

Comparison, ``"schema": "lossguard-comparison/1"``::

    schema, spec, seed, effort, versions, seconds, loss_evaluations   as above
    old, new          the two implementations (OLD is the declared one)
    evaluation        {"old": {...}, "new": {...}} as above
    agree             true when every part agreed
    parts             one object per (quantity, dtype): name "value float64", "gradient
                      float32", …; the fields of a check above (``got`` is NEW, ``expected``
                      is OLD)
    largest           the case where they differ most (a worst-case object), or null
    smallest          the shrunk input that still shows that divergence, or null
"""

from __future__ import annotations

import json
import math
from typing import TYPE_CHECKING, Any

from ..result import Result

if TYPE_CHECKING:
    from ..compare import Comparison

__all__ = ["SCHEMA", "COMPARISON_SCHEMA", "to_json", "write_json", "comparison_to_json", "write_comparison_json"]

SCHEMA = "lossguard-result/1"
COMPARISON_SCHEMA = "lossguard-comparison/1"


def _strict(x: Any) -> Any:
    if isinstance(x, float) and not math.isfinite(x):
        return "nan" if math.isnan(x) else ("inf" if x > 0 else "-inf")
    if isinstance(x, dict):
        return {k: _strict(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_strict(v) for v in x]
    return x


def _dump(data: dict[str, Any]) -> str:
    return json.dumps(_strict(data), indent=2, allow_nan=False)


def to_json(result: Result) -> str:
    """The battery document (schema in the module docstring)."""
    return _dump({"schema": SCHEMA, **result.to_dict()})


def comparison_to_json(comparison: Comparison) -> str:
    """The comparison document (schema in the module docstring)."""
    return _dump({"schema": COMPARISON_SCHEMA, **comparison.to_dict()})


def _write(text: str, path: str) -> None:
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(text + "\n")


def write_json(result: Result, path: str) -> None:
    _write(to_json(result), path)


def write_comparison_json(comparison: Comparison, path: str) -> None:
    _write(comparison_to_json(comparison), path)
