"""Losses written in PyTorch, broken and correct (registered only where torch is installed).

Styles: functions of tensors, ``nn.Module`` instances, ``nn.Module`` classes built with the
declared params, custom ``torch.autograd.Function``s with hand-written backward (and forward-mode
``jvp``) rules, and CPU autocast. Shapes: logits ``z`` (N, C), labels ``y`` (N,); binary: ``z``
and ``y`` of one shape. For softmax cross-entropy ∂ℓ_i/∂z_i = softmax(z_i) − onehot(y_i) and
the directional derivative along v is Σ_c p_c v_c − v_y (common practice; Bridle 1990).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn

from ._entry import broken, correct

T = "torch"
IGNORE = -100


def _wide(z: torch.Tensor) -> torch.Tensor:
    """float32 for half-precision inputs (as mixed-precision training code does), else as is."""
    return z.float() if z.dtype in (torch.float16, torch.bfloat16) else z


def _ce_function(backward_scale: float = 1.0, jvp_scale: float = 1.0, use_cotangent: bool = True,
                 detach_backward: bool = False, with_jvp: bool = True) -> Callable[..., torch.Tensor]:
    """Per-example softmax CE as a custom autograd.Function with hand-written rules; the knobs
    plant the bugs of the broken entries (all defaults: a correct Function)."""

    class SoftmaxCE(torch.autograd.Function):
        generate_vmap_rule = True

        @staticmethod
        def forward(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
            return -torch.log_softmax(z, -1).gather(-1, y[..., None])[..., 0]

        @staticmethod
        def setup_context(ctx: Any, inputs: tuple[Any, ...], output: Any) -> None:
            z, y = inputs
            ctx.save_for_backward(z, y)
            ctx.save_for_forward(z, y)

        @staticmethod
        def backward(ctx: Any, g: torch.Tensor) -> tuple[torch.Tensor, None]:
            z, y = ctx.saved_tensors
            p = torch.softmax(z.detach() if detach_backward else z, -1)
            # ∂ℓ/∂z = p − onehot(y); the one-hot by scatter (F.one_hot reads the labels' values: no vmap)
            d = p - torch.zeros_like(p).scatter(-1, y[..., None], 1.0)
            return backward_scale * (g[..., None] * d if use_cotangent else d), None

    def jvp(ctx: Any, zt: torch.Tensor, yt: Any) -> torch.Tensor:
        z, y = ctx.saved_tensors
        p = torch.softmax(z, -1)
        return jvp_scale * ((p * zt).sum(-1) - zt.gather(-1, y[..., None])[..., 0])  # Σ p v − v_y

    if with_jvp:
        SoftmaxCE.jvp = staticmethod(jvp)
    return SoftmaxCE.apply


_right = _ce_function()


# -- broken ------------------------------------------------------------------------------------
@broken(T, "gradient", "custom Function whose backward is 1% too large (a stray factor)",
        kind="categorical", reference="categorical_ce")
def function_backward_scaled(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    return _ce_function(backward_scale=1.01)(z, y).mean()


@broken(T, "gradient", "custom Function with a right backward and a jvp 10% too large: only forward mode "
        "(as torch.func.jvp and forward-mode AD use it) is wrong", kind="categorical", reference="categorical_ce")
def function_jvp_scaled(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    return _ce_function(jvp_scale=1.1)(z, y).mean()


@broken(T, "gradient", "custom Function whose backward ignores grad_output: right only when every "
        "per-example output is weighted by exactly 1", kind="categorical", reference="categorical_ce")
def function_ignores_grad_output(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    return _ce_function(use_cotangent=False)(z, y)


@broken(T, "second-order", "custom Function whose backward takes softmax of z.detach(): first derivatives "
        "right, Hessian-vector products zero", kind="categorical", reference="categorical_ce",
        expect=["second-order"])
def function_backward_detached(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    return _ce_function(detach_backward=True)(z, y).mean()


@broken(T, "gradient", "label smoothing whose uniform term is computed on z.detach() (copied from a "
        "logging line): the value is right, its gradient misses ε·(p − 1/C)", kind="categorical",
        reference="smoothed_ce", params={"epsilon": 0.1})
def smoothing_term_detached(z: torch.Tensor, y: torch.Tensor, epsilon: float) -> torch.Tensor:
    nll = F.cross_entropy(_wide(z), y, reduction="none")
    uniform = -torch.log_softmax(_wide(z).detach(), -1).mean(-1)
    return ((1 - epsilon) * nll + epsilon * uniform).mean()


@broken(T, "finite", "binary cross-entropy with torch.log(torch.sigmoid(z)) for the positive term: "
        "sigmoid underflows to 0 below z ≈ -17 in float16 (-745 in float64) and log 0 = -inf",
        kind="binary", reference="bce")
def log_of_sigmoid(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    return -(y * torch.log(torch.sigmoid(z)) + (1 - y) * F.logsigmoid(-z)).mean()


@broken(T, "batch", "per-example losses of logits centred by each class's batch mean (a normalisation "
        "step copied from the model): every row's loss depends on the other rows", kind="categorical")
def rows_centred_over_batch(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    return F.cross_entropy(z - z.mean(0, keepdim=True), y, reduction="none")


class DriftingCE(nn.Module):
    """Cross-entropy divided by a running average of itself kept in a buffer."""

    def __init__(self) -> None:
        super().__init__()
        self.register_buffer("level", torch.ones((), dtype=torch.float64))

    def forward(self, z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
        loss = F.cross_entropy(_wide(z), y)
        # updated on every call, eval mode included: the same input scores differently each time
        self.level.mul_(0.9).add_(0.1 * loss.detach().double())
        return loss / self.level.to(loss.dtype)


broken(T, "deterministic", "nn.Module whose buffer (a running loss level it divides by) changes on every "
       "call, in eval mode too", kind="categorical")(DriftingCE)


@broken(T, "padding", "ignored examples dropped from the sum but counted in the mean: sum / N",
        kind="categorical", reference="categorical_ce", ignore_label=IGNORE)
def ignore_counted_in_mean(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    return F.cross_entropy(_wide(z), y, ignore_index=IGNORE, reduction="sum") / y.shape[0]


@broken(T, "reference", "focal modulating factor p^γ instead of (1 - p)^γ", kind="categorical",
        reference="focal_multiclass", params={"gamma": 2.0})
def focal_factor_swapped(z: torch.Tensor, y: torch.Tensor, gamma: float) -> torch.Tensor:
    logp = torch.log_softmax(_wide(z), -1).gather(-1, y[:, None])[:, 0]
    return -(logp.exp() ** gamma * logp).mean()


@broken(T, "live-gradient", "probabilities clamped to [1e-7, 1] before the log: a confidently wrong "
        "prediction gets no gradient at all", kind="categorical")
def clamped_probabilities(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    p = torch.softmax(_wide(z), -1).gather(-1, y[:, None])[:, 0]
    return -torch.log(p.clamp(min=1e-7)).mean()


@broken(T, "finite", "torch's own F.cross_entropy fed float16 logits: its batch mean is accumulated in "
        "float16 and overflows (65504) while the mean itself fits; it shows from |z| ~ 1e4, so the "
        "declared range is float16's whole format", kind="categorical", reference="categorical_ce",
        max_logit="full")
def builtin_ce_in_half(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    return F.cross_entropy(z, y)


@broken(T, "gradient", "nn.Module wrapping a custom Function whose backward forgets the 1/N of the mean",
        kind="categorical", reference="categorical_ce")
class MeanForgottenInBackward(nn.Module):
    def forward(self, z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
        return _ce_function(backward_scale=float(y.shape[0]))(z, y).mean()


@broken(T, "inputs-intact", "the row-max shift done in place (z.sub_(…)) to save memory: the caller's "
        "logits come back shifted", kind="categorical", reference="categorical_ce")
def shift_in_place(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    z.sub_(z.max(-1, keepdim=True).values)  # log softmax is shift-invariant, so the value is right
    return -torch.log_softmax(z, -1).gather(-1, y[:, None]).mean()


# -- correct -----------------------------------------------------------------------------------
@correct("torch functional cross-entropy, computed in float32 for half inputs", kind="categorical",
         reference="categorical_ce", expect=["second-order"])
def torch_ce_functional(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    return F.cross_entropy(_wide(z), y)


@correct("torch nn.Module class built with the declared ε as its constructor argument",
         kind="categorical", reference="smoothed_ce", params={"epsilon": 0.1})
class TorchSmoothedModule(nn.Module):
    def __init__(self, epsilon: float = 0.0) -> None:
        super().__init__()
        self.epsilon = epsilon

    def forward(self, z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
        z = _wide(z)
        nll = F.cross_entropy(z, y, reduction="none")
        # −mean_c log p_c as Σ_c (log p_c / C): dividing first keeps the sum finite (F.cross_entropy's
        # label_smoothing sums the log-probabilities first and overflows at |z| ~ 1e308)
        uniform = -(torch.log_softmax(z, -1) / z.shape[-1]).sum(-1)
        return ((1 - self.epsilon) * nll + self.epsilon * uniform).mean()


torch_bce_module = nn.BCEWithLogitsLoss(reduction="none")
torch_bce_module.__name__ = "torch_bce_module"  # the corpus id (an instance has no name of its own)
correct("torch nn.Module instance (BCEWithLogitsLoss, per-example outputs)", kind="binary",
        reference="bce")(torch_bce_module)


@correct("torch custom autograd.Function with hand-written backward and jvp (and a vmap rule)",
         kind="categorical", reference="categorical_ce", expect=["second-order"])
def torch_ce_function(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    return _right(_wide(z), y).mean()


@correct("torch loss under CPU autocast to bfloat16 (cross-entropy autocasts to float32)",
         kind="categorical", reference="categorical_ce")
def torch_ce_autocast(z: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    with torch.autocast("cpu", dtype=torch.bfloat16):
        return F.cross_entropy(z, y)


@correct("torch functional focal loss from log-probabilities", kind="categorical",
         reference="focal_multiclass", params={"gamma": 2.0})
def torch_focal_functional(z: torch.Tensor, y: torch.Tensor, gamma: float) -> torch.Tensor:
    logp = torch.log_softmax(_wide(z), -1).gather(-1, y[:, None])[:, 0]
    return -((1 - logp.exp()) ** gamma * logp).mean()
