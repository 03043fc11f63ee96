"""A torch loss that shifts its logits in place (for the inputs-intact check)."""

import torch


def shifts_in_place(z, y):
    z.sub_(z.max(dim=-1, keepdim=True).values)  # the caller's tensor changes
    return torch.nn.functional.cross_entropy(z, y)


def correct(z, y):
    return torch.nn.functional.cross_entropy(z, y)
