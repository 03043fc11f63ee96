"""The loss's output at every shape the battery uses, read before any check runs.

The evaluator reads the reduction (a scalar, or one value per example) from one probe shape. A
loss whose output rank depends on the input's rank — a binary loss that averages over the last
axis returns a scalar for predictions (N,) but (N,) for (N, D) — would then be called at a shape
whose output matches neither reading, and the checks there would end in errors. Here each shape
of the battery's menus (:func:`lossguard.cases.shape_menu` at thorough effort, which holds the
others) is classified up front: shapes whose output reads like the probe's are kept, the others
are left out with the reason (stated in the report's header), and a declaration that keeps none
is refused at the top.

Classification (class axis last): an output of shape () is ``"scalar"``; the predictions' shape
(binary) or its first axis (categorical, distribution) is ``"per_example"``; anything else is
``None``.

Example:
    >>> from lossguard.cases import Cell
    >>> classify("binary", Cell(8, d=3).pred_shape(), (8,)) is None
    True
    >>> classify("categorical", Cell(8, 3).pred_shape(), (8,))
    'per_example'
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ._deadline import Stopped
from .cases import Cell, random_stack, shape_menu

if TYPE_CHECKING:
    from .evaluate import Evaluator

__all__ = ["classify", "output_shape", "survey"]


def classify(kind: str, pred_shape: tuple[int, ...], out_shape: tuple[int, ...]) -> str | None:
    """``"scalar"``, ``"per_example"`` or ``None`` (see the module docstring)."""
    if out_shape == ():
        return "scalar"
    per_example = pred_shape if kind == "binary" else pred_shape[:1]
    return "per_example" if tuple(out_shape) == tuple(per_example) else None


def output_shape(ev: Evaluator, cell: Cell) -> tuple[int, ...] | None:
    """The loss's output shape for one case of ``cell`` (shapes only where the framework allows:
    JAX traces without compiling), or ``None`` when the call fails there (the checks report it)."""
    spec = ev.spec
    stack = random_stack(spec, cell, np.random.default_rng(0), 2)
    try:
        return ev.adapter.output_shape(stack.predictions, stack.targets)
    except (Exception, Stopped):  # the loss fails (or times out) at this shape: the checks that use it say so
        return None


def survey(ev: Evaluator, cells: list[Cell] | None = None) -> dict[Cell, str]:
    """Shapes to leave out, with the reason: those whose output does not read as ``ev.output``."""
    spec = ev.spec
    out: dict[Cell, str] = {}
    for cell in cells if cells is not None else shape_menu(spec, "thorough"):
        shape = output_shape(ev, cell)
        if shape is None or classify(spec.kind, cell.pred_shape(), shape) == ev.output:
            continue
        out[cell] = (f"predictions of shape {cell.pred_shape()} give an output of shape {tuple(shape)}, "
                     f"not {'a scalar' if ev.output == 'scalar' else 'one value per example'} as at the "
                     f"probe's shape")
    return out
