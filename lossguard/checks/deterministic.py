"""``deterministic``: the same inputs give bit-identical outputs, whatever was called before.

Notation and shapes: S a few cases of one menu shape; r = L(S) evaluated by plain (eager) calls
in float64, one call per case, as a training loop calls the loss.

Procedure: r₁ = L(S); then other calls — another input, and a compiled value-and-gradient call
on the battery's stack that contains S; then r₂ = L(S); one or two calls on other inputs;
r₃ = L(S). Eager calls compile every primitive once per (shape, dtype), so the shape and dtype
are the ones every plain call of the battery shares (``Context.eager_cell``, ``EAGER_DTYPE``).
The check demands r₁ = r₂ = r₃ bit for bit (same bits, same sign of zero, nan where nan). An odd number of calls
separates r₂ from r₃, so state that alternates from call to call is seen as well as state that
drifts.

A loss that keeps state between calls (a cached normaliser, a running statistic, a counter, an
internal random key) or whose reduction order varies from call to call fails here; so does a
loss using unseeded randomness (dropout inside the loss, sampled negatives). A deliberately
stochastic loss may skip the check. Eager results need not match compiled ones bit for bit
(compilers fuse and reorder operations), so only eager calls are compared with each other.

Error model: none — the same program on the same inputs on one machine is expected to give the
same bits.

Example:
    >>> import jax.numpy as jnp
    >>> from lossguard import declare, run
    >>> seen = [0]
    >>> def drifting(z, y):  # a value that depends on how often it was called
    ...     seen[0] += 1
    ...     return jnp.mean(z ** 2) * (1.0 + 1e-3 * (seen[0] % 2))
    >>> result = run(declare(drifting, kind="categorical"), effort="quick", only=["deterministic"])
    >>> result.check("deterministic").verdict
    'fail'
"""

from __future__ import annotations

import numpy as np

from ._property import Part, Tally, single
from ..cases import CaseStack
from ..evaluate import NoGradient
from ..result import CheckResult, Example
from ..strategies import cases
from ._base import EAGER_DTYPE, Check, Context
from ._compare import replay

__all__ = ["CHECK", "repeat_parts", "same_bits"]

#: Cases per shape evaluated eagerly (an even number; the repeats are then an odd number of calls apart).
CASES = 4
SEARCH_EXAMPLES = 10

HINT = (
    "the same inputs gave different bits on a later call: the loss keeps state between calls (a "
    "cached normaliser, a running statistic, a call counter, an internal random key) or varies its "
    "reduction order. Make the loss a pure function of its inputs. Skipping is legitimate only for "
    "a deliberately stochastic loss (sampling inside the loss)"
)


def same_bits(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Per case: equal values, equal signs of zero, nan where nan."""
    k = a.shape[0]
    with np.errstate(invalid="ignore"):
        same = ((a == b) & (np.signbit(a) == np.signbit(b))) | (np.isnan(a) & np.isnan(b))
    return np.all(same.reshape(k, -1), axis=1)


def repeat_parts(ctx: Context, s: CaseStack, other: CaseStack, compiled: CaseStack | None = None) -> list[Part]:
    """Evaluate ``s`` eagerly three times with other calls in between; compare the bits.

    ``other`` holds at least two cases; one or two of them are evaluated between r₂ and r₃ so
    that len(s) + len(between) is odd. ``compiled``: a stack evaluated by a compiled
    value-and-gradient call between r₁ and r₂.
    """
    ev, spec = ctx.evaluator, ctx.spec
    other = other.take([0] if len(s) % 2 == 0 else [0, 1])  # r₂ and r₃ an odd number of calls apart
    r1 = ev.values(s, EAGER_DTYPE, eager=True)
    ev.values(other, EAGER_DTYPE, eager=True)
    if compiled is not None and ev.has_gradient:
        try:
            ev.value_and_grad(compiled, "float64")
        except NoGradient:
            pass
    r2 = ev.values(s, EAGER_DTYPE, eager=True)
    ev.values(other, EAGER_DTYPE, eager=True)
    r3 = ev.values(s, EAGER_DTYPE, eager=True)
    parts = []
    for what, got, expected, between in (
        ("value on a repeated call", r2, r1, "another input, a compiled gradient call"),
        ("value on the next repeat", r3, r2, f"{len(other)} call(s) on other inputs"),
    ):
        bad = ~same_bits(got, expected)

        def examples(most: int, got=got, expected=expected, bad=bad, what=what, between=between) -> list[Example]:
            out = []
            for i in np.flatnonzero(bad)[:most]:
                with np.errstate(invalid="ignore"):
                    gap = np.abs(got[i] - expected[i])
                    diff = float(np.nanmax(gap)) if np.any(np.isfinite(gap)) else float("nan")
                call = replay(spec, s.predictions[i], s.targets[i], EAGER_DTYPE)
                out.append(Example(
                    what=what, predictions=s.predictions[i], targets=s.targets[i], got=got[i], expected=expected[i],
                    abs_err=diff, allowance=0.0, note=f"calls in between: {between}",
                    replay=f"first = {call}\nagain = {call}\n# expected again == first, bit for bit",
                ))
            return out

        parts.append(Part(what, bad, np.where(bad, np.inf, 0.0), "bit-identical (eager calls)", examples))
    return parts


def _run(ctx: Context) -> CheckResult:
    tally = Tally("deterministic")
    cell = ctx.eager_cell
    stack = ctx.standard_cases(cell)
    # a large shape has few standard cases: then some are drawn twice (still the same inputs)
    idx = ctx.rng(f"deterministic {cell}").choice(len(stack), size=CASES + 2, replace=len(stack) < CASES + 2)
    parts = repeat_parts(ctx, stack.take(idx[:CASES]), stack.take(idx[CASES:]), stack)
    tally.add(parts, CASES)
    if any(p.bad.any() for p in parts):
        def judge(case):  # type: ignore[no-untyped-def]
            s = single(ctx.spec, *case)
            other = single(ctx.spec, case[0][::-1], case[1], repeat=2)
            return repeat_parts(ctx, s, other)
        tally.shrink(ctx, cases(ctx.spec, shapes=[cell]), judge, max_examples=SEARCH_EXAMPLES)
    return tally.result(
        passed="bit-identical values on repeated eager calls with other calls in between",
        failed="the same inputs gave different outputs on a later call", hint=HINT,
        details={"cases": CASES, "shape": str(cell)},
    )


CHECK = Check(
    name="deterministic",
    summary="the same inputs give bit-identical outputs whatever was called before",
    run=_run,
    skip_hint="legitimate only for a deliberately stochastic loss",
    order=40,
)
