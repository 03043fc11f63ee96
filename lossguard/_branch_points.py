"""Special points for the gradient checks: where loss implementations branch.

Notation and shapes as in :mod:`lossguard.cases` (K cases stacked on axis 0, class axis last).
Zeros, exact ties and the logit values where stable formulas switch branches are where a
hand-written gradient is most often wrong, and where finite differences meet kinks
(:mod:`lossguard._fd` judges those by one-sided bounds). Re-exported by :mod:`lossguard._fd`.

Example:
    >>> import numpy as np
    >>> from lossguard import declare
    >>> from lossguard.cases import Cell
    >>> s = branch_points(declare(lambda z, y: z.sum(), kind="categorical"), Cell(4, 3), np.random.default_rng(0))
    >>> len(s), s.notes[0]
    (6, 'special: all zero')
"""

from __future__ import annotations

import numpy as np

from .cases import CaseStack, Cell, draw_targets, to_inputs
from .spec import LossSpec

__all__ = ["THRESHOLDS", "branch_points", "packed_branch_points"]

#: Logit values where stable formulas commonly switch branches (common practice).
THRESHOLDS = (0.0, 1.0, -1.0, 15.0, -15.0, 20.0, -20.0, 30.0, -30.0)


def branch_points(spec: LossSpec, cell: Cell, rng: np.random.Generator, domain: str = "soft") -> CaseStack:
    """Six cases of ``cell`` where implementations branch: all-zero logits, two classes tied at
    the top, the labelled class tied with another, exact zeros among random logits, logits on
    the :data:`THRESHOLDS`, every class tied (binary: ±1e-300 and ±1e-8 around the sign
    switch) — in the declared input space."""
    shape, k = cell.pred_shape(), 6
    y = draw_targets(spec, cell, rng, k, domain=domain)
    z = rng.standard_normal((k,) + shape)
    z[0] = 0.0
    if cell.c is not None:
        lab = y if spec.kind == "categorical" else np.argmax(y, axis=-1)
        lab = np.where((lab >= 0) & (lab < cell.c), lab, 0)
        top = z[1].max(axis=-1) + 1.0
        z[1, :, 0], z[1, :, 1] = top, top  # two classes tied at the maximum
        other = (lab[2] + 1) % cell.c
        rows = np.arange(cell.n)
        z[2, rows, other] = z[2, rows, lab[2]]  # the labelled class tied with another
        z[5] = 3.0  # every class tied
    else:
        z[1] = np.where(rng.random(shape) < 0.5, 0.0, z[1])
        z[2] = 1e-300 * np.sign(z[2])  # either side of the sign switch
        z[5] = np.where(rng.random(shape) < 0.5, 1e-8, -1e-8)
    z[3] = np.where(rng.random(shape) < 0.3, 0.0, z[3])  # exact zeros among random values
    z[4] = rng.choice(THRESHOLDS, size=shape)
    notes = ["special: all zero", "special: tie at the top", "special: label tied", "special: exact zeros",
             "special: branch thresholds", "special: all tied" if cell.c else "special: ±1e-8"]
    return CaseStack(to_inputs(spec, z), y, cell, notes)


def packed_branch_points(spec: LossSpec, cell: Cell, rng: np.random.Generator, domain: str = "soft",
                         k: int = 6) -> CaseStack:
    """:func:`branch_points` packed into ``k`` cases, row by row: row r of case j has the kind
    (j + r) mod 6, so every kind keeps rows in every case while k < 6. It draws only
    the rows that are used: at (4096, 1000) one case instead of six drawn and five sixths dropped.
    Every row of a special case is built on its own, so a row drawn in a shorter case is a row
    of the same kind. ``branch_points`` itself when ``k`` ≥ 6.
    """
    if k >= 6:
        return branch_points(spec, cell, rng, domain)
    kinds = ((np.arange(k)[:, None] + np.arange(cell.n)[None, :]) % 6).ravel()
    pos = np.empty_like(kinds)  # the row each output row takes within the case of its kind
    for kind in range(6):
        at = np.flatnonzero(kinds == kind)
        pos[at] = np.arange(at.size)
    mini = branch_points(spec, Cell(int(pos.max()) + 1, cell.c, cell.d), rng, domain)
    preds = mini.predictions[kinds, pos].reshape((k,) + cell.pred_shape())
    targs = mini.targets[kinds, pos].reshape((k, cell.n) + mini.targets.shape[2:])
    note = "rows in turn from: " + "; ".join(sorted(set(mini.notes)))
    return CaseStack(preds, targs, cell, [note] * k)
