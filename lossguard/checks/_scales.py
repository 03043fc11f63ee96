"""The scales the rounding-error allowances of the checks are built from.

Notation: a stack of K cases (axis 0), predictions (K, N, C) or binary (K, N[, D]). S is a
case's largest |logit| (the size of the terms that cancel in a log-sum-exp); G the size of the
gradient terms that cancel (p and y, scaled by the reduction). Both enter
:func:`lossguard.tolerance.rounding_allowance`.
"""

from __future__ import annotations

import numpy as np

from ._base import Context

__all__ = ["case_scale", "gradient_term_scale"]


def case_scale(ctx: Context, predictions: np.ndarray) -> np.ndarray:
    """S per case: the largest |logit| (1 for probability inputs, whose values do not cancel)."""
    k = predictions.shape[0]
    if ctx.spec.inputs == "probabilities":
        return np.ones(k)
    flat = predictions.reshape(k, -1)
    return np.maximum(flat.max(axis=1), -flat.min(axis=1))  # max |z| without a |z| temporary


def gradient_term_scale(ctx: Context, targets: np.ndarray) -> np.ndarray:
    """G per case: the size of the gradient terms that cancel (p and y, scaled by the reduction).

    For a mean that is 1/N_eff (examples not ignored), times the spread of per-class parameters
    (largest over smallest), which scale individual rows; 1 for a sum or per-example output.
    """
    k = targets.shape[0]
    if ctx.evaluator.reduction != "mean":
        g = np.ones(k)
    elif ctx.spec.kind == "categorical" and ctx.spec.ignore_label is not None:
        g = 1.0 / np.maximum(np.sum(targets != ctx.spec.ignore_label, axis=1), 1)
    else:
        g = np.full(k, 1.0 / int(np.prod(targets.shape[1:2] if ctx.spec.kind != "binary" else targets.shape[1:])))
    for v in ctx.spec.params.values():
        if isinstance(v, (list, tuple)) and len(v) > 1:
            arr = np.abs(np.asarray(v, dtype=np.float64))
            if np.min(arr) > 0:
                g = g * float(np.max(arr) / np.min(arr))
    return g
