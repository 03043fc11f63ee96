"""The registry of reference losses, and one-case evaluation with the common batch reduction.

Notation and shapes: see :mod:`lossguard.references._base` — logits or probabilities ``z`` of
shape (N, C) with the class axis last (categorical and distribution kinds) or (N,) / (N, D)
(binary kind); targets ``y`` integer labels (N,), simplex rows (N, C), or [0, 1] values shaped
like ``z``.

Formula: a registry entry gives ℓ_i and ∂ℓ_i/∂z_i; :func:`evaluate_reference` reduces them with
per-example weights w_i (0 for ignored labels, the class weight of the label where the reference
has one, else 1): mean Σ w ℓ / Σ w, sum Σ w ℓ, none w ⊙ ℓ with the gradient a VJP.

Example:
    >>> import numpy as np
    >>> value, grad = evaluate_reference("categorical_ce", np.zeros((2, 3)), np.array([0, -100]),
    ...                                  ignore_label=-100)
    >>> round(float(value), 12), grad[1].tolist()  # ln 3; the ignored row has zero gradient
    (1.098612288668, [0.0, 0.0, 0.0])

References:
    The citations of each loss are on its :class:`Reference` (``REFERENCES[name].citation``).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from .._suggest import bad_value, did_you_mean
from ..errors import SpecError
from ._base import PROPERTIES, Forms, Param, Reference
from ._stack import reduce_stack, stack_rows
from .bce import BCE
from .ce import CATEGORICAL_CE, SMOOTHED_CE, softmax_ce_hessian
from .focal import FOCAL_BINARY, FOCAL_MULTICLASS
from .kl import KL_DIVERGENCE

__all__ = [
    "REFERENCES",
    "PROPERTIES",
    "Forms",
    "Param",
    "Reference",
    "get_reference",
    "reference_names",
    "evaluate_reference",
    "validate_params",
    "softmax_ce_hessian",
]

#: Every reference loss by registry name.
REFERENCES: dict[str, Reference] = {
    ref.name: ref
    for ref in (BCE, CATEGORICAL_CE, SMOOTHED_CE, FOCAL_BINARY, FOCAL_MULTICLASS, KL_DIVERGENCE)
}

_REDUCTIONS = ("mean", "sum", "none")


def reference_names() -> list[str]:
    """Registry names, sorted.

    Example:
        >>> reference_names()[:2]
        ['bce', 'categorical_ce']
    """
    return sorted(REFERENCES)


def get_reference(name: str | Reference) -> Reference:
    """The registry entry called ``name`` (a :class:`Reference` passes through unchanged).

    Args:
        name: registry name such as ``"categorical_ce"``.
    Returns:
        The :class:`Reference`.
    Raises:
        SpecError: one line with the closest registry name when ``name`` is unknown.

    Example:
        >>> get_reference("kl_divergence").kinds
        frozenset({'distribution'})
    """
    if isinstance(name, Reference):
        return name
    if isinstance(name, str) and name in REFERENCES:
        return REFERENCES[name]
    hint = did_you_mean(str(name), REFERENCES)
    raise SpecError(bad_value("reference", name, "a registry name", hint))


def validate_params(
    ref: str | Reference, params: Mapping[str, Any] | None, classes: int | None = None
) -> dict[str, Any]:
    """Check ``params`` against ``ref``'s declared parameters and return the resolved dict.

    Args:
        ref: a :class:`Reference` or registry name.
        params: user parameters (may be empty or ``None``).
        classes: the class count C when known (per-class parameters check their length).
    Returns:
        Defaults overridden by ``params``.
    Raises:
        SpecError: one line, for an unknown name (with the closest declared name) or an invalid
            value (with the parameter's own hint).

    Example:
        >>> validate_params("focal_binary", {"gamma": 0.5})
        {'gamma': 0.5, 'alpha': 0.25}
    """
    ref = get_reference(ref)
    params = dict(params or {})
    declared = {p.name: p for p in ref.params}
    for key in params:
        if key not in declared:
            if declared:
                raise SpecError(bad_value(key, params[key], f"a parameter of {ref.name!r}",
                                          did_you_mean(key, declared)))
            raise SpecError(bad_value(key, params[key], f"no parameters for {ref.name!r}",
                                      "drop it"))
    resolved = ref.resolved(params)
    for key, value in resolved.items():
        check = declared[key].validate
        problem = check(value, classes) if check is not None else None
        if problem:
            raise SpecError(f"{key}={value!r}: {problem}")
    return resolved


def _infer_kind(ref: Reference, z: np.ndarray, y: np.ndarray) -> str:
    if ref.kinds == frozenset({"binary"}):
        if y.shape != z.shape:
            raise SpecError(bad_value("y", f"shape {y.shape}", f"targets shaped like z {z.shape}",
                                      "pass one target in [0, 1] per prediction"))
        return "binary"
    if z.ndim == 2 and y.ndim == 1 and y.shape[0] == z.shape[0] and "categorical" in ref.kinds:
        return "categorical"
    if z.ndim == 2 and y.shape == z.shape and "distribution" in ref.kinds:
        return "distribution"
    wanted = " or ".join(
        {"categorical": "labels (N,)", "distribution": "rows (N, C)"}[k] for k in sorted(ref.kinds)
    )
    raise SpecError(bad_value("y", f"shape {y.shape}", f"{wanted} for {ref.name!r} with z "
                              f"{z.shape}", "check the target kind of this reference"))


def _labels(y: np.ndarray, classes: int, ignored: np.ndarray) -> np.ndarray:
    if not np.issubdtype(y.dtype, np.integer):
        if not (np.all(np.isfinite(y)) and np.all(y == np.round(y))):
            raise SpecError(bad_value("y", y.dtype.name, "integer class labels",
                                      "try y.astype(int)"))
    labels = np.where(ignored, 0, y).astype(np.int64)  # ignored rows get label 0: finite, weight 0
    if np.any((labels < 0) | (labels >= classes)):
        bad = int(labels[(labels < 0) | (labels >= classes)][0])
        raise SpecError(bad_value("label", bad, f"a class index in [0, {classes})",
                                  "pass ignore_label for labels meant to be left out"))
    return labels


def evaluate_reference(
    ref: str | Reference,
    z: ArrayLike,
    y: ArrayLike,
    *,
    inputs: str = "logits",
    ignore_label: int | None = None,
    reduction: str = "mean",
    params: Mapping[str, Any] | None = None,
    cotangent: ArrayLike | None = None,
    stacked: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    """Value and gradient (w.r.t. ``z``) of a reference loss on one case, or on a stack of cases
    (``stacked=True``: a leading case axis K on ``z``, ``y``, ``cotangent`` and the results), in
    float64.

    Shapes (one case): ``z`` (N, C) with ``y`` labels (N,) or rows (N, C); binary ``z`` and ``y``
    (N,) or (N, D). The kind is read from the shapes (and from the reference: a binary-only
    reference treats (N, D) as binary). A stack is evaluated in one numpy call
    (:mod:`lossguard.references._stack`), with the same numbers as one case at a time.
    Formula: mean Σ w ℓ / Σ w, sum Σ w ℓ, none w ⊙ ℓ; w_i = 0 for ignored labels, else the
    reference's example weight (class weight of the label) or 1.

    Args:
        ref: :class:`Reference` or registry name.
        z: logits, or probabilities when ``inputs="probabilities"``.
        y: targets.
        inputs: ``"logits"`` or ``"probabilities"``.
        ignore_label: categorical only: label value meaning "leave this example out".
        reduction: ``"mean"``, ``"sum"`` or ``"none"``.
        params: parameters of the reference (validated; defaults fill the rest).
        cotangent: for ``"none"``, the vector (shape of the value) the VJP is taken with
            (ones when ``None``); for ``"mean"``/``"sum"`` an optional scalar multiplier (one
            per case when stacked).
        stacked: ``z`` and ``y`` carry a leading case axis.
    Returns:
        ``(value, grad)``: value 0-d (mean, sum) or per-example (none); grad shaped like ``z``.
        With every example ignored, ``"mean"`` gives nan (0/0), as documented in ``_base``.
    Raises:
        SpecError: unknown reference, unsupported inputs/kind/reduction, bad params or labels.

    Example:
        >>> import numpy as np
        >>> v, g = evaluate_reference("bce", np.zeros(2), np.array([1.0, 0.0]), reduction="sum")
        >>> round(float(v), 12), g.tolist()
        (1.38629436112, [-0.5, 0.5])
    """
    ref = get_reference(ref)
    if inputs not in ref.inputs:
        raise SpecError(bad_value("inputs", inputs, f"one of {sorted(ref.inputs)} for {ref.name!r}",
                                  did_you_mean(inputs, ref.inputs)))
    if reduction not in _REDUCTIONS:
        raise SpecError(bad_value("reduction", reduction, "mean, sum or none",
                                  did_you_mean(reduction, _REDUCTIONS)))
    z = np.asarray(z, dtype=np.float64)
    y = np.asarray(y)
    zs, ys = (z, y) if stacked else (z[None], y[None])
    kind = _infer_kind(ref, zs[0], ys[0])
    if ignore_label is not None and kind != "categorical":
        raise SpecError(bad_value("ignore_label", ignore_label,
                                  f"no ignore label for kind={kind!r}",
                                  "drop it, or pass integer labels"))
    resolved = validate_params(ref, params, zs.shape[-1] if kind != "binary" else None)
    if kind == "categorical":
        ignored = (ys == ignore_label) if ignore_label is not None else np.zeros(ys.shape, bool)
        ys = np.where(ignored, ignore_label or 0, _labels(ys, int(zs.shape[-1]), ignored))
    else:
        ys = ys.astype(np.float64)
    cot = None if cotangent is None else np.asarray(cotangent, dtype=np.float64)
    ell, grads, weights = stack_rows(ref, zs, ys, kind=kind, inputs=inputs, ignore_label=ignore_label,
                                     params=resolved)
    out_shape = (ys.shape[:2] if kind != "binary" else ys.shape)[1:]
    if cot is not None and reduction == "none" and cot.shape[stacked:] != out_shape:
        raise SpecError(bad_value("cotangent", f"shape {cot.shape[stacked:]}", f"the value's shape {out_shape}",
                                  "pass one number per example"))
    if cot is not None and not stacked:
        cot = cot[None]
    value, grad = reduce_stack(ell, grads, weights, reduction, pred_shape=zs.shape, targ_shape=ys.shape,
                               kind=kind, cotangent=cot)
    if not stacked:
        value, grad = value[0], grad[0]  # type: ignore[index]
    return np.asarray(value, dtype=np.float64), np.asarray(grad, dtype=np.float64)
