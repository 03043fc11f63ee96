"""The declared reference on a whole stack of cases at once, in float64 numpy.

Shared by the checks that compare a loss with its reference over many cases (``finite``,
``masking``, ``dtypes``) and by the stability profile: one numpy call over all K cases' examples,
no Python loop over cases.
"""

from __future__ import annotations

import numpy as np

from ._base import Context

__all__ = ["reference_rows", "reference_batch", "reduce_rows"]


def reference_rows(ctx: Context, predictions: np.ndarray, targets: np.ndarray, *, grad: bool = True
                   ) -> tuple[np.ndarray, np.ndarray | None, np.ndarray]:
    """The declared reference's float64 pieces per example of a whole stack, in one numpy call.

    Returns ``(ell, grad, w)``: ℓ_i (K, M), ∂ℓ_i/∂z_i (K, M, C) (binary: C = 1; ``None`` when
    ``grad`` is False) and the weights w_i (K, M) — 0 for the ignore label, else the reference's
    example weight — with M examples per case (N rows, or every element of a binary case).
    """
    from ..references import get_reference, validate_params

    spec = ctx.spec
    ref, k = get_reference(spec.reference or ""), predictions.shape[0]
    binary = spec.kind == "binary"
    z = predictions.reshape(k, -1) if binary else predictions.reshape((-1,) + predictions.shape[2:])
    y = targets.reshape(k, -1) if binary else targets.reshape((-1,) + targets.shape[2:])
    prm = validate_params(ref, spec.params, None if binary else predictions.shape[-1])
    ignored = np.zeros(y.shape if binary else y.shape[:1], bool)
    if spec.kind == "categorical" and spec.ignore_label is not None:
        ignored = y == spec.ignore_label
        y = np.where(ignored, 0, y)
    with np.errstate(all="ignore"):
        ell = ref.per_example(z, y, inputs=spec.inputs, **prm).reshape(k, -1)
        g = ref.per_example_grad(z, y, inputs=spec.inputs, **prm).reshape(k, ell.shape[1], -1) if grad else None
        base = ref.example_weights(y, **prm) if ref.example_weights is not None and not binary else 1.0
        w = np.where(ignored, 0.0, base).reshape(k, -1) * np.ones_like(ell)
    return ell, g, w


def reference_batch(ctx: Context, predictions: np.ndarray, targets: np.ndarray, *, grad: bool = True
                    ) -> tuple[np.ndarray, np.ndarray | None]:
    """The declared reference's float64 (values, gradients) on a whole stack in one numpy call.

    The same numbers as :func:`lossguard.checks.reference.reference_stack_values` (per example
    ℓ_i and ∂ℓ_i/∂z_i with weights w_i, :func:`reference_rows`, reduced per case as in
    :mod:`lossguard.references._base`), without a Python loop over the K cases.
    """
    return reduce_rows(ctx, predictions.shape, targets.shape, *reference_rows(ctx, predictions, targets, grad=grad))


def reduce_rows(ctx: Context, pred_shape: tuple[int, ...], targ_shape: tuple[int, ...], ell: np.ndarray,
                grad: np.ndarray | None, w: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """Per case: the reduction of per-example pieces from :func:`reference_rows` (mean Σ w ℓ / Σ w,
    sum Σ w ℓ, none w ⊙ ℓ; gradients scaled alike), as :mod:`lossguard.references._base` reduces."""
    red, binary = ctx.evaluator.reduction, ctx.spec.kind == "binary"
    g = None
    with np.errstate(all="ignore"):
        wl = np.where(w != 0, w * ell, 0.0)  # ignored rows contribute exactly 0, even if ℓ is nan
        if grad is not None:
            scale = w / np.sum(w, axis=1, keepdims=True) if red == "mean" else w
            g = np.where(scale[..., None] != 0, scale[..., None] * grad, 0.0).reshape(pred_shape)
        total = np.sum(wl, axis=1)  # may overflow at the top of the range, as the reference's does
        value = total / np.sum(w, axis=1) if red == "mean" else total
    if red == "none":
        return wl.reshape(targ_shape if binary else targ_shape[:2]), g
    return value, g
