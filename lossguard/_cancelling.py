"""Terms of a loss's value that depend on the targets only and cancel against the rest.

KL(y ‖ softmax z) = Σ y log y − Σ y log q: for near-uniform rows both sums are about log C while
their difference is near 0, so a result within one ulp of each term can miss an allowance built
from |v*| and the logits alone. A label-smoothed cross-entropy written as a KL divergence carries
the smoothed targets' entropy in the same way, as does a binary relative entropy
y log y + (1 − y) log(1 − y) − …. The rounding of those terms belongs in the error model's S
(:mod:`lossguard.tolerance`): |computed − exact| ≤ γ_n(|v*| + S + T), T = the size of the
target-only term.

Notation: targets of one case on axis 1 onwards (class axis last). For float targets
T = max over examples of Σ_c |y_c log y_c| (binary: |y log y| + |(1 − y) log(1 − y)| per
element), with 0 log 0 = 0; integer labels have no such term (T = 0).

Reference: N. J. Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., SIAM, 2002
(forward error of a sum of terms that cancel, ch. 4).

Example:
    >>> import numpy as np
    >>> round(float(target_term(np.full((1, 2, 4), 0.25), "distribution")[0]), 4)  # log 4
    1.3863
"""

from __future__ import annotations

import numpy as np

__all__ = ["target_term", "with_target_term", "RULE"]

#: How the target-only term enters an allowance's printed rule.
RULE = " + T, T = max Σ|y log y| (the targets' own term, which cancels)"


def _xlogx(a: np.ndarray) -> np.ndarray:
    """|a log a| with 0 log 0 = 0 (the limit)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(a > 0, np.abs(a * np.log(np.where(a > 0, a, 1.0))), 0.0)


def target_term(targets: np.ndarray, kind: str) -> np.ndarray:
    """T per case (axis 0): the largest size of a target-only term over the case's examples.

    Args:
        targets: (K, N) labels, (K, N, C) distribution rows or (K, N[, D]) binary targets.
        kind: ``"categorical"``, ``"distribution"`` or ``"binary"``.
    Returns:
        (K,) float64; zeros for integer labels.
    """
    y = np.asarray(targets)
    k = y.shape[0]
    if not np.issubdtype(y.dtype, np.floating) or kind == "categorical":
        return np.zeros(k)
    y = y.astype(np.float64)
    if kind == "binary":
        per = _xlogx(y) + _xlogx(1.0 - y)  # per element: both outcomes' entropy terms
        return per.reshape(k, -1).max(axis=1)
    return _xlogx(y).sum(axis=-1).reshape(k, -1).max(axis=1)


def with_target_term(scale: np.ndarray, targets: np.ndarray, kind: str) -> tuple[np.ndarray, str]:
    """(S + T per case, the text to append to the rule; "" when there is no such term)."""
    t = target_term(targets, kind)
    return (scale + t, RULE) if np.any(t > 0) else (scale, "")
