"""The shape every reference loss has, and the reduction they all share (written here, taken in
:mod:`lossguard.references._stack`).

Notation: predictions ``z`` of shape (N, C) for categorical and distribution kinds (class axis
last), shape (N,) or (N, D) for the binary kind; targets ``y`` are integer labels (N,), simplex
rows (N, C), or values in [0, 1] shaped like the predictions.

A reference is written per example: ``per_example`` returns the loss of each example (shape (N,)
for categorical/distribution, the predictions' shape for binary) and ``per_example_grad`` the
derivative of each example's loss with respect to its own predictions (the predictions' shape),
both in float64 numpy and both derived by hand. The batch reduction is common to all references
(:func:`lossguard.references._stack.reduce_stack` takes it): with per-example weights w_i (0 for ignored examples, the class weight of the
label for class-weighted losses, 1 otherwise)

    mean:         L = Σ_i w_i ℓ_i / Σ_i w_i          ∂L/∂z_i = w_i ∂ℓ_i/∂z_i / Σ_i w_i
    sum:          L = Σ_i w_i ℓ_i                      ∂L/∂z_i = w_i ∂ℓ_i/∂z_i
    per-example:  L_i = w_i ℓ_i  (ignored rows are 0, the class weight multiplies the row)

The weighted mean normalised by the sum of the weights of the labels present is common practice
(the convention of the widely used deep-learning frameworks' weighted cross-entropy).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["Param", "Reference", "PROPERTIES"]

#: Property names a reference may declare.
PROPERTIES = frozenset({"nonnegative", "convex", "shift_invariant", "proper", "class_symmetric"})


@dataclass(frozen=True)
class Param:
    """One parameter of a reference loss.

    Args:
        name: keyword name, passed to the loss and to the reference alike.
        default: value used when the user does not set it (``None`` means "off").
        doc: one line describing it.
        validate: returns a problem description (``"expected …; try …"``) or ``None`` if valid;
            receives the value and the class count (``None`` when unknown).
        per_class: the value is a list with one entry per class (needs a fixed class count).
    """

    name: str
    default: Any
    doc: str
    validate: Callable[[Any, int | None], str | None] | None = None
    per_class: bool = False


@dataclass(frozen=True)
class Reference:
    """A reference loss with a float64 value, a hand-derived gradient and a JAX version.

    Args:
        name: registry name (``"categorical_ce"``).
        summary: one line.
        formula: the per-example formula in plain text.
        kinds: target kinds it is defined for (subset of binary, categorical, distribution).
        inputs: input spaces it accepts (subset of logits, probabilities).
        params: its parameters.
        per_example: ``(z, y, inputs=..., **params) -> ℓ`` float64 numpy, one value per example
            (binary: one per element).
        per_example_grad: ``(z, y, inputs=..., **params) -> ∂ℓ_i/∂z_i`` float64, shape of ``z``.
        jax_per_example: the same formula written with ``jax.numpy`` (for autodiff and as an
            example of a stable implementation).
        properties: subset of :data:`PROPERTIES` it satisfies in logits (or in its inputs).
        target_domain: ``"soft"`` if every target in the kind's domain is allowed, ``"hard"`` if
            binary targets must be exactly 0 or 1 (or distribution targets one-hot) for the
            formula to be the published one; comparisons draw targets only from this domain.
        citation: authors, title, venue, year.
        example_weights: ``(y, **params) -> w`` per-example weights before masking (class weights
            of the labels); ``None`` means all ones.
    """

    name: str
    summary: str
    formula: str
    kinds: frozenset[str]
    inputs: frozenset[str]
    params: tuple[Param, ...]
    per_example: Callable[..., np.ndarray]
    per_example_grad: Callable[..., np.ndarray]
    jax_per_example: Callable[..., Any]
    properties: frozenset[str]
    target_domain: str
    citation: str
    example_weights: Callable[..., np.ndarray] | None = None
    notes: str = ""
    defaults: Mapping[str, Any] = field(default_factory=dict)

    def param_names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.params)

    def resolved(self, params: Mapping[str, Any]) -> dict[str, Any]:
        """The full parameter dict: declared defaults overridden by ``params``."""
        out = {p.name: p.default for p in self.params}
        out.update(params)
        return out
