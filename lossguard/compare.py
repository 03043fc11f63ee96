"""Differential comparison: do two implementations of one declared loss agree?

Both implementations (OLD, the declared one, and NEW, ``spec.with_loss(new)``) are evaluated on
one shared case set — the random and extreme-ladder cases of every shape of the menu
(``Context.standard_cases``) — in float64 and float32, each through its own
:class:`~lossguard.evaluate.Evaluator`. Values and gradients must agree within the rounding
error model of :mod:`lossguard.tolerance` applied to two independently rounded computations.
The report names the largest divergence, where it happens (dtype, case, row, class), and the
smallest input that still shows it, found by a deterministic shrink: first the fewest rows (a
single row out of the case), then simpler values (entries set to 0, rounded to one significant
digit, the row scaled down) while the same kind of divergence persists.

Notation and shapes: as in :mod:`lossguard.cases` (K cases stacked on axis 0, class axis last).

Tolerance, per case, with S = max|z|, n = 16 + 2C + N and u the unit roundoff of the lower of
the two computed precisions (Higham 2002, Lemma 3.1):

    |v_old − v_new| ≤ 2·γ_n·(max(|v_old|, |v_new|) + S)
    ‖g_old − g_new‖_∞ ≤ 2·γ_n·(1 + S)·(max(‖g_old‖_∞, ‖g_new‖_∞) + G)

A value that is finite on one side and not on the other is always a divergence.

Example:
    >>> import jax
    >>> from lossguard import declare
    >>> def a(z, y): return -jax.numpy.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1).mean()
    >>> def b(z, y): return (jax.nn.logsumexp(z, -1) - jax.numpy.take_along_axis(z, y[:, None], -1)[:, 0]).mean()
    >>> spec = declare(a, kind="categorical")
    >>> compare(spec, spec.with_loss(b), effort="quick").agree
    True

References:
    N. J. Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., SIAM, 2002.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._deadline import BATTERY_SECONDS, CALL_SECONDS, Limits, bounded, limits_from
from ._guard import Guard
from ._suggest import bad_value
from .cases import CaseStack, Cell
from .effort import validate_run
from .checks._base import Context
from .checks._compare import Mismatch, examples_from
from .checks._scales import case_scale, gradient_term_scale
from .errors import SpecError
from .evaluate import Evaluator
from .result import CAUTION, CheckResult, Example, RunRecord
from .spec import LossSpec
from .tolerance import op_count, rounding_allowance, unit_roundoff

__all__ = ["Comparison", "compare", "DTYPES_COMPARED"]

DTYPES_COMPARED = ("float64", "float32")
_SHRINK_ROUNDS = 40


@dataclass(kw_only=True)
class Comparison(RunRecord):
    """What ``compare`` found. ``parts`` holds one verdict per (quantity, dtype).

    ``largest`` is the case where the two differ most (relative to the allowance; a non-finite
    value against a finite one counts as infinitely far), with ``got`` = NEW and ``expected`` =
    OLD; ``smallest`` is the shrunk input that still shows the same divergence. ``exit_code``:
    0 when the implementations agree, 1 when they diverge.
    """

    old: str
    new: str
    parts: list[CheckResult]
    largest: Example | None = None
    smallest: Example | None = None

    def _verdicts(self) -> list[CheckResult]:
        return self.parts

    @property
    def agree(self) -> bool:
        """True when every part passed (or was skipped): :attr:`ok` by its name for a comparison."""
        return self.ok

    def to_dict(self) -> dict[str, Any]:
        return {
            "old": self.old, "new": self.new, **self._record(), "agree": self.agree, "caution": CAUTION,
            "parts": [p.to_dict() for p in self.parts],
            "largest": self.largest.to_dict() if self.largest else None,
            "smallest": self.smallest.to_dict() if self.smallest else None,
        }


@dataclass
class _Side:
    """One implementation: its evaluator and a context over the shared cases."""

    ev: Evaluator
    ctx: Context

    def evaluate(self, stack: CaseStack, dtype: str, grads: bool) -> tuple[np.ndarray, np.ndarray | None]:
        if grads:
            return self.ev.value_and_grad(stack, dtype)
        return self.ev.values(stack, dtype), None


def _finite_abs(a: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        return np.where(np.isfinite(a), np.abs(a), 0.0)


def _judge(old: _Side, what: str, a: np.ndarray, b: np.ndarray, stack: CaseStack, dtype: str) -> tuple[Mismatch, str]:
    """Mismatch of NEW ``b`` against OLD ``a`` under the two-sided error model."""
    cell = stack.cell
    n = op_count(cell.n, cell.c or cell.d or 1)
    scale = case_scale(old.ctx, stack.predictions)
    size = np.maximum(_finite_abs(a), _finite_abs(b))  # symmetric: neither side is the truth
    if what == "value":
        allow = rounding_allowance(size, scale, dtype=dtype, n_ops=n)
    else:
        allow = rounding_allowance(size, scale, dtype=dtype, n_ops=n, normwise=True,
                                   grad_scale=gradient_term_scale(old.ctx, stack.targets))
    return Mismatch(b, a, allow.atol), allow.rule


def _special(m: Mismatch) -> np.ndarray:
    """Per case: the divergence involves a non-finite number on exactly one side or both."""
    k = m.case_bad.shape[0]
    with np.errstate(invalid="ignore"):
        odd = (~np.isfinite(m.got) | ~np.isfinite(m.expected)) & m.bad_elements
    return odd.reshape(k, -1).any(axis=1)


def _where(m: Mismatch, k: int, stack: CaseStack) -> str:
    """'row r, class c' of the worst element of case k."""
    with np.errstate(all="ignore"):
        diff = np.abs(m.got[k] - m.expected[k])
        ratio = np.where(m.bad_elements[k], np.where(np.isfinite(diff), diff / m.atol[k], np.inf), 0.0)
    flat = np.atleast_1d(ratio)
    idx = np.unravel_index(int(np.argmax(flat)), flat.shape)
    if flat.ndim == 0 or m.got[k].ndim == 0:
        return "the batch value"
    names = ["row", "class" if stack.cell.c is not None else "column"]
    return ", ".join(f"{nm} {i}" for nm, i in zip(names, idx))


def _rows(stack: CaseStack, k: int, rows: list[int]) -> CaseStack:
    """Case k restricted to ``rows`` as cases of one row each, in a stack of shape (len(rows), 1, …)."""
    p = np.stack([stack.predictions[k][r:r + 1] for r in rows])
    t = np.stack([stack.targets[k][r:r + 1] for r in rows])
    cell = Cell(1, stack.cell.c, stack.cell.d)
    return CaseStack(p, t, cell, [f"row {r}" for r in rows])


def _simpler(z: np.ndarray) -> list[np.ndarray]:
    """Candidate simplifications of one row, most preferred first (deterministic)."""
    out: list[np.ndarray] = []
    flat = z.reshape(-1)
    for j in np.flatnonzero(flat):
        c = flat.copy()
        c[j] = 0.0
        out.append(c.reshape(z.shape))
    for j in np.flatnonzero(flat):
        c = flat.copy()
        c[j] = float(f"{c[j]:.0e}")  # one significant digit
        if c[j] != flat[j] and np.isfinite(c[j]):  # 1.8e308 rounds to 2e308 = inf: not simpler
            out.append(c.reshape(z.shape))
    for factor in (0.1, 0.5):
        if np.any(flat != 0):
            out.append(z * factor)
    return out


class _Shrinker:
    """Fewest rows, then simpler values, keeping the same part and the same kind of divergence."""

    def __init__(self, old: _Side, new: _Side, what: str, dtype: str, tol_dtype: str, special: bool) -> None:
        self.old, self.new, self.what, self.special = old, new, what, special
        self.dtype, self.tol_dtype = dtype, tol_dtype

    def failing(self, stack: CaseStack) -> tuple[np.ndarray, Mismatch]:
        grads = self.what == "gradient"
        (va, ga), (vb, gb) = (s.evaluate(stack, self.dtype, grads) for s in (self.old, self.new))
        a, b = (ga, gb) if grads else (va, vb)
        m, _ = _judge(self.old, self.what, a, b, stack, self.tol_dtype)  # type: ignore[arg-type]
        keep = m.case_bad & (_special(m) == self.special)
        return keep, m

    def shrink(self, stack: CaseStack, k: int) -> tuple[CaseStack, Mismatch, int, int]:
        """(one-case stack, its mismatch, rows before, rows after) for case k of ``stack``."""
        spec = self.old.ctx.spec
        n = stack.cell.n
        rows = list(range(n))
        if spec.kind == "categorical" and spec.ignore_label is not None:
            rows = [r for r in rows if stack.targets[k][r] != spec.ignore_label]
        best = stack.take([k])
        if n > 1 and rows:
            singles = _rows(stack, k, rows)
            keep, m = self.failing(singles)
            if keep.any():
                ok = np.flatnonzero(keep)
                size = np.max(np.abs(singles.predictions.reshape(len(rows), -1)), axis=1)
                pick = int(ok[np.argmin(size[ok])])  # the smallest row that shows it (first on ties)
                best = singles.take([pick])
        if spec.inputs == "logits":
            for _ in range(_SHRINK_ROUNDS):
                cands = _simpler(best.predictions[0])
                if not cands:
                    break
                trial = CaseStack(np.stack(cands), np.repeat(best.targets, len(cands), axis=0), best.cell)
                keep, _ = self.failing(trial)
                if not keep.any():
                    break
                best = trial.take([int(np.flatnonzero(keep)[0])])
        return best, self.failing(best)[1], n, best.cell.n


def compare(
    old: LossSpec,
    new: LossSpec,
    *,
    seed: int = 0,
    effort: str = "default",
    dtypes: tuple[str, ...] = DTYPES_COMPARED,
    progress: Callable[[str, int, int], None] | None = None,
    call_timeout: float = CALL_SECONDS,
    time_budget: float = BATTERY_SECONDS,
) -> Comparison:
    """Compare two implementations of one declared loss on a shared case set.

    Args:
        old: the declaration of the first implementation (cases are drawn for it).
        new: the second, usually ``old.with_loss(other)``.
        seed, effort: as for :func:`lossguard.run`.
        dtypes: precisions compared (names in ``tolerance.DTYPES``).
        progress: optional ``progress(label, done, total)`` callback.
        call_timeout, time_budget: seconds one call of either loss, and the whole comparison, may
            take (as for :func:`lossguard.run`; defaults 60 and 300).

    Returns:
        A :class:`Comparison`; ``.agree`` is True when every part agreed.

    Raises:
        SpecError: bad seed, effort or limits, or the two return different output forms.
        LossCallError: one of the implementations cannot be evaluated.
        Stopped: a call past the probe ran out of time or returned junk (one line).
        LossguardError: the time budget ran out.
    """
    validate_run(seed, effort)
    limits = limits_from(call_timeout, time_budget)
    return bounded(lambda: _compare(old, new, seed, effort, dtypes, progress, limits), limits, "the comparison")


def _compare(old: LossSpec, new: LossSpec, seed: int, effort: str, dtypes: tuple[str, ...],
             progress: Callable[[str, int, int], None] | None, limits: Limits) -> Comparison:
    """:func:`compare` once its arguments are checked, each loss called through its own guard."""
    from .runner import versions

    t0 = time.perf_counter()
    ev_old, ev_new = Evaluator(old, Guard(limits)), Evaluator(new, Guard(limits))
    for ev in (ev_old, ev_new):
        ev.guard.phase = "while comparing the two implementations"
    if ev_old.output != ev_new.output:
        raise SpecError(bad_value(
            "NEW", new.name, f"the same output form as OLD ({ev_old.output})",
            f"NEW returns {ev_new.output}; make both return a batch mean or both one value per example"))
    sides = [_Side(ev, Context(spec=s, evaluator=ev, seed=seed, effort=effort))
             for ev, s in ((ev_old, old), (ev_new, new))]
    a, b = sides
    grads = ev_old.has_gradient and ev_new.has_gradient
    parts: list[CheckResult] = []
    found: list[tuple[float, int, str, str, str, CaseStack, int, Mismatch, bool]] = []
    steps = len(dtypes) * len(a.ctx.cells)
    done = 0
    for dtype in dtypes:
        computed = max((ev_old.computed_dtype(dtype), ev_new.computed_dtype(dtype)), key=unit_roundoff)
        tally = {w: {"cases": 0, "failed": 0, "odd": 0, "ratio": 0.0, "abs": 0.0, "rules": set(), "worst": []}
                 for w in ("value", "gradient")}
        for cell in a.ctx.cells:
            if progress:
                progress(f"{dtype} {cell}", done, steps)
            stack = a.ctx.standard_cases(cell)
            (va, ga), (vb, gb) = a.evaluate(stack, dtype, grads), b.evaluate(stack, dtype, grads)
            for what, x, y in (("value", va, vb), ("gradient", ga, gb)):
                if x is None or y is None:
                    continue
                m, rule = _judge(a, what, x, y, stack, computed)
                t = tally[what]
                odd = _special(m)
                t["cases"] += len(stack)
                t["failed"] += m.failed
                t["odd"] += int(np.sum(odd & m.case_bad))
                t["ratio"] = max(t["ratio"], float(np.max(m.case_ratio)))
                t["abs"] = max(t["abs"], m.max_abs())
                t["rules"].add(rule)
                t["worst"] += examples_from(m, a.ctx.spec, stack, f"{what} in {dtype}", dtype=dtype, most=2)
                for k in m.order()[:1]:
                    found.append((float(m.case_ratio[k]), len(found), what, dtype, computed, stack, int(k), m,
                                  bool(odd[k])))
            done += 1
        for what, t in tally.items():
            parts.append(_part(what, dtype, t, grads, ev_old, ev_new))
    if progress:
        progress("done", steps, steps)
    comparison = Comparison(
        old=old.name, new=new.name, spec=old.describe(), seed=seed, effort=effort, parts=parts,
        evaluation={"old": ev_old.describe(), "new": ev_new.describe()}, versions=versions(),
    )
    if found:
        _, _, what, dtype, computed, stack, k, m, odd = sorted(found, key=lambda f: (-f[0], f[1]))[0]
        comparison.largest = _example(m, a.ctx.spec, stack, k, what, dtype, stack.note(k))
        small, sm, before, after = _Shrinker(a, b, what, dtype, computed, odd).shrink(stack, k)
        how = f"{after} of {before} rows of case '{stack.note(k)}'" if after < before else f"case '{stack.note(k)}'"
        comparison.smallest = _example(sm, a.ctx.spec, small, 0, what, dtype, f"shrunk to {how}")
    comparison.seconds = time.perf_counter() - t0
    comparison.loss_evaluations = ev_old.calls + ev_new.calls
    return comparison


def _example(m: Mismatch, spec: LossSpec, stack: CaseStack, k: int, what: str, dtype: str, note: str) -> Example:
    """Case k as an Example (got = NEW, expected = OLD), noting where in the case they part."""
    sub = Mismatch(m.got[k:k + 1], m.expected[k:k + 1], m.atol[k:k + 1])
    e = examples_from(sub, spec, stack.take([k]), f"{what} in {dtype}", dtype=dtype, most=1, only_failed=False)[0]
    e.note = f"{note}; at {_where(sub, 0, stack)}"
    return e


def _part(what: str, dtype: str, t: dict[str, Any], grads: bool, ev_old: Evaluator, ev_new: Evaluator) -> CheckResult:
    name = f"{what} {dtype}"
    if what == "gradient" and not grads:
        missing = "OLD" if not ev_old.has_gradient else "NEW"
        return CheckResult(name=name, verdict="skip",
                           summary=f"not compared: {missing} has no gradient (not JAX-traceable and no grad declared)")
    worst = sorted(t["worst"], key=lambda e: -(e.abs_err / e.allowance if e.allowance > 0 else np.inf))[:2]
    if t["failed"]:
        odd = f"; {t['odd']} where one side is not finite" if t["odd"] else ""
        summary = (f"{what}s differ on {t['failed']} of {t['cases']} cases{odd}; "
                   f"largest finite difference {t['abs']:.3g}")
        verdict = "fail"
    else:
        summary = f"{what}s agree on {t['cases']} cases (largest difference {t['ratio']:.2g} of its allowance)"
        verdict = "pass"
    return CheckResult(
        name=name, verdict=verdict, summary=summary, cases=t["cases"], failed=t["failed"],
        allowance="; ".join(sorted(t["rules"])), worst=worst,
        hint="the implementations compute different numbers here: see the smallest input below",
        details={"max_abs_difference": t["abs"], "max_difference_over_allowance": t["ratio"],
                 "one_side_not_finite": t["odd"]},
    )

