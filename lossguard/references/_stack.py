"""A reference loss on a stack of K cases at once: per-example pieces, weights and reduction.

Notation and shapes: K cases on axis 0, class axis last. Categorical and distribution
predictions (K, N, C) with labels (K, N) or rows (K, N, C); binary predictions and targets
(K, N) or (K, N, D). A case holds M examples: N rows, or every element of a binary case.

Formula (per case): w_i = 0 for an ignored label, else the reference's example weight (the class
weight of the label) or 1; mean Σ w ℓ / Σ w, sum Σ w ℓ, none w ⊙ ℓ; the gradient scales
∂ℓ_i/∂z_i alike (w_i / Σ w, w_i, or w_i times the cotangent of example i). These are the
reductions of :mod:`lossguard.references._base`, taken along the example axis of every case in
one numpy call, without a Python loop over cases.

Example:
    >>> import numpy as np
    >>> from lossguard.references import get_reference
    >>> ref = get_reference("bce")
    >>> ell, g, w = stack_rows(ref, np.zeros((2, 3)), np.ones((2, 3)), kind="binary", inputs="logits", params={"pos_weight": 1.0})
    >>> reduce_stack(ell, g, w, "sum", pred_shape=(2, 3), targ_shape=(2, 3), kind="binary")[0].round(6).tolist()
    [2.079442, 2.079442]
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import Reference

__all__ = ["stack_rows", "stack_weights", "reduce_stack"]


def _flat(kind: str, k: int, a: np.ndarray) -> np.ndarray:
    """Examples of every case on one axis: binary (K, M); otherwise (K·N,) + trailing axes."""
    return a.reshape(k, -1) if kind == "binary" else a.reshape((-1,) + a.shape[2:])


def stack_weights(ref: Reference | None, y: np.ndarray, *, kind: str, ignore_label: int | None,
                  params: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray]:
    """(w, labels): example weights (K, M) and the targets with ignored labels replaced by 0.

    ``y`` is (K, N[, …]); without a reference (``ref=None``) every example that is not ignored
    weighs 1. ``params`` are already resolved (defaults filled in).
    """
    k = y.shape[0]
    flat = _flat(kind, k, y)
    ignored = np.zeros(flat.shape if kind == "binary" else flat.shape[:1], bool)
    if kind == "categorical" and ignore_label is not None:
        ignored = flat == ignore_label
        flat = np.where(ignored, 0, flat)  # ignored rows get label 0: finite, weight 0
    base: Any = 1.0
    if ref is not None and ref.example_weights is not None and kind != "binary":
        base = ref.example_weights(flat, **params)
    w = np.where(ignored, 0.0, base).astype(np.float64).reshape(k, -1)
    return w, flat


def stack_rows(ref: Reference, z: np.ndarray, y: np.ndarray, *, kind: str, inputs: str,
               ignore_label: int | None = None, params: Mapping[str, Any], grad: bool = True
               ) -> tuple[np.ndarray, np.ndarray | None, np.ndarray]:
    """(ℓ (K, M), ∂ℓ_i/∂z_i (K, M, C) or ``None`` without ``grad``, w (K, M)) of a stack.

    Binary cases have C = 1. ``params`` are resolved and validated by the caller.
    """
    k = z.shape[0]
    w, labels = stack_weights(ref, y, kind=kind, ignore_label=ignore_label, params=params)
    zf = _flat(kind, k, z)
    with np.errstate(all="ignore"):
        ell = ref.per_example(zf, labels, inputs=inputs, **params).reshape(k, -1)
        g = ref.per_example_grad(zf, labels, inputs=inputs, **params).reshape(k, ell.shape[1], -1) if grad else None
    return ell, g, w * np.ones_like(ell)


def reduce_stack(ell: np.ndarray, grad: np.ndarray | None, w: np.ndarray, reduction: str, *,
                 pred_shape: tuple[int, ...], targ_shape: tuple[int, ...], kind: str,
                 cotangent: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray | None]:
    """Per case: (value, gradient) from the pieces of :func:`stack_rows`.

    Args:
        ell, grad, w: from :func:`stack_rows` (``grad`` may be ``None``).
        reduction: ``"mean"``, ``"sum"`` or ``"none"``.
        pred_shape, targ_shape: the stack's shapes (the outputs take them back).
        kind: the target kind.
        cotangent: ``"none"``: (K,) + per-example output shape, the VJP's vector; otherwise
            (K,), one multiplier per case. Ones when ``None``.
    Returns:
        values (K,) or (K,) + per-example shape; gradients shaped like the predictions.
    """
    k = ell.shape[0]
    g = None
    with np.errstate(all="ignore"):
        wl = np.where(w != 0, w * ell, 0.0)  # ignored rows contribute exactly 0, even if ℓ is nan
        if grad is not None:
            if reduction == "mean":
                scale = w / np.sum(w, axis=1, keepdims=True)
            elif reduction == "none" and cotangent is not None:
                scale = w * np.asarray(cotangent, dtype=np.float64).reshape(k, -1)
            else:
                scale = w
            g = np.where(scale[..., None] != 0, scale[..., None] * grad, 0.0).reshape(pred_shape)
            if reduction != "none" and cotangent is not None:
                g = np.asarray(cotangent, dtype=np.float64).reshape((k,) + (1,) * (g.ndim - 1)) * g
        total = np.sum(wl, axis=1)  # may overflow at the top of the range, as a float64 sum does
        value = total / np.sum(w, axis=1) if reduction == "mean" else total
    if reduction == "none":
        return wl.reshape(targ_shape if kind == "binary" else targ_shape[:2]), g
    return value, g
