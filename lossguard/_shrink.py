"""The smallest failing input of one case: rows, then classes, removed while a failure holds.

Notation and shapes: one case, predictions z (N, C) with the class axis last (binary: (N,) or
(N, D)), targets y: labels (N,), simplex rows (N, C), or shaped like z (binary). A *predicate*
``fails(stack) -> (K,) bool`` says, for each of K candidate cases of one shape stacked on axis 0
(:class:`~lossguard.cases.CaseStack`), whether the failure still shows there. It knows nothing of
checks; the runner hands it a check's ``still_fails`` (:mod:`lossguard.checks._smallest`).

The search is greedy and deterministic (the same case and predicate give the same answer), and
its cost is counted in predicate calls: each call is one stack of candidates of one shape, so
it costs a JAX loss at most one compilation (a stack of any length is padded to the shape's one
call size). Most failures live in one row, so the first call tries every row on its own cut to
the fewest classes (below): the label's class with one other — the first whose prediction is not
finite (a masked class), the largest, the smallest (binary (N, D): each element alone): shape (1, 2), shared by every check
that shrinks in that dtype. When none of them fails, rows, then classes:

1. every row on its own, in one stack of shape (1, C);
2. else the two halves of the case (one shape); while one of them fails, keep it and halve again;
3. else the case with one row left out, for every row (one shape (N − 1, C)); keep the first
   that fails and go back to 2. Stacks whose size would pass :data:`~lossguard._budget.CASE_ELEMENTS`
   are cut to fewer candidates, so a large case is never copied N times.

Then classes (categorical and distribution targets; binary (N, D): columns), never the classes
the targets need — categorical: the labels present; distribution: each row's largest target —
and never below two classes (one column for binary): 1. only the needed ones; 2. halves of the
others; 3. each other class left out, as for rows. Labels are renumbered to the classes kept;
distribution targets (and probability inputs) are renormalised over them. Class counts are not
reduced when the declaration fixes the class count, a parameter holds one value per class, or
the ignore label is itself a class index. Candidates whose rows are all ignored are not tried.

Example:
    >>> from lossguard import declare
    >>> spec = declare(lambda z, y: z.sum(), kind="categorical")
    >>> z = np.zeros((4, 3)); z[2, 1] = np.inf
    >>> found = smallest_case(spec, z, np.array([0, 1, 2, 0]),
    ...                       lambda s: ~np.isfinite(s.predictions).all(axis=(1, 2)), max_calls=8)
    >>> found.stack.predictions[0].tolist(), found.stack.targets[0].tolist(), found.calls
    ([[inf, 0.0]], [1], 1)

References:
    A. Zeller and R. Hildebrandt, "Simplifying and Isolating Failure-Inducing Input", IEEE
    Transactions on Software Engineering 28(2), 2002 (removing halves, then single parts, while
    the failure holds).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from ._budget import CASE_ELEMENTS
from .cases import CaseStack, Cell
from .spec import LossSpec

__all__ = ["Shrunk", "smallest_case", "shape_words", "shrinks_classes"]

Fails = Callable[[CaseStack], np.ndarray]


def shape_words(spec: LossSpec, shape: Sequence[int]) -> str:
    """``"1 row × 3 classes"`` (binary: ``"2 examples"``, ``"1 row × 2 columns"``)."""
    def count(n: int, one: str, many: str) -> str:
        return f"{n} {one if n == 1 else many}"

    rows = count(shape[0], "row", "rows")
    if spec.kind == "binary":
        return count(shape[0], "example", "examples") if len(shape) == 1 else f"{rows} × {count(shape[1], 'column', 'columns')}"
    return f"{rows} × {count(shape[1], 'class', 'classes')}"


def shrinks_classes(spec: LossSpec, width: int) -> bool:
    """Whether the class axis (binary: columns) of a case may be cut (see the module docstring)."""
    if spec.kind == "binary":
        return True
    per_class = any(isinstance(v, (list, tuple, np.ndarray)) and len(v) >= 2 for v in spec.params.values())
    ignore_is_class = spec.ignore_label is not None and 0 <= spec.ignore_label < width
    return spec.classes is None and not per_class and not ignore_is_class


@dataclass
class Shrunk:
    """The smallest failing case found (a stack of one case), the predicate calls spent, and
    whether the search stopped at its cap of calls rather than at a case nothing smaller of."""

    stack: CaseStack
    calls: int
    capped: bool
    #: the predicate call that found ``stack``: (the stack of candidates it judged, the index of
    #: ``stack``'s case in it); ``None`` when nothing smaller failed
    found_in: tuple[CaseStack, int] | None = None


class _Search:
    """The greedy search over one case (see the module docstring)."""

    def __init__(self, spec: LossSpec, fails: Fails, max_calls: int) -> None:
        self.spec, self.fails, self.max_calls = spec, fails, max_calls
        self.calls, self.capped = 0, False
        self.found_in: tuple[CaseStack, int] | None = None

    def _real(self, y: np.ndarray) -> bool:
        """The case keeps at least one row that is not ignored."""
        ig = self.spec.ignore_label
        return ig is None or self.spec.kind != "categorical" or bool(np.any(y != ig))

    def first(self, cands: list[tuple[np.ndarray, np.ndarray]]) -> int | None:
        """The index of the first candidate on which the failure holds (one predicate call)."""
        idx = [i for i, (_, y) in enumerate(cands) if self._real(y)]
        if not idx:
            return None
        each = cands[idx[0]][0].size
        idx = idx[:max(CASE_ELEMENTS // max(each, 1), 1)]  # a large case is not copied N times
        if self.calls >= self.max_calls:
            self.capped = True
            return None
        self.calls += 1
        z = np.stack([cands[i][0] for i in idx])
        shape = z.shape[1:]
        cell = Cell(shape[0], shape[1]) if self.spec.kind != "binary" else (
            Cell(shape[0]) if len(shape) == 1 else Cell(shape[0], d=shape[1]))
        stack = CaseStack(z, np.stack([cands[i][1] for i in idx]), cell, [""] * len(idx))
        hit = np.flatnonzero(np.asarray(self.fails(stack))[:len(idx)])
        if not hit.size:
            return None
        self.found_in = (stack, int(hit[0]))  # the case kept last is always the last one found
        return idx[int(hit[0])]

    def reduce(self, z: np.ndarray, y: np.ndarray, axis_len: int, least: int,
               keep: Callable[[np.ndarray, np.ndarray, list[int]], tuple[np.ndarray, np.ndarray] | None],
               fixed: list[int], lone_known: bool = False) -> tuple[np.ndarray, np.ndarray]:
        """Cut positions of one axis (rows or classes) while the failure holds.

        ``keep(z, y, positions)`` builds the case restricted to ``positions`` (``None`` if it
        cannot be built); ``fixed`` positions are never removed; ``least`` is the fewest kept.
        ``lone_known``: the single positions were already tried (no need to halve down to them).
        """
        cur = list(range(axis_len))
        base = (z, y)

        def build(pos: list[int]) -> tuple[np.ndarray, np.ndarray] | None:
            return keep(base[0], base[1], pos)

        def tried(pos_lists: list[list[int]]) -> list[int] | None:
            ok = [(p, c) for p in pos_lists if (c := build(p)) is not None]
            hit = self.first([c for _, c in ok])
            return None if hit is None else ok[hit][0]

        while len(cur) > least:
            free = [p for p in cur if p not in fixed]
            if not free:
                break
            h = len(free) // 2
            # drop the first or the last h free positions: two candidates of one size (one shape)
            halves = [sorted(set(cur) - set(free[:h])), sorted(set(cur) - set(free[len(free) - h:]))] if h else []
            halves = [p for p in halves if len(p) >= least and not (lone_known and len(p) == 1)]
            found = tried(halves) if halves else None
            if found is None:
                singles = [[p for p in cur if p != q] for q in free]
                singles = [p for p in singles if len(p) >= least and not (lone_known and len(p) == 1)]
                found = tried(singles) if singles else None
            if found is None:
                break
            cur = found
        out = build(cur)
        return out if out is not None else (z, y)


def _rows(z: np.ndarray, y: np.ndarray, pos: list[int]) -> tuple[np.ndarray, np.ndarray]:
    return z[pos], y[pos]


def _classes(spec: LossSpec) -> Callable[[np.ndarray, np.ndarray, list[int]], tuple[np.ndarray, np.ndarray] | None]:
    """How a case keeps only some classes (binary: columns)."""

    def keep(z: np.ndarray, y: np.ndarray, pos: list[int]) -> tuple[np.ndarray, np.ndarray] | None:
        zk = z[:, pos]
        if spec.kind == "binary":
            return zk, y[:, pos]
        if spec.inputs == "probabilities":
            total = zk.sum(axis=-1, keepdims=True)
            if not np.all(np.isfinite(total) & (total > 0)):
                return None
            zk = zk / total  # the conditional distribution over the classes kept
        if spec.kind == "distribution":
            total = y[:, pos].sum(axis=-1, keepdims=True)
            if not np.all(total > 0):
                return None
            return zk, y[:, pos] / total  # renormalised onto the classes kept
        real = (y >= 0) & (y < z.shape[1])
        new = np.full(z.shape[1], -1)
        new[pos] = np.arange(len(pos))
        if np.any(new[np.where(real, y, 0)][real] < 0):
            return None  # a label's class would go
        return zk, np.where(real, new[np.where(real, y, 0)], y)

    return keep


def _needed(spec: LossSpec, y: np.ndarray, width: int) -> list[int]:
    """The classes the targets need (categorical: the labels; distribution: each row's largest)."""
    if spec.kind == "binary":
        return []
    if spec.kind == "distribution":
        return sorted(set(np.argmax(y, axis=-1).tolist()))
    return sorted(set(int(v) for v in y.reshape(-1) if 0 <= v < width))


def _fewest(spec: LossSpec, z: np.ndarray, y: np.ndarray) -> list[list[int]]:
    """Class sets of the fewest classes for one row: the needed ones, with (below two classes)
    one other class — the first whose prediction is not finite, the largest, the smallest;
    binary: each column alone."""
    width = z.shape[1]
    if spec.kind == "binary":
        return [[c] for c in range(width)]
    need = _needed(spec, y, width)
    others = [c for c in range(width) if c not in need]
    if len(need) >= 2 or not others:
        return [need]
    vals = z[0, others]
    fin = np.flatnonzero(np.isfinite(vals))
    ranked = [others[i] for i in np.flatnonzero(~np.isfinite(vals))[:1]]  # a masked or overflowed one
    if fin.size:
        ranked += [others[fin[int(np.argmax(vals[fin]))]], others[fin[int(np.argmin(vals[fin]))]]]
    return [sorted(need + [c]) for c in dict.fromkeys(ranked)]


def smallest_case(spec: LossSpec, predictions: np.ndarray, targets: np.ndarray, fails: Fails, *,
                  max_calls: int) -> Shrunk:
    """The smallest case found, from one case, on which ``fails`` still holds.

    Args:
        spec: the declaration (kind, inputs, ignore label, parameters).
        predictions, targets: the failing case (shapes in the module docstring).
        fails: the predicate on a stack of candidate cases of one shape.
        max_calls: most predicate calls (each is one stack, of one shape).

    Returns:
        :class:`Shrunk`; its stack is the given case itself when nothing smaller failed.
    """
    z, y = np.asarray(predictions, dtype=np.float64), np.asarray(targets)
    s = _Search(spec, fails, max_calls)
    wide = z.ndim == 2 and shrinks_classes(spec, z.shape[1])
    least = 1 if spec.kind == "binary" else 2
    keep = _classes(spec)
    if wide and z.shape[1] > least:  # 0. every row alone with the fewest classes: one shape
        cands = [c for r in range(z.shape[0]) for pos in _fewest(spec, z[r:r + 1], y[r:r + 1])
                 if len(pos) == least and (c := keep(z[r:r + 1], y[r:r + 1], pos)) is not None]
        hit = s.first(cands)
        if hit is not None:
            z, y = cands[hit]
    lone_known = False
    if z.shape[0] > 1:  # 1. every row alone, in one stack
        hit = s.first([(z[r:r + 1], y[r:r + 1]) for r in range(z.shape[0])])
        if hit is not None:
            z, y = z[hit:hit + 1], y[hit:hit + 1]
        lone_known = hit is None
    if z.shape[0] > 1:
        z, y = s.reduce(z, y, z.shape[0], 1, _rows, [], lone_known)
    if wide and z.shape[1] > least:
        need = _needed(spec, y, z.shape[1])
        others = [c for c in range(z.shape[1]) if c not in need]
        only = sorted(need + others[:max(least - len(need), 0)])
        if len(only) < z.shape[1] and (built := keep(z, y, only)) is not None and s.first([built]) is not None:
            z, y = built
            need = _needed(spec, y, z.shape[1])
        if z.shape[1] > least:
            z, y = s.reduce(z, y, z.shape[1], least, keep, need)
    cell = Cell(z.shape[0], z.shape[1]) if spec.kind != "binary" else (
        Cell(z.shape[0]) if z.ndim == 1 else Cell(z.shape[0], d=z.shape[1]))
    return Shrunk(CaseStack(z[None], y[None], cell, [""]), s.calls, s.capped, s.found_in)
