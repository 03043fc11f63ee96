"""Recipe 7 — losses written in PyTorch: a function, an ``nn.Module`` with constructor
arguments, and a custom ``autograd.Function`` with a hand-written backward pass.

The cooperative's new colour-grading line is trained in PyTorch. Its three losses, each next to
the slip the team made on the way:

- ``ripeness_ce``: cross-entropy over ripeness grades, computed in float32 when the model hands it
  float16 logits (torch's own float16 mean overflows on large losses);
- ``BlemishFocal``: a focal loss module built as ``BlemishFocal(gamma=…)``; lossguard builds it
  with the declared params and runs it in eval mode;
- ``stem_logistic``: a logistic loss for the stem detector whose backward pass is written by hand
  in a custom ``autograd.Function`` (forward mode too, so the gradient check can compare both);
  ``stem_logistic_draft`` forgets the 1/N of the mean in the backward pass.

Notation: logits (N, C), class axis last, labels (N,) in [0, C); binary: logits and targets in
[0, 1] of one shape; p_t = softmax(z)_t; σ the logistic function.
Formulas: ℓ = −log p_t; focal ℓ = −(1 − p_t)^γ log p_t (Lin et al. 2017); logistic
ℓ = (1 − y) softplus(z) + y softplus(−z), with ∂ℓ/∂z = σ(z) − y (Cox 1958), all averaged over N.

    pytest recipes/orchard/test_torch_line.py --lossguard-effort quick

References:
    Lin, T.-Y., Goyal, P., Girshick, R., He, K. and Dollár, P., "Focal Loss for Dense Object
    Detection", ICCV 2017. Cox, D. R., "The Regression Analysis of Binary Sequences",
    J. R. Stat. Soc. B, 1958.
"""

from __future__ import annotations

from typing import Any

import torch
import torch.nn.functional as F
from torch import nn

__all__ = ["ripeness_ce", "BlemishFocal", "stem_logistic", "stem_logistic_draft"]


def _wide(z: torch.Tensor) -> torch.Tensor:
    return z.float() if z.dtype in (torch.float16, torch.bfloat16) else z


def ripeness_ce(logits: torch.Tensor, labels: torch.Tensor) -> torch.Tensor:
    """Mean cross-entropy, in float32 for half-precision logits."""
    return F.cross_entropy(_wide(logits), labels)


class BlemishFocal(nn.Module):
    """Focal loss with modulating exponent ``gamma``, mean over N."""

    def __init__(self, gamma: float = 2.0) -> None:
        super().__init__()
        self.gamma = gamma

    def forward(self, logits: torch.Tensor, labels: torch.Tensor) -> torch.Tensor:
        logp_t = torch.log_softmax(_wide(logits), -1).gather(-1, labels[:, None])[:, 0]
        # 1 − p_t = −expm1(log p_t): exact near p_t = 1, where 1 − exp(log p_t) cancels
        return -((-torch.expm1(logp_t)) ** self.gamma * logp_t).mean()


def _logistic(scale_backward: float) -> Any:
    class StemLogistic(torch.autograd.Function):
        @staticmethod
        def forward(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
            z, y = _wide(z), _wide(y)
            # (1 − y) softplus(z) + y softplus(−z) = −[y log σ(z) + (1 − y) log σ(−z)]: two terms ≥ 0,
            # so nothing cancels (softplus(z) − y z loses digits for large z). softplus as
            # logaddexp(0, z): F.softplus returns z itself above its threshold of 20, off by up to
            # e^-20 (seen here: the reference check failed in float64)
            zero = torch.zeros_like(z)
            return ((1 - y) * torch.logaddexp(zero, z) + y * torch.logaddexp(zero, -z)).mean()

        @staticmethod
        def setup_context(ctx: Any, inputs: tuple[Any, ...], output: Any) -> None:
            ctx.save_for_backward(*inputs)
            ctx.save_for_forward(*inputs)

        @staticmethod
        def backward(ctx: Any, g: torch.Tensor) -> tuple[torch.Tensor, None]:
            z, y = ctx.saved_tensors
            d = (torch.sigmoid(_wide(z)) - _wide(y)) * (scale_backward / z.numel())  # ∂ℓ/∂z = (σ(z) − y)/N
            return (g * d).to(z.dtype), None

        @staticmethod
        def jvp(ctx: Any, dz: torch.Tensor, dy: Any) -> torch.Tensor:
            z, y = ctx.saved_tensors
            return ((torch.sigmoid(_wide(z)) - _wide(y)) * _wide(dz)).mean()  # Σ ∂ℓ/∂z · v

    return StemLogistic.apply


_stem = _logistic(1.0)


def stem_logistic(logits: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
    """Mean logistic loss with a hand-written backward: (σ(z) − y)/N."""
    return _stem(logits, targets)


def stem_logistic_draft(logits: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
    """The draft: the backward pass returns σ(z) − y, forgetting the 1/N of the mean."""
    return _logistic(float(targets.numel()))(logits, targets)
