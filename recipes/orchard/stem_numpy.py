"""Recipe 3 — a numpy loss with a hand-derived gradient: the stem detector.

A second camera decides, for each apple and each of D views, whether the stem is intact (a
binary output per element). The loss is plain numpy, so JAX cannot differentiate it; the team
declares its closed-form gradient with ``--grad``, and lossguard checks both.

Notation: logits z (N, D), targets y (N, D) in [0, 1]; σ the logistic function.
Formula: ℓ = mean over the N·D elements of (1 − y)·softplus(z) + y·softplus(−z);
gradient ∂ℓ/∂z = (σ(z) − y) / (N·D).

    lossguard check recipes/orchard/stem_numpy.py:stem_loss --kind binary --reference bce \\
        --grad recipes/orchard/stem_numpy.py:stem_loss_grad
"""

from __future__ import annotations

import numpy as np


def _softplus(x: np.ndarray) -> np.ndarray:
    return np.logaddexp(0.0, x)  # softplus(x) = log(1 + e^x) without overflow


def stem_loss(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Mean binary cross-entropy in logits."""
    per_element = (1.0 - y) * _softplus(z) + y * _softplus(-z)
    # divide before summing: in bfloat16, 24 losses of 1e38 sum past the largest finite value
    # (3.4e38) although their mean is representable
    return np.sum(per_element / z.size)


def stem_loss_grad(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    """∂ stem_loss / ∂z, derived by hand."""
    sigma = np.exp(-_softplus(-z))  # σ(z) = exp(−softplus(−z)), stable for both signs
    return (sigma - y) / z.size


def stem_loss_grad_unscaled(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    """A common slip: the gradient of the sum, not of the mean (the 1/(N·D) forgotten)."""
    sigma = np.exp(-_softplus(-z))
    return sigma - y
