"""Case generation: a small menu of shapes, many cases stacked along a leading axis.

Every new array shape or dtype costs JAX a compilation, so a battery draws its cases from a
handful of shapes (:func:`shape_menu`) and evaluates K cases of one shape at once. A
:class:`CaseStack` holds K cases of one shape: predictions (K, N, C) — binary (K, N) or
(K, N, D) — and targets (K, N) integer labels, (K, N, C) simplex rows, or binary targets shaped
like the predictions. Canonical values are float64; checks cast them to the dtype under test.

All randomness flows from a ``numpy.random.Generator`` the caller seeds.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from .ladders import PATTERNS, ladder_rows, magnitudes
from .options import EFFORTS
from .spec import LossSpec

__all__ = ["Cell", "CaseStack", "EFFORTS", "shape_menu", "cases_per_cell", "target_domain",
           "random_stack", "ladder_stack", "to_inputs", "concat", "draw_targets"]



@dataclass(frozen=True)
class Cell:
    """One shape of the menu: N examples, C classes (None for binary), D trailing binary width."""

    n: int
    c: int | None = None
    d: int | None = None

    def pred_shape(self) -> tuple[int, ...]:
        if self.c is not None:
            return (self.n, self.c)
        return (self.n,) if self.d is None else (self.n, self.d)

    def __str__(self) -> str:
        return "x".join(str(s) for s in self.pred_shape())


@dataclass
class CaseStack:
    """K cases of one shape, stacked on axis 0."""

    predictions: np.ndarray
    targets: np.ndarray
    cell: Cell
    notes: list[str] = field(default_factory=list)

    def __len__(self) -> int:
        return int(self.predictions.shape[0])

    def take(self, idx: Sequence[int] | np.ndarray) -> CaseStack:
        idx = np.asarray(idx, dtype=np.int64)
        notes = [self.notes[i] for i in idx] if self.notes else []
        return CaseStack(self.predictions[idx], self.targets[idx], self.cell, notes)

    def with_predictions(self, predictions: np.ndarray) -> CaseStack:
        return CaseStack(np.asarray(predictions), self.targets, self.cell, list(self.notes))

    def note(self, k: int) -> str:
        return self.notes[k] if self.notes and k < len(self.notes) else ""


def shape_menu(spec: LossSpec, effort: str = "default") -> list[Cell]:
    """The few shapes a battery uses (a class count fixed by the spec is honoured)."""
    if spec.kind == "binary":
        cells = [Cell(16), Cell(8, d=3)]
        if effort == "thorough":
            cells.append(Cell(64, d=5))
    else:
        c_small, c_large = (spec.classes, spec.classes) if spec.classes else (3, 10)
        cells = [Cell(8, c_small), Cell(16, c_large)]
        if effort == "thorough":
            cells += [Cell(64, c_large), Cell(5, spec.classes or 2)]
    return cells[:1] if effort == "quick" else cells


def cases_per_cell(effort: str = "default") -> int:
    """How many random cases each cell gets."""
    return {"quick": 16, "default": 48, "thorough": 256}[effort]


def target_domain(spec: LossSpec) -> str:
    """``"hard"`` when the declared reference is only defined for hard targets, else ``"soft"``."""
    if spec.reference is None:
        return "soft"
    from .references import get_reference

    return get_reference(spec.reference).target_domain


def draw_targets(
    spec: LossSpec, cell: Cell, rng: np.random.Generator, k: int, *, domain: str = "soft"
) -> np.ndarray:
    """Targets for k cases of ``cell``: labels (with the ignore label), simplex rows, or [0, 1]."""
    if spec.kind == "categorical":
        assert cell.c is not None
        labels = rng.integers(0, cell.c, size=(k, cell.n))
        if spec.ignore_label is not None:
            drop = rng.random((k, cell.n)) < 0.25
            drop[:, 0] = False  # every case keeps at least one real example
            labels = np.where(drop, spec.ignore_label, labels)
        return labels.astype(np.int64)
    if spec.kind == "distribution":
        assert cell.c is not None
        t = rng.dirichlet(np.ones(cell.c), size=(k, cell.n))
        kind = rng.integers(0, 3, size=(k, cell.n))
        onehot = np.eye(cell.c)[rng.integers(0, cell.c, size=(k, cell.n))]
        zeros = rng.random((k, cell.n, cell.c)) < 0.4
        zeros[..., 0] = False  # keep one class alive so the row can be renormalised
        sparse = np.where(zeros, 0.0, t)
        sparse = sparse / sparse.sum(-1, keepdims=True)
        t = np.where((kind == 1)[..., None], onehot, np.where((kind == 2)[..., None], sparse, t))
        if domain == "hard":
            t = onehot
        return t
    shape = (k,) + cell.pred_shape()
    hard = rng.integers(0, 2, size=shape).astype(np.float64)
    if domain == "hard":
        return hard
    soft = rng.random(shape)
    return np.where(rng.random(shape) < 0.5, hard, soft)


def to_inputs(spec: LossSpec, logits: np.ndarray) -> np.ndarray:
    """Map float64 logits to the declared input space (identity, softmax rows or sigmoid)."""
    if spec.inputs == "logits":
        return logits
    if spec.kind == "binary":
        # σ(x) = exp(−softplus(−x)), stable for both signs
        return np.exp(-np.logaddexp(0.0, -logits))
    shifted = logits - logits.max(axis=-1, keepdims=True)  # softmax(z) = softmax(z − max z)
    e = np.exp(shifted)
    return e / e.sum(axis=-1, keepdims=True)


def random_stack(
    spec: LossSpec,
    cell: Cell,
    rng: np.random.Generator,
    k: int,
    *,
    domain: str = "soft",
    log10_scale: tuple[float, float] = (-2.0, 1.5),
) -> CaseStack:
    """k random cases: logits at a per-case scale drawn log-uniformly, ties mixed in."""
    shape = (k,) + cell.pred_shape()
    scales = 10.0 ** rng.uniform(*log10_scale, size=k)
    z = rng.standard_normal(shape) * scales.reshape((k,) + (1,) * (len(shape) - 1))
    if cell.c is not None and k >= 4:
        # a quarter of the cases get an exact tie between two classes in every row
        tie = np.arange(k) % 4 == 3
        z[tie, :, 1] = z[tie, :, 0]
    targets = draw_targets(spec, cell, rng, k, domain=domain)
    notes = [f"random, logit scale {s:.3g}" for s in scales]
    return CaseStack(to_inputs(spec, z), targets, cell, notes)


def ladder_stack(
    spec: LossSpec,
    cell: Cell,
    rng: np.random.Generator,
    *,
    mags: np.ndarray | None = None,
    patterns: Sequence[str] = PATTERNS,
    domain: str = "soft",
) -> CaseStack:
    """One case per (pattern, magnitude): the extreme-logit ladder for this cell."""
    mags = magnitudes("float64") if mags is None else np.asarray(mags, dtype=np.float64)
    preds, targs, notes = [], [], []
    for pattern in patterns:
        for m in mags:
            y = draw_targets(spec, cell, rng, 1, domain=domain)[0]
            if cell.c is not None:
                if spec.kind == "categorical":
                    labels = y
                else:
                    labels = np.argmax(y, axis=-1)
                mm = m if pattern != "mixed" else m * 10.0 ** rng.uniform(-6, 0, size=cell.n)
                z = ladder_rows(rng, labels, cell.c, pattern, mm)
            else:
                # binary: the sign agrees with the target for "right", disagrees for "wrong"
                sign = np.where(y >= 0.5, 1.0, -1.0)
                if pattern == "right":
                    z = sign * m
                elif pattern == "wrong":
                    z = -sign * m
                elif pattern == "equal":
                    z = np.full(cell.pred_shape(), m)
                elif pattern == "huge":
                    z = rng.standard_normal(cell.pred_shape())
                    z.reshape(-1)[rng.integers(0, z.size)] = m
                else:
                    z = rng.standard_normal(cell.pred_shape()) * 10.0 ** rng.uniform(
                        -3, np.log10(max(m, 1e-3)) + 1e-12, size=cell.pred_shape())
            preds.append(z)
            targs.append(y)
            notes.append(f"ladder {pattern} |z|={m:.3g}")
    p = to_inputs(spec, np.stack(preds))
    return CaseStack(p, np.stack(targs), cell, notes)


def concat(stacks: Sequence[CaseStack]) -> CaseStack:
    """Join stacks of the same cell."""
    first = stacks[0]
    return CaseStack(
        np.concatenate([s.predictions for s in stacks]),
        np.concatenate([s.targets for s in stacks]),
        first.cell,
        [n for s in stacks for n in (s.notes or [""] * len(s))],
    )
