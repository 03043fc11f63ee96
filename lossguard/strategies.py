"""Public Hypothesis strategies for classification-loss inputs, usable in your own ``@given`` tests.

Notation and shapes (class axis last): logits ``z`` of shape (N, C) for softmax-type losses, (N,)
or (N, D) for binary ones; integer labels (N,) in [0, C) or an ignore label; simplex targets
(N, C) with rows summing to 1; binary targets in [0, 1] shaped like ``z``.

Every shape comes from a small menu drawn with ``sampled_from`` (a JAX loss compiles once per
shape, so a search over a few shapes compiles a few functions); shrinking moves toward the first
shape of the menu and toward simple values (0, 1, uniform rows, label 0). Extreme magnitudes are
the rungs of :func:`lossguard.ladders.magnitudes`, mixed into ordinary values, and ties (two
equal classes, or a whole row equal) are mixed in as well.

Arguments follow Hypothesis's conventions: main arguments first, bounds keyword-only, ``None``
means the documented default, and every argument is validated when the strategy is built, raising
:class:`StrategyArgumentError` (both a :class:`hypothesis.errors.InvalidArgument` and a
:class:`lossguard.errors.SpecError`) with a message ``"name=value: expected …; try …"``. Each
function's docstring shows a ``@given`` use.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, NamedTuple

import numpy as np
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from ._strategy_args import (MAX_ELEMENTS, StrategyArgumentError, _dtype, _fail, _flag, _int, _magnitude,
                             _one_shape, _shapes)
from .cases import Cell, shape_menu, target_domain, to_inputs
from .ladders import largest_finite, magnitudes
from .spec import LossSpec
from .tolerance import dtype_of

__all__ = ["StrategyArgumentError", "Case", "DEFAULT_SHAPES", "DEFAULT_BINARY_SHAPES", "logits", "labels",
           "binary_targets", "simplex_targets", "cases"]

#: The default menus of logit shapes: (N, C) as a default battery uses, and binary (N,), (N, D).
DEFAULT_SHAPES: tuple[tuple[int, ...], ...] = ((8, 3), (16, 10))
DEFAULT_BINARY_SHAPES: tuple[tuple[int, ...], ...] = ((16,), (8, 3))
#: Smallest weight of a class in a dense simplex row before normalising (2^-10 keeps rows interior).
_MIN_WEIGHT = 2.0**-10
_TIES = ("none", "pair", "row")


class Case(NamedTuple):
    """One drawn case for a declared loss: ``loss(case.predictions, case.targets)``."""

    predictions: np.ndarray
    targets: np.ndarray


# ------------------------------------------------------------------------------ strategies


def _apply_ties(drawn: tuple[np.ndarray, str]) -> np.ndarray:
    a, mode = drawn
    if a.shape[-1] < 2 or mode == "none":
        return a
    a = a.copy()
    if mode == "pair":
        a[..., 1] = a[..., 0]  # two classes tie exactly
    else:
        a[...] = a[..., :1]  # every class of a row ties: softmax is uniform
    return a


def logits(
    shape: tuple[int, ...] | Sequence[tuple[int, ...]] | None = None,
    *,
    dtype: str = "float64",
    min_magnitude: float | None = None,
    max_magnitude: float | None = None,
    extremes: bool = True,
    ties: bool = True,
) -> st.SearchStrategy[np.ndarray]:
    """Arrays of logits with extreme magnitudes and ties mixed in.

    Shapes: ``shape`` is one shape (a tuple) or a menu (a list of tuples, drawn with
    ``sampled_from``; shrinking prefers the first). Values: every element has
    |z| ≤ ``max_magnitude``; with ``extremes`` some elements are ±M for the ladder rungs
    M ∈ [``min_magnitude``, ``max_magnitude``]; with ``ties`` some arrays repeat class 0 in class 1
    or across a whole row. Values are drawn in float64 and rounded to ``dtype``.

    Args:
        shape: a shape or a menu of shapes; ``None`` is :data:`DEFAULT_SHAPES`.
        dtype: one of float16, bfloat16, float32, float64 (the returned array's dtype).
        min_magnitude: smallest ladder rung mixed in; ``None`` is 10 (or ``max_magnitude`` if lower).
        max_magnitude: bound on |z|; ``None`` is 1e4, or the dtype's largest finite if lower.
        extremes: mix in ±M for ladder rungs M.
        ties: mix in tied classes.

    Returns:
        A strategy of ``numpy`` arrays.

    Example:
        >>> from hypothesis import given, settings
        >>> @settings(max_examples=5, database=None)
        ... @given(logits((4, 3), max_magnitude=50.0))
        ... def bounded(z):
        ...     assert z.shape == (4, 3) and abs(z).max() <= 50.0
        >>> bounded()
    """
    shapes = _shapes("shape", shape, DEFAULT_SHAPES)
    name = _dtype(dtype)
    top = largest_finite(name)
    hi = min(1e4, top) if max_magnitude is None else _magnitude("max_magnitude", max_magnitude, top)
    lo = min(10.0, hi) if min_magnitude is None else _magnitude("min_magnitude", min_magnitude, top)
    if lo > hi:
        raise _fail("min_magnitude", min_magnitude, f"at most max_magnitude={hi!r}",
                    "lower it or raise max_magnitude")
    _flag("extremes", extremes)
    _flag("ties", ties)
    np_dt = dtype_of(name)
    # round the bound down into the dtype so that rounding a drawn value never exceeds it
    cap = float(np.asarray(hi).astype(np_dt))
    cap = cap if cap <= hi else float(np.nextafter(np.asarray(cap, np_dt), np.asarray(0, np_dt)))
    elements: st.SearchStrategy[float] = st.floats(-hi, hi, allow_nan=False, allow_infinity=False)
    rungs = [m for m in magnitudes(name, up_to_max=hi > 1e4) if lo <= m <= hi and m > 0]
    if extremes and rungs:
        signed = [s * m for m in rungs for s in (1.0, -1.0)]
        elements = st.one_of(elements, st.sampled_from(signed))
    modes = _TIES if ties else _TIES[:1]

    def finish(a: np.ndarray) -> np.ndarray:
        # |a| ≤ cap and cap is representable, so round-to-nearest into the dtype stays ≤ cap
        return np.clip(a, -cap, cap).astype(np_dt)

    def for_shape(s: tuple[int, ...]) -> st.SearchStrategy[np.ndarray]:
        arrays = hnp.arrays(np.float64, s, elements=elements)
        return st.tuples(arrays, st.sampled_from(modes)).map(_apply_ties).map(finish)

    return st.sampled_from(shapes).flatmap(for_shape)


def labels(
    n: int, classes: int, *, ignore_label: int | None = None, min_kept: int = 1
) -> st.SearchStrategy[np.ndarray]:
    """Integer class labels of shape (n,), with the ignore label mixed in when one is given.

    Shrinking moves toward label 0 and no ignored example.

    Args:
        n: number of examples N.
        classes: number of classes C (labels in [0, C)).
        ignore_label: a label outside [0, C) meaning "leave this example out", or ``None``.
        min_kept: at least this many examples keep a real label (the first ones are restored).

    Returns:
        A strategy of int64 arrays.

    Example:
        >>> from hypothesis import given, settings
        >>> @settings(max_examples=5, database=None)
        ... @given(labels(8, 3, ignore_label=-100))
        ... def some_kept(y):
        ...     assert y.shape == (8,) and ((y >= 0) & (y < 3)).any()
        >>> some_kept()
    """
    n = _int("n", n, 1, "try n=8")
    classes = _int("classes", classes, 2, "try classes=3")
    if ignore_label is not None:
        integral = isinstance(ignore_label, (int, np.integer)) and not isinstance(ignore_label, bool)
        if not integral or 0 <= ignore_label < classes:
            raise _fail("ignore_label", ignore_label, f"an integer outside [0, {classes})", "try -100")
    min_kept = _int("min_kept", min_kept, 0, f"try min_kept=1 (n={n})", high=n)
    top = classes if ignore_label is None else classes + 1  # index C stands for the ignore label

    def finish(raw: np.ndarray) -> np.ndarray:
        y = raw.astype(np.int64)
        if ignore_label is None:
            return y
        ignored = y == classes
        missing = min_kept - int(np.sum(~ignored))
        if missing > 0:
            ignored[np.flatnonzero(ignored)[:missing]] = False
            y = np.where(ignored, classes, np.where(y == classes, 0, y))
        return np.where(y == classes, ignore_label, y).astype(np.int64)

    return hnp.arrays(np.int64, (n,), elements=st.integers(0, top - 1)).map(finish)


def binary_targets(
    shape: tuple[int, ...] | Sequence[tuple[int, ...]] | None = None, *, soft: bool = True
) -> st.SearchStrategy[np.ndarray]:
    """Binary targets in [0, 1]: hard 0/1 values, with soft values mixed in when ``soft``.

    Args:
        shape: a shape or a menu of shapes; ``None`` is :data:`DEFAULT_BINARY_SHAPES`.
        soft: allow values strictly between 0 and 1.

    Returns:
        A strategy of float64 arrays.

    Example:
        >>> from hypothesis import given, settings
        >>> @settings(max_examples=5, database=None)
        ... @given(binary_targets((16,)))
        ... def in_unit_interval(t):
        ...     assert t.shape == (16,) and ((t >= 0) & (t <= 1)).all()
        >>> in_unit_interval()
    """
    shapes = _shapes("shape", shape, DEFAULT_BINARY_SHAPES)
    _flag("soft", soft)
    hard = st.sampled_from([0.0, 1.0])
    elements = st.one_of(hard, st.floats(0.0, 1.0)) if soft else hard
    return st.sampled_from(shapes).flatmap(lambda s: hnp.arrays(np.float64, s, elements=elements))


def _simplex_rows(drawn: tuple[np.ndarray, ...]) -> np.ndarray:
    weights, kind, hot, drop, allowed = drawn
    n, c = weights.shape
    eye = np.eye(c)
    keep = ~drop
    keep[np.arange(n), hot] = True  # a row with zeros keeps at least its hot class
    sparse = np.where(keep, weights, 0.0)
    rows = np.empty_like(weights)
    for i in range(n):
        what = allowed[int(kind[i])]
        rows[i] = weights[i] if what == "dense" else eye[hot[i]] if what == "one_hot" else sparse[i]
    return rows / rows.sum(axis=-1, keepdims=True)  # normalise onto the simplex (every row sum > 0)


def simplex_targets(
    n: int, classes: int, *, dense: bool = True, one_hot: bool = True, zeros: bool = True
) -> st.SearchStrategy[np.ndarray]:
    """Target distributions: rows of shape (n, classes) on the probability simplex.

    Three kinds of row, each allowed by its flag: ``dense`` rows in the interior (every class at
    least 2^-10 before normalising), ``one_hot`` rows, and rows with ``zeros`` in some classes.
    Shrinking moves toward dense uniform rows.

    Args:
        n: number of examples N.
        classes: number of classes C.
        dense / one_hot / zeros: which kinds of row may appear (at least one).

    Returns:
        A strategy of float64 arrays whose rows sum to 1.

    Example:
        >>> from hypothesis import given, settings
        >>> @settings(max_examples=5, database=None)
        ... @given(simplex_targets(4, 3, one_hot=False, zeros=False))
        ... def interior(t):
        ...     assert abs(t.sum(axis=1) - 1).max() < 1e-12 and (t > 0).all()
        >>> interior()
    """
    n = _int("n", n, 1, "try n=8")
    classes = _int("classes", classes, 2, "try classes=3")
    flags = {"dense": _flag("dense", dense), "one_hot": _flag("one_hot", one_hot), "zeros": _flag("zeros", zeros)}
    allowed = tuple(k if k != "zeros" else "sparse" for k, on in flags.items() if on)
    if not allowed:
        raise _fail("dense", dense, "at least one of dense, one_hot, zeros set to True", "try dense=True")
    if n * classes > MAX_ELEMENTS:
        raise _fail("n", n, f"n * classes <= {MAX_ELEMENTS}", "try n=8")
    return st.tuples(
        hnp.arrays(np.float64, (n, classes), elements=st.floats(_MIN_WEIGHT, 1.0)),
        hnp.arrays(np.int64, (n,), elements=st.integers(0, len(allowed) - 1)),
        hnp.arrays(np.int64, (n,), elements=st.integers(0, classes - 1)),
        hnp.arrays(np.bool_, (n, classes), elements=st.booleans()),
        st.just(allowed),
    ).map(_simplex_rows)


def _cells(spec: LossSpec, shapes: Any) -> list[Cell]:
    if shapes is None:
        return shape_menu(spec, "default")
    if isinstance(shapes, Cell) or (isinstance(shapes, tuple) and shapes and isinstance(shapes[0], int)):
        shapes = [shapes]
    if not isinstance(shapes, (list, tuple)) or not shapes:
        raise _fail("shapes", shapes, "a list of prediction shapes", "try shapes=[(8, 3)]")
    want = ((1, 2), "(N,) or (N, D)") if spec.kind == "binary" else ((2,), "(N, C)")
    out = []
    for s in shapes:
        if not isinstance(s, Cell):
            t = _one_shape("shapes", s)
            if len(t) not in want[0]:
                raise _fail("shapes", s, f"prediction shapes {want[1]} for kind={spec.kind!r}", "try shapes=[(8, 3)]")
            s = Cell(t[0], t[1]) if spec.kind != "binary" else Cell(t[0], d=t[1] if len(t) == 2 else None)
        if spec.classes is not None and s.c is not None and s.c != spec.classes:
            raise _fail("shapes", str(s), f"C={spec.classes} (the declared class count)",
                        f"try shapes=[(8, {spec.classes})]")
        out.append(s)
    return out


def _targets(spec: LossSpec, cell: Cell) -> st.SearchStrategy[np.ndarray]:
    hard = target_domain(spec) == "hard"
    if spec.kind == "categorical":
        assert cell.c is not None
        return labels(cell.n, cell.c, ignore_label=spec.ignore_label)
    if spec.kind == "distribution":
        assert cell.c is not None
        return simplex_targets(cell.n, cell.c, dense=not hard, zeros=not hard)
    return binary_targets(cell.pred_shape(), soft=not hard)


def cases(
    spec: LossSpec,
    *,
    shapes: Sequence[Cell | tuple[int, ...]] | None = None,
    dtype: str = "float64",
    max_magnitude: float | None = None,
    extremes: bool = True,
    ties: bool = True,
) -> st.SearchStrategy[Case]:
    """Whole cases (predictions, targets) for a declared loss.

    Predictions are logits from :func:`logits` mapped to the declared input space (softmax rows
    or sigmoid for ``inputs="probabilities"``); targets follow the kind, the ignore label and the
    target domain of the declared reference (hard 0/1 or one-hot when it is defined only there).

    Args:
        spec: a declaration from :func:`lossguard.declare`.
        shapes: prediction shapes (or :class:`~lossguard.cases.Cell`); ``None`` is the battery's
            default menu for ``spec``.
        dtype: dtype of the predictions (targets stay int64 labels or float64).
        max_magnitude / extremes / ties: as in :func:`logits` (on the logits, before mapping).

    Returns:
        A strategy of :class:`Case`.

    Example:
        >>> import jax
        >>> from lossguard import declare
        >>> spec = declare(lambda z, y: jax.nn.logsumexp(z, -1).mean(), kind="categorical")
        >>> from hypothesis import given, settings
        >>> @settings(max_examples=5, database=None)
        ... @given(cases(spec, shapes=[(8, 3)]))
        ... def shaped(case):
        ...     assert case.predictions.shape == (8, 3) and case.targets.shape == (8,)
        >>> shaped()
    """
    if not isinstance(spec, LossSpec):
        raise _fail("spec", spec, "a LossSpec", "build one with lossguard.declare(loss, kind=...)")
    cells = _cells(spec, shapes)
    name = _dtype(dtype)
    np_dt = dtype_of(name)
    z_strategy = {cell: logits(cell.pred_shape(), max_magnitude=max_magnitude, extremes=extremes, ties=ties)
                  for cell in cells}

    def build(drawn: tuple[np.ndarray, np.ndarray]) -> Case:
        z, y = drawn
        return Case(to_inputs(spec, z).astype(np_dt), y)

    def for_cell(cell: Cell) -> st.SearchStrategy[Case]:
        return st.tuples(z_strategy[cell], _targets(spec, cell)).map(build)

    return st.sampled_from(cells).flatmap(for_cell)
