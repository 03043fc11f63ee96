"""``classes``: renaming the classes renames the gradient and leaves the value alone.

Notation and shapes: predictions ``z`` (N, C), class axis last; targets integer labels (N,) or
simplex rows (N, C); π a permutation of the C classes (one per case), applied to the class axis:
(z∘π)_ij = z_{i, π(j)}; labels follow their class, y'_i = π⁻¹(y_i) (ignored labels stay as they are).

Formula: a loss that treats every class alike satisfies L(z∘π, y') = L(z, y) and
∇L(z∘π, y') = ∇L(z, y)∘π (equivariance of the gradient).

Class-weighted losses (a per-class weight or α) are not equivariant: the weight stays attached
to its class index while the data moves. The check is therefore off by default when the loss
takes a per-class parameter or its reference is not class-symmetric; turn it on with ``expect``
only for a loss meant to treat classes alike.

Error model: permuting the classes only reorders the sums over classes, so the value differs
by at most the rounding rule γ_n (|v| + max|z|) and the gradient by the normwise rule of
:mod:`lossguard.tolerance`.

Example:
    >>> import jax, jax.numpy as jnp
    >>> from lossguard import declare, run
    >>> def smooth_to_background(z, y, eps=0.1):  # smoothing mass sent to class 0 only
    ...     ls = jax.nn.log_softmax(z)
    ...     nll = -jnp.take_along_axis(ls, y[:, None], -1)[:, 0]
    ...     return ((1 - eps) * nll - eps * ls[:, 0]).mean()
    >>> result = run(declare(smooth_to_background, kind="categorical"), effort="quick", only=["classes"])
    >>> result.check("classes").verdict
    'fail'
"""

from __future__ import annotations

import numpy as np

from ._property import Part, Tally, mismatch_examples, value_and_grad
from ..cases import CaseStack
from ..references import get_reference
from ..result import CheckResult
from ..spec import LossSpec
from ..tolerance import op_count, rounding_allowance
from ._base import Check, Context, only, planned
from ._compare import mismatch
from ._scales import case_scale, gradient_term_scale

__all__ = ["CHECK", "permute_classes", "class_parts", "per_class_params"]

HINT = (
    "relabelling the classes changed the value, or the gradient did not follow the classes: the "
    "loss treats some class index specially (a hard-coded class weight, smoothing mass sent to one "
    "class, a background class, an index-dependent tie-break). Class-weighted losses are not "
    "class-permutation equivariant by design: declare the weights as a per-class param (the check "
    "is then off by default) or skip classes"
)


def per_class_params(spec: LossSpec) -> list[str]:
    """Names of parameters given as one value per class (lists of length ≥ 2)."""
    return [k for k, v in spec.params.items() if isinstance(v, (list, tuple, np.ndarray)) and len(v) >= 2]


def permute_classes(spec: LossSpec, stack: CaseStack, perm: np.ndarray) -> CaseStack:
    """The stack with class j of case k moved from ``perm[k, j]`` (labels follow their class)."""
    z = np.take_along_axis(stack.predictions, perm[:, None, :], axis=-1)
    y = stack.targets
    if spec.kind == "distribution":
        y = np.take_along_axis(y, perm[:, None, :], axis=-1)
    else:
        inverse = np.argsort(perm, axis=1)  # old class c now sits at position π⁻¹(c)
        real = (y >= 0) & (y < perm.shape[1])
        moved = np.take_along_axis(inverse, np.where(real, y, 0), axis=1)
        y = np.where(real, moved, y)
    return CaseStack(z, y, stack.cell, list(stack.notes))


def class_parts(ctx: Context, stack: CaseStack, rng: np.random.Generator | None) -> list[Part]:
    """Value and gradient of ``stack`` against the same cases with their classes permuted.

    ``rng`` draws one permutation per case (an identity draw is replaced by a rotation); ``None``
    rotates the classes by one, which moves every class (the search uses it).
    """
    spec = ctx.spec
    k, cell = len(stack), stack.cell
    c = cell.c or 1
    rotate = np.roll(np.arange(c), 1)[None].repeat(k, 0)
    perm = rotate if rng is None else np.argsort(rng.random((k, c)), axis=1)
    perm = np.where(np.all(perm == np.arange(c), axis=1)[:, None], rotate, perm)
    moved = permute_classes(spec, stack, perm)
    v0, g0 = value_and_grad(ctx, stack)
    v1, g1 = value_and_grad(ctx, moved)
    dtype = ctx.evaluator.computed_dtype("float64")
    n_ops = op_count(cell.n, c)
    s = case_scale(ctx, stack.predictions)
    calls = [("a", stack), ("b", moved)]
    parts = []
    a_v = rounding_allowance(v0, s, dtype=dtype, n_ops=n_ops)
    m_v = mismatch(v1, v0, a_v.atol)
    parts.append(Part("value after permuting classes", m_v.case_bad, m_v.case_ratio, "value: " + a_v.rule,
                      lambda most: mismatch_examples(spec, m_v, "value after permuting classes", calls,
                                                     "b == a (b: a's classes permuted, labels following)", most=most)))
    if g0 is not None and g1 is not None:
        expected = np.take_along_axis(g0, perm[:, None, :], axis=-1)  # the gradient follows its class
        a_g = rounding_allowance(expected, s, dtype=dtype, n_ops=n_ops, normwise=True,
                                 grad_scale=gradient_term_scale(ctx, stack.targets))
        m_g = mismatch(g1, expected, a_g.atol)
        parts.append(Part("gradient after permuting classes", m_g.case_bad, m_g.case_ratio, "gradient: " + a_g.rule,
                          lambda most: mismatch_examples(spec, m_g, "gradient after permuting classes", calls,
                                                         "the gradient at b to be a's, classes permuted",
                                                         most=most)))
    return parts


def _run(ctx: Context) -> CheckResult:
    tally = Tally("classes")
    tally.sweep(ctx, lambda cell, stack: (class_parts(ctx, stack, ctx.rng(f"classes {cell}")), None),
                lambda one: class_parts(ctx, one, None))
    return tally.result(
        passed="value unchanged and gradient permuted along with the classes",
        failed="the loss treats classes differently", hint=HINT,
        details={"per_class_params": per_class_params(ctx.spec)},
    )


def _default(spec: LossSpec) -> bool:
    if per_class_params(spec):
        return False  # class-weighted losses are not equivariant
    return spec.reference is None or "class_symmetric" in get_reference(spec.reference).properties


CHECK = Check(
    name="classes",
    summary=("permuting the classes of predictions and targets permutes the gradient and keeps the value "
             "(off by default for class-weighted losses, which are not equivariant)"),
    run=_run,
    applies=only("categorical", "distribution"),
    default=_default,
    skip_hint="legitimate for class-weighted losses (per-class weights are not class-permutation equivariant)",
    order=32,
    compiles=planned(("float64",)),
)
