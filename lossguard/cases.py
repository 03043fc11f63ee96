"""Case generation: a small menu of shapes, many cases stacked along a leading axis.

Every new array shape or dtype costs JAX a compilation, so a battery draws its cases from a
handful of shapes (:func:`shape_menu`) and evaluates K cases of one shape at once. A
:class:`CaseStack` holds K cases of one shape: predictions (K, N, C) — binary (K, N) or
(K, N, D) — and targets (K, N) integer labels, (K, N, C) simplex rows, or binary targets shaped
like the predictions. Canonical values are float64; checks cast them to the dtype under test.

How many cases a stack holds follows the size of a case (:mod:`lossguard._budget`): at the
menu's shapes every check keeps its full count, one case per (pattern, magnitude) of the ladder;
once N·C is large (a (4096, 1000) case holds 4096 rows of 1000 logits) fewer random cases are
drawn and the ladder is *packed*: one case holds several (pattern, magnitude) pairs, its rows
taking them in turn, so every pair still appears while the number of cases stays bounded.

All randomness flows from a ``numpy.random.Generator`` the caller seeds.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from ._budget import case_count
from .ladders import PATTERNS, ladder_rows, magnitudes, mixed_scales, thin_rungs
from .effort import EFFORTS, Effort, get_effort
from .spec import LossSpec

__all__ = ["Cell", "CaseStack", "EFFORTS", "shape_menu", "cases_per_cell", "target_domain",
           "random_stack", "ladder_stack", "ladder_case_count", "to_inputs", "concat", "draw_targets",
           "LADDER_LEAST", "split_cell", "halves", "take_rows", "join"]

#: Fewest cases the shared ladder is packed into at the largest shapes: one, holding every
#: (pattern, magnitude) pair. Its comparisons are allowed the rounding of its largest |z| (1e4);
#: the tight allowances at moderate logits come from the random cases. Every check that uses
#: the shared cases evaluates each one several times, so one case fewer is a quarter of their cost.
LADDER_LEAST = 1


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

    def elements(self) -> int:
        """Prediction elements of one case: N·C (binary: N or N·D)."""
        return int(np.prod(self.pred_shape()))

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


def shape_menu(spec: LossSpec, effort: str | Effort = "default") -> list[Cell]:
    """The few shapes a battery uses (a class count fixed by the spec is honoured): the first
    ``Effort.menu_cells`` of the menu."""
    if spec.kind == "binary":
        cells = [Cell(16), Cell(8, d=3), Cell(64, d=5)]
    else:
        c_small, c_large = (spec.classes, spec.classes) if spec.classes else (3, 10)
        cells = [Cell(8, c_small), Cell(16, c_large), Cell(64, c_large), Cell(5, spec.classes or 2)]
    return cells[:get_effort(effort).menu_cells]


def cases_per_cell(effort: str | Effort = "default", cell: Cell | None = None) -> int:
    """How many random cases each cell gets: ``Effort.cases_per_cell`` (16, 48 or 256), fewer for
    a large ``cell``.

    With ``cell``, :func:`lossguard._budget.case_count` bounds the count by the cell's size (the
    menu's shapes keep the full count; a (4096, 1000) cell gets 2).

    Example:
        >>> cases_per_cell("default"), cases_per_cell("default", Cell(4096, 1000))
        (48, 2)
    """
    want = get_effort(effort).cases_per_cell
    return want if cell is None else case_count(want, cell.elements())


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
    z = rng.standard_normal(shape)
    z *= scales.reshape((k,) + (1,) * (len(shape) - 1))  # in place: no second array of the stack's size
    if cell.c is not None and k >= 4:
        # a quarter of the cases get an exact tie between two classes in every row
        tie = np.arange(k) % 4 == 3
        z[tie, :, 1] = z[tie, :, 0]
    targets = draw_targets(spec, cell, rng, k, domain=domain)
    notes = [f"random, logit scale {s:.3g}" for s in scales]
    return CaseStack(to_inputs(spec, z), targets, cell, notes)


def ladder_case_count(cell: Cell, pairs: int, least: int = LADDER_LEAST) -> int:
    """How many cases a ladder of ``pairs`` (pattern, magnitude) pairs gets at ``cell``: one per
    pair while the budget allows (the menu's shapes), else fewer, never below ``least``."""
    return case_count(pairs, cell.elements(), least=least)


def _loss_size(pair: tuple[str, float]) -> tuple[float, float]:
    """A sort key: roughly how large the loss of rows of this (pattern, M) is (right ≈ 0, equal ≈
    ln C, huge and mixed ≈ M, wrong ≈ 2M for a softmax loss), then M."""
    pattern, m = pair
    return {"right": 0.0, "equal": 1.0, "wrong": 2.0 * m}.get(pattern, m), m


def _cut(idx: list[int], k: int, n: int) -> list[np.ndarray]:
    """``idx`` cut into ``k`` consecutive groups (more if a group would exceed ``n`` rows)."""
    if not idx:
        return []
    return [g for g in np.array_split(np.asarray(idx), min(max(k, -(-len(idx) // n)), len(idx))) if g.size]


def _pattern_rows(spec: LossSpec, cell: Cell, rng: np.random.Generator, y: np.ndarray, pattern: str,
                  m: float) -> np.ndarray:
    """Logits for the targets ``y`` (some rows of a case of ``cell``) following ``pattern`` at M."""
    if cell.c is not None:
        labels = y if spec.kind == "categorical" else np.argmax(y, axis=-1)
        return ladder_rows(rng, labels, cell.c, pattern, m)
    # binary: the sign agrees with the target for "right", disagrees for "wrong"
    sign = np.where(y >= 0.5, 1.0, -1.0)
    if pattern == "right":
        return sign * m
    if pattern == "wrong":
        return -sign * m
    if pattern == "equal":
        return np.full(y.shape, m)
    if pattern == "huge":
        z = rng.standard_normal(y.shape)
        z.reshape(-1)[rng.integers(0, z.size)] = m
        return z
    if pattern == "mixed":
        signs = np.where(rng.random(y.size) < 0.5, -1.0, 1.0)
        return (signs * mixed_scales(rng, m, y.size)).reshape(y.shape)
    raise ValueError(f"pattern={pattern!r}: expected one of {PATTERNS}; try 'wrong'")


def ladder_stack(
    spec: LossSpec,
    cell: Cell,
    rng: np.random.Generator,
    *,
    mags: np.ndarray | None = None,
    patterns: Sequence[str] = PATTERNS,
    domain: str = "soft",
    cases: int | None = None,
    order: str = "rung",
    dtypes: Sequence[str] | None = None,
    apart_above: float | None = None,
) -> CaseStack:
    """The extreme-logit ladder for this cell: every (pattern, magnitude) pair, in ``cases`` cases.

    One case per pair when ``cases`` (default: :func:`ladder_case_count`) allows it — the layout
    of the menu's small shapes. Otherwise the pairs are *packed*: listed by magnitude
    (``order="rung"``) or by the size of the loss they produce (``order="loss"``, so that rows
    whose true loss overflows share a case with each other, not with rows that must stay
    finite), cut into ``cases`` consecutive groups, and each group fills one case, its rows
    taking the group's pairs in turn. Packing needs N ≥ the pairs per case; where rows run out,
    the magnitudes are thinned (:func:`~lossguard.ladders.thin_rungs`, keeping 0, the top and
    the overflow rungs of ``dtypes``). With ``apart_above``, the pairs whose rough loss size
    (right 0, equal 1, huge and mixed M, wrong 2M) exceeds it are packed in a case of their
    own: a packed case must not mix rows whose loss overflows a dtype with rows whose mean,
    diluted by them, still fits (the overflowing rows would be judged through the mean).

    Example:
        >>> from lossguard import declare
        >>> spec = declare(lambda z, y: z.mean(), kind="categorical")
        >>> small, large = (ladder_stack(spec, c, np.random.default_rng(0)) for c in (Cell(16, 10), Cell(4096, 1000)))
        >>> len(small), len(large)
        (55, 1)
    """
    mags = magnitudes("float64") if mags is None else np.asarray(mags, dtype=np.float64)
    n_pairs = len(mags) * len(patterns)
    k = ladder_case_count(cell, n_pairs) if cases is None else max(int(cases), 1)
    preds, targs, notes = [], [], []
    if k >= n_pairs:
        for pattern in patterns:
            for m in mags:
                y = draw_targets(spec, cell, rng, 1, domain=domain)[0]
                preds.append(_pattern_rows(spec, cell, rng, y, pattern, float(m)))
                targs.append(y)
                notes.append(f"ladder {pattern} |z|={m:.3g}")
        z = np.stack(preds)
    else:
        if -(-n_pairs // k) > cell.n:  # more pairs per case than rows: thin the magnitudes
            mags = thin_rungs(mags, max(k * cell.n // len(patterns), 1), dtypes)
            k = max(k, -(-len(mags) * len(patterns) // cell.n))
        pairs = [(p, float(m)) for m in mags for p in patterns]
        if order == "loss":
            pairs.sort(key=_loss_size)
        big = [apart_above is not None and _loss_size(pm)[0] > apart_above for pm in pairs]
        over, rest = [i for i, b in enumerate(big) if b], [i for i, b in enumerate(big) if not b]
        k_over = 1 if over else 0
        groups = _cut(rest, max(k - k_over, 1), cell.n) + _cut(over, k_over, cell.n)
        z = np.empty((len(groups),) + cell.pred_shape())  # filled in place: large cases are not copied
        for g, group in enumerate(groups):
            y = draw_targets(spec, cell, rng, 1, domain=domain)[0]
            turn = np.arange(cell.n) % len(group)  # row i takes the group's pair i mod G
            for j, i in enumerate(group):
                rows = np.flatnonzero(turn == j)
                z[g, rows] = _pattern_rows(spec, cell, rng, y[rows], *pairs[i])
            targs.append(y)
            notes.append("ladder packed, rows in turn: " + ", ".join(f"{p} |z|={m:.3g}" for p, m in
                                                                      (pairs[i] for i in group)))
    return CaseStack(to_inputs(spec, z), np.stack(targs), cell, notes)


def concat(stacks: Sequence[CaseStack]) -> CaseStack:
    """Join stacks of the same cell (one stack is returned as it is: no copy of its arrays)."""
    first = stacks[0]
    if len(stacks) == 1:
        return CaseStack(first.predictions, first.targets, first.cell, list(first.notes) or [""] * len(first))
    return CaseStack(
        np.concatenate([s.predictions for s in stacks]),
        np.concatenate([s.targets for s in stacks]),
        first.cell,
        [n for s in stacks for n in (s.notes or [""] * len(s))],
    )


# ------------------------------------------------------------------------------ rows of cases


def split_cell(cells: list[Cell]) -> Cell:
    """The menu cell whose halves are evaluated: the one with the most rows."""
    return max(cells, key=lambda c: c.n)


def halves(cell: Cell) -> Cell:
    """The cell of half the rows."""
    return Cell(cell.n // 2, cell.c, cell.d)


def take_rows(stack: CaseStack, idx: np.ndarray, cell: Cell | None = None) -> CaseStack:
    """Rows ``idx`` (K, M) of every case (M may differ from N: then pass the new ``cell``)."""
    k = np.arange(len(stack))[:, None]
    return CaseStack(stack.predictions[k, idx], stack.targets[k, idx], cell or stack.cell, list(stack.notes))


def join(a: CaseStack, b: CaseStack, cell: Cell) -> CaseStack:
    """Rows of ``a`` then rows of ``b``, case by case."""
    return CaseStack(np.concatenate([a.predictions, b.predictions], axis=1),
                     np.concatenate([a.targets, b.targets], axis=1), cell, list(a.notes))
