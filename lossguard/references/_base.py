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
from typing import Any, NamedTuple

import numpy as np

__all__ = ["Forms", "Param", "Reference", "PROPERTIES"]

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


class Forms(NamedTuple):
    """One per-example formula in the three forms every reference gives.

    Args:
        value: ``(z, y, inputs=..., **params) -> ℓ`` float64 numpy, one value per example
            (binary: one per element).
        grad: ``(z, y, inputs=..., **params) -> ∂ℓ_i/∂z_i`` float64, shape of ``z``, derived by hand.
        jax: the same formula written with ``jax.numpy`` (for autodiff and as an example of a
            stable implementation).
    """

    value: Callable[..., np.ndarray]
    grad: Callable[..., np.ndarray]
    jax: Callable[..., Any]


@dataclass(frozen=True, kw_only=True)
class Reference:
    """A reference loss with a float64 value, a hand-derived gradient and a JAX version.

    Args:
        name: registry name (``"categorical_ce"``).
        summary: one line.
        formula: the per-example formula in plain text.
        kinds: target kinds it is defined for (subset of binary, categorical, distribution).
        inputs: input spaces it accepts (subset of logits, probabilities); default logits only.
        params: its parameters (default none).
        forms: its formula as float64 value, hand-derived gradient and JAX twin (read them as
            ``per_example``, ``per_example_grad`` and ``jax_per_example``).
        properties: subset of :data:`PROPERTIES` it satisfies in logits (or in its inputs).
        target_domain: ``"soft"`` if every target in the kind's domain is allowed, ``"hard"`` if
            binary targets must be exactly 0 or 1 (or distribution targets one-hot) for the
            formula to be the published one; comparisons draw targets only from this domain.
            Default ``"soft"``.
        citation: authors, title, venue, year.
        example_weights: ``(y, **params) -> w`` per-example weights before masking (class weights
            of the labels); ``None`` (the default) means all ones.
        notes: where the properties or the reduction depart from the plain formula.

    Every argument is a keyword; the defaults are what most references declare (logits in,
    no parameters, any target of the kind's domain, unweighted examples).
    """

    name: str
    summary: str
    formula: str
    kinds: frozenset[str]
    inputs: frozenset[str] = frozenset({"logits"})
    params: tuple[Param, ...] = ()
    forms: Forms
    properties: frozenset[str]
    target_domain: str = "soft"
    citation: str
    example_weights: Callable[..., np.ndarray] | None = None
    notes: str = ""
    defaults: Mapping[str, Any] = field(default_factory=dict)

    @property
    def per_example(self) -> Callable[..., np.ndarray]:
        """The float64 per-example value (:attr:`Forms.value`)."""
        return self.forms.value

    @property
    def per_example_grad(self) -> Callable[..., np.ndarray]:
        """The hand-derived per-example gradient (:attr:`Forms.grad`)."""
        return self.forms.grad

    @property
    def jax_per_example(self) -> Callable[..., Any]:
        """The ``jax.numpy`` twin (:attr:`Forms.jax`)."""
        return self.forms.jax

    def param_names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.params)

    def resolved(self, params: Mapping[str, Any]) -> dict[str, Any]:
        """The full parameter dict: declared defaults overridden by ``params``."""
        out = {p.name: p.default for p in self.params}
        out.update(params)
        return out
