"""The smallest failing input of a failed check, shown beside its worst case.

After a check fails, the runner hands its worst example and its ``still_fails`` predicate
(:class:`~lossguard.checks._base.Check`) to the greedy search of :mod:`lossguard._shrink`: rows,
then classes, are removed while the same check's failure still shows, every candidate evaluated
through the battery's shared :class:`~lossguard.evaluate.Evaluator`. At most
``ctx.effort.shrink_calls`` predicate calls are spent per failure (quick 6, default 8, thorough
16), and twice that over a whole battery (``Context.shrink_spent``); each call is one stack of
candidates of one shape, so at most one compilation. The example of the case found,
from the call that found it, is attached as ``CheckResult.smallest`` with a note naming its shape ("1 row × 3 classes"),
the worst case's shape and the calls spent; a replay line comes with it. A check whose
predicate is ``None`` (the property checks shrink by their own Hypothesis search) is left as it is.

Shrinking never changes a verdict: a loss that raises, times out, or stops failing on the cut
down case leaves the worst case alone and says why in ``details["shrink"]``.

Example:
    >>> from lossguard import declare, run
    >>> import jax.numpy as jnp
    >>> def bad(z, y):  # log(softmax): overflows at large logits
    ...     p = jnp.exp(z) / jnp.exp(z).sum(-1, keepdims=True)
    ...     return -jnp.log(jnp.take_along_axis(p, y[:, None], -1)).mean()
    >>> res = run(declare(bad, kind="categorical"), effort="quick", only=["finite"])
    >>> res.check("finite").smallest.note.startswith("smallest failing input found: 1 row")
    True
"""

from __future__ import annotations

import time

import numpy as np

from .._deadline import Stopped
from ..adapters._base import first_line
from .._shrink import shape_words, smallest_case, shrinks_classes
from ..errors import LossCallError
from ..evaluate import NoGradient
from ..cases import CaseStack
from ..result import CheckResult
from ._base import Check, Context, Judged

__all__ = ["add_smallest"]


def _worth(ctx: Context, z: np.ndarray) -> bool:
    """Whether the case has anything to remove (more than one row, or classes that may go)."""
    if z.ndim == 0:
        return False
    if z.shape[0] > 1:
        return True
    least = 1 if ctx.spec.kind == "binary" else 2
    return z.ndim == 2 and z.shape[1] > least and shrinks_classes(ctx.spec, z.shape[1])


def _calls(n: int) -> str:
    return f"{n} evaluator call{'' if n == 1 else 's'}"


def add_smallest(check: Check, ctx: Context, result: CheckResult) -> None:
    """Shrink the worst example of a failed ``result`` (in place: ``result.smallest``)."""
    if result.verdict != "fail" or check.still_fails is None or not result.worst:
        return
    worst = result.worst[0]
    z, y = np.asarray(worst.predictions), np.asarray(worst.targets)
    if z.dtype == object or not _worth(ctx, z):
        return
    left = 2 * ctx.effort.shrink_calls - ctx.shrink_spent  # the battery's own cap
    if left <= 0:
        result.details["shrink"] = (f"not shrunk: the battery's {2 * ctx.effort.shrink_calls} evaluator calls "
                                    "for shrinking are spent")
        return
    predicate = check.still_fails
    judged: list[tuple[object, Judged]] = []

    def fails(stack: CaseStack) -> np.ndarray:
        j = predicate(ctx, worst, stack)
        judged.append((stack, j))
        return j.bad

    t0 = time.perf_counter()
    guard = getattr(ctx.evaluator, "guard", None)
    if guard is not None:
        guard.check = check.name  # a timeout while shrinking names the check
    example = None
    try:
        found = smallest_case(ctx.spec, z, y, fails, max_calls=min(ctx.effort.shrink_calls, left))
        ctx.shrink_spent += found.calls
        if found.found_in is None:
            why = f"no smaller failing case found ({_calls(found.calls)}{'; stopped at the cap' if found.capped else ''})"
        else:
            stack, k = found.found_in
            example = next(j for s, j in judged if s is stack).example(k)
            why = "" if example is not None else "the smallest case found did not fail again when judged alone"
    except (LossCallError, NoGradient, Stopped) as exc:  # the loss raised or stopped on a cut-down case
        why = f"stopped: {str(exc).splitlines()[0]}"
    except Exception as exc:  # a defect in lossguard itself: the verdict stands, say so in one line
        why = f"lossguard could not shrink this failure ({first_line(exc)}); please report it with the seed"
    finally:
        if guard is not None:
            guard.check = ""
    result.details["shrink_seconds"] = time.perf_counter() - t0
    if why or example is None:
        result.details["shrink"] = why
        return
    small = np.shape(example.predictions)
    cap = "; stopped at the cap of evaluator calls" if found.capped else ""
    example.note = (f"smallest failing input found: {shape_words(ctx.spec, small)} (the worst case has "
                    f"{shape_words(ctx.spec, z.shape)}; {_calls(found.calls)}{cap})")
    result.smallest = example
    result.details["shrink"] = f"{shape_words(ctx.spec, z.shape)} → {shape_words(ctx.spec, small)}"
