"""The speed benchmark's two losses written in PyTorch (the camera-trap team's, invented): the
same formulas and declarations as :mod:`speed_losses`, so the torch rows sit beside the JAX ones.

    lossguard check benchmarks/speed_losses_torch.py:small_loss --kind categorical --reference categorical_ce
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from speed_losses import ALPHA, DECLARATIONS, GAMMA, IGNORE

__all__ = ["small_loss", "large_loss", "DECLARATIONS"]


def _wide(z: torch.Tensor) -> torch.Tensor:
    return z.float() if z.dtype in (torch.float16, torch.bfloat16) else z


def small_loss(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """Mean softmax cross-entropy: logits (N, C), labels (N,); float32 for half inputs."""
    return F.cross_entropy(_wide(z), y)


def large_loss(z: torch.Tensor, y: torch.Tensor, gamma: float = GAMMA, alpha: list[float] = ALPHA) -> torch.Tensor:
    """Focal loss −α_y (1 − p_y)^γ log p_y, mean over labelled frames; logits (N, 10), labels (N,)."""
    z = _wide(z)
    keep = y != IGNORE
    safe = torch.where(keep, y, 0)  # a legal index for unlabelled frames; they are masked below
    logp_y = torch.log_softmax(z, -1).gather(-1, safe[:, None])[:, 0]
    one_minus_p = -torch.expm1(logp_y)  # 1 − p = −expm1(log p), exact near p = 1
    # scale the weights by 1/n first: α_y ℓ_i and Σ ℓ_i can overflow where the mean does not
    a = torch.tensor(alpha, dtype=z.dtype)[safe] / keep.sum()
    return torch.sum(torch.where(keep, a * one_minus_p ** gamma * -logp_y, 0.0))
