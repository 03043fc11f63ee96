"""The declared reference on a whole stack of cases, in float64 numpy, as the checks ask for it.

A thin layer over :func:`lossguard.references.evaluate_reference` with ``stacked=True`` (one
numpy call over all K cases' examples) that reads the kind, inputs, ignore label, parameters and
reduction from the battery's :class:`~lossguard.checks._base.Context`. Shared by every check that
compares a loss with its reference (``reference``, ``gradient``, ``finite``, ``masking``,
``dtypes``, ``second-order``), by the finiteness oracle and by the stability profile.
Once a case fills a compiled call alone (:func:`lossguard._budget.large_case`) the cases are
taken one at a time, so every temporary stays one case big.
"""

from __future__ import annotations

import numpy as np

from .._budget import large_case
from ..references import get_reference, validate_params
from ..references._stack import reduce_stack, stack_rows, stack_weights
from ._base import Context

__all__ = ["reference_rows", "reference_batch", "reduce_rows", "example_weights"]


def _params(ctx: Context, predictions: np.ndarray) -> dict:  # type: ignore[type-arg]
    ref = get_reference(ctx.spec.reference or "")
    return validate_params(ref, ctx.spec.params, None if ctx.spec.kind == "binary" else predictions.shape[-1])


def reference_rows(ctx: Context, predictions: np.ndarray, targets: np.ndarray, *, grad: bool = True
                   ) -> tuple[np.ndarray, np.ndarray | None, np.ndarray]:
    """The declared reference's float64 pieces per example of a whole stack, in one numpy call.

    Returns ``(ell, grad, w)``: ℓ_i (K, M), ∂ℓ_i/∂z_i (K, M, C) (binary: C = 1; ``None`` when
    ``grad`` is False) and the weights w_i (K, M) — 0 for the ignore label, else the reference's
    example weight — with M examples per case (N rows, or every element of a binary case).
    """
    spec = ctx.spec
    return stack_rows(get_reference(spec.reference or ""), predictions, targets, kind=spec.kind, inputs=spec.inputs,
                      ignore_label=spec.ignore_label, params=_params(ctx, predictions), grad=grad)


def reduce_rows(ctx: Context, pred_shape: tuple[int, ...], targ_shape: tuple[int, ...], ell: np.ndarray,
                grad: np.ndarray | None, w: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """Per case: the battery's reduction of the pieces of :func:`reference_rows`."""
    return reduce_stack(ell, grad, w, ctx.evaluator.reduction, pred_shape=pred_shape, targ_shape=targ_shape,
                        kind=ctx.spec.kind)


def reference_batch(ctx: Context, predictions: np.ndarray, targets: np.ndarray, *, grad: bool = True,
                    cotangent: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray | None]:
    """The declared reference's float64 (values, gradients) per case of a stack.

    Args:
        ctx: the battery context (kind, inputs, ignore label, parameters, reduction).
        predictions, targets: the stack, K cases on axis 0.
        grad: also the gradients (``None`` otherwise).
        cotangent: the gradient is that of ⟨cotangent, output⟩ (ones when ``None``); shape (K,)
            for a scalar output, (K,) + per-example shape otherwise.
    Returns:
        values (K,) or (K,) + per-example shape; gradients shaped like ``predictions``.
    """
    k = predictions.shape[0]
    if k > 1 and large_case(int(np.prod(predictions.shape[1:]))):
        parts = [reference_batch(ctx, predictions[i:i + 1], targets[i:i + 1], grad=grad,
                                 cotangent=None if cotangent is None else cotangent[i:i + 1]) for i in range(k)]
        values = np.concatenate([p[0] for p in parts])
        return values, np.concatenate([p[1] for p in parts]) if grad else None  # type: ignore[misc]
    ell, g, w = reference_rows(ctx, predictions, targets, grad=grad)
    return reduce_stack(ell, g, w, ctx.evaluator.reduction, pred_shape=predictions.shape, targ_shape=targets.shape,
                        kind=ctx.spec.kind, cotangent=cotangent)


def example_weights(ctx: Context, targets: np.ndarray) -> np.ndarray:
    """w (K, M): how much each example of a stack counts in a mean (0 for the ignore label, the
    reference's example weight where one is declared, else 1)."""
    spec = ctx.spec
    ref = get_reference(spec.reference) if spec.reference is not None else None
    params = ref.resolved(spec.params) if ref is not None else {}
    return stack_weights(ref, targets, kind=spec.kind, ignore_label=spec.ignore_label, params=params)[0]
