"""Shared comparison: which cases broke an allowance, and the worst few as examples."""

from __future__ import annotations

import re
from collections.abc import Callable
from typing import Any

import numpy as np

from .._budget import large_case
from .._replay import call, imports
from ..cases import CaseStack
from ..result import Example
from ..spec import LossSpec

__all__ = ["Mismatch", "mismatch", "replay", "examples_from", "fmt", "worst_element", "over_allowance"]


def fmt(a: Any, digits: int = 6) -> str:
    """Short text for a value or array in a message."""
    arr = np.asarray(a)
    if arr.size == 1:
        return f"{float(arr.reshape(-1)[0]):.{digits}g}"
    with np.printoptions(precision=digits, threshold=12, edgeitems=3, linewidth=120):
        return np.array2string(arr, separator=", ")


#: Most values a replay line writes out; a larger case is named by its shapes instead (at
#: (4096, 1000) logits one written-out case made a 74 MB line, three per failed check).
INLINE_VALUES = 10_000


def _literal(a: np.ndarray) -> str:
    """``a`` as a Python list literal that numpy reads back exactly (Python's repr of a float is
    the shortest string that reads back to the same value, since Python 3.1: recalled from
    memory, and held by ``test_a_replay_with_infinities_and_nans_runs_and_gives_the_same_arrays``);
    infinities and nans, which repr writes as bare names, become ``np.inf`` and ``np.nan``."""
    text = repr(np.asarray(a).tolist())
    text = re.sub(r"(?<![\w.])(-?)inf\b", r"\1np.inf", text)
    return re.sub(r"(?<![\w.])nan\b", "np.nan", text)


def replay(spec: LossSpec, z: np.ndarray, y: np.ndarray, dtype: str = "float64") -> str:
    """A copy-pasteable call reproducing one case.

    Cases of up to :data:`INLINE_VALUES` values are written out; a larger one is called as
    ``loss(z, y)`` with a comment giving the shapes and where the arrays are (the example's
    ``predictions`` and ``targets``, in the result and in the JSON report). The call is made in
    the loss's framework and dtype (:mod:`lossguard._replay`: 64-bit mode scoped for JAX).

    Example:
        >>> from lossguard import declare
        >>> spec = declare(lambda z, y: z.sum(), kind="binary")
        >>> replay(spec, np.array([1.5, -np.inf]), np.array([1.0, 0.0]))[:60]
        "loss(np.array([1.5, -np.inf], dtype='float64'), np.array([1."
    """
    z, y = np.asarray(z), np.asarray(y)
    params = "".join(f", {k}={v!r}" for k, v in spec.params.items())
    y_int = np.issubdtype(y.dtype, np.integer)
    if z.size + y.size > INLINE_VALUES:
        return (f"{call('z', 'y', dtype, y_int, params)}   # loss = {spec.name}; z: {dtype} {z.shape}, y: "
                f"{y.dtype.name if y_int else dtype} {y.shape}, too large to write out: they are this "
                f"example's predictions and targets (in the result, and in the JSON report)")
    return f"{call(_literal(z), _literal(y), dtype, y_int, params)}   # loss = {spec.name}; {imports()}"


def _compare(g: np.ndarray, e: np.ndarray, a: np.ndarray,
             k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(bad elements, per-case error/allowance, abs error, rel error) of :class:`Mismatch`."""
    # few full-size temporaries: at (4096, 1000) logits each one costs milliseconds
    with np.errstate(all="ignore"):
        diff = np.subtract(g, e)
        np.abs(diff, out=diff)
        # |g − e| is finite only where both are (inf or nan in either gives inf or nan): then the
        # special-value bookkeeping is skipped, which is the usual case
        any_odd = not bool(np.isfinite(diff).all())
        if any_odd:
            finite = np.isfinite(g)
            finite &= np.isfinite(e)
            odd = ~finite  # non-finite somewhere: agreement only if the same special value
            any_odd = bool(odd.any())  # both finite, but their difference overflowed: no special value
        bad = diff > a
        if any_odd:
            same_special = g == e
            same_special |= np.isnan(g) & np.isnan(e)
            bad |= odd
            bad &= ~same_special
            zero_odd = odd & same_special
        scratch = np.divide(diff, a)  # error over allowance
        if any_odd:
            scratch[odd] = np.inf
            scratch[zero_odd] = 0.0
        ratio = scratch.reshape(k, -1).max(axis=1)
        if any_odd:
            np.copyto(scratch, diff)  # absolute error
            scratch[odd] = np.inf
            scratch[zero_odd] = 0.0
            ab = scratch.reshape(k, -1).max(axis=1)
        else:
            ab = diff.reshape(k, -1).max(axis=1)
        np.abs(e, out=scratch)  # relative error: |g − e| / |e|, or |g − e| where e = 0
        pos = scratch > 0
        np.divide(diff, scratch, out=scratch, where=pos)
        np.copyto(scratch, diff, where=~pos)
        if any_odd:
            scratch[odd] = np.inf
        rel = scratch.reshape(k, -1).max(axis=1)
    return bad, ratio, ab, rel


class Mismatch:
    """Per-case comparison of ``got`` against ``expected`` with absolute allowance ``atol``.

    A case fails when any element differs by more than its allowance, when ``got`` is not
    finite where ``expected`` is, or when ``got`` is finite where ``expected`` is infinite.
    Both infinite with the same sign, or both nan, agree.
    """

    def __init__(self, got: np.ndarray, expected: np.ndarray, atol: np.ndarray | float) -> None:
        g = np.asarray(got, dtype=np.float64)
        e = np.asarray(expected, dtype=np.float64)
        a = np.broadcast_to(np.asarray(atol, dtype=np.float64), np.broadcast_shapes(g.shape, np.shape(atol)))
        k = g.shape[0] if g.ndim else 1
        g, e = np.broadcast_arrays(g, e)
        self.got, self.expected, self.atol = g, e, a
        if k > 1 and g.ndim > 1 and large_case(g[0].size):  # one case at a time (see large_case)
            self.bad_elements = np.empty(g.shape, bool)
            self.case_ratio, self.case_abs, self.case_rel = np.empty(k), np.empty(k), np.empty(k)
            for i in range(k):
                bad, ratio, ab, rel = _compare(g[i:i + 1], e[i:i + 1], np.broadcast_to(a, g.shape)[i:i + 1], 1)
                self.bad_elements[i] = bad[0]
                self.case_ratio[i], self.case_abs[i], self.case_rel[i] = ratio[0], ab[0], rel[0]
        else:
            self.bad_elements, self.case_ratio, self.case_abs, self.case_rel = _compare(g, e, a, k)
        self.case_bad = self.bad_elements.reshape(k, -1).any(axis=1)

    @property
    def failed(self) -> int:
        return int(self.case_bad.sum())

    def order(self, only_failed: bool = True) -> np.ndarray:
        """Case indices, worst first."""
        idx = np.flatnonzero(self.case_bad) if only_failed else np.arange(self.case_bad.size)
        return idx[np.argsort(-self.case_ratio[idx], kind="stable")]

    def max_abs(self) -> float:
        v = self.case_abs[np.isfinite(self.case_abs)]
        return float(v.max()) if v.size else (float("inf") if self.case_abs.size else 0.0)

    def max_rel(self) -> float:
        v = self.case_rel[np.isfinite(self.case_rel)]
        return float(v.max()) if v.size else (float("inf") if self.case_rel.size else 0.0)


def mismatch(got: np.ndarray, expected: np.ndarray, atol: np.ndarray | float) -> Mismatch:
    return Mismatch(got, expected, atol)


def over_allowance(ratio: float) -> str:
    """A worst case in words, from its error over its allowance (a non-finite result counts as
    infinitely far): "3.2e+02 times its allowance", "non-finite where a finite value was due"."""
    if not np.isfinite(ratio):
        return "non-finite where a finite value was due (or finite where the true value is not)"
    return f"{ratio:.2g} times its allowance"


def worst_element(got: np.ndarray, expected: np.ndarray, atol: np.ndarray) -> tuple[float, float, float]:
    """(abs error, rel error, allowance) of one case's element with the largest error over its
    allowance, so that the three numbers a report prints come from the same element (a
    non-finite disagreement counts as the worst)."""
    g, e, a = (np.asarray(x, dtype=np.float64).reshape(-1) for x in (got, expected, atol))
    with np.errstate(all="ignore"):
        diff = np.abs(g - e)
        agree = (g == e) | (np.isnan(g) & np.isnan(e))
        ratio = np.where(agree, 0.0, np.where(np.isfinite(diff), diff / a, np.inf))
        j = int(np.argmax(np.nan_to_num(ratio, nan=np.inf)))
        ab = 0.0 if agree[j] else float(diff[j]) if np.isfinite(diff[j]) else np.inf
        rel = ab / abs(e[j]) if np.isfinite(e[j]) and e[j] != 0 else ab
    return ab, float(rel), float(a[j])


def examples_from(
    m: Mismatch,
    spec: LossSpec,
    stack: CaseStack,
    what: str,
    *,
    dtype: str = "float64",
    most: int = 3,
    only_failed: bool = True,
    replay_of: Callable[[int], str] | None = None,
) -> list[Example]:
    """The worst ``most`` cases of a comparison as :class:`Example` records.

    ``replay_of(k)`` overrides the replay text of case k (default: one call of the loss).
    """
    out = []
    for k in m.order(only_failed)[:most]:
        ab, rel, allowed = worst_element(m.got[k], m.expected[k], np.broadcast_to(m.atol, m.got.shape)[k])
        out.append(
            Example(
                what=what,
                predictions=stack.predictions[k],
                targets=stack.targets[k],
                got=m.got[k],
                expected=m.expected[k],
                abs_err=ab,
                rel_err=rel,
                allowance=allowed,
                note=stack.note(int(k)),
                replay=replay_of(int(k)) if replay_of else replay(spec, stack.predictions[k], stack.targets[k], dtype),
                dtype=dtype,
            )
        )
    return out
