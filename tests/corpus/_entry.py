"""What a corpus entry is, and the two decorators that register one.

An entry is a loss function together with everything a user would declare about it
(``kind``, ``inputs``, ``params``, ``reference``, ``ignore_label``, ``grad``, ``skip``/``expect``
…), the checks meant to catch it (empty for a correct loss) and one line saying what is wrong
with it (or, for a correct loss, what style it is written in).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

__all__ = ["Entry", "broken", "correct", "REGISTRY"]

#: Every entry, in the order the modules define them (filled by the decorators).
REGISTRY: list[Entry] = []


@dataclass(frozen=True)
class Entry:
    """One loss of the corpus.

    Args:
        id: short readable identifier (the pytest id): ``<family>-<what>``.
        fn: the loss ``fn(predictions, targets, **params)``.
        declaration: keyword arguments for :func:`lossguard.declare` (everything but the loss).
        catches: for a broken loss, the check(s) each of which must fail on it; ``()`` for a
            correct loss.
        about: one line: the bug (broken) or the style it is written in (correct).
        family: the kind of bug (numerics, masks, conventions, reductions, custom-grad,
            precision, properties) or ``"correct"``.
    """

    id: str
    fn: Callable[..., Any]
    declaration: dict[str, Any] = field(default_factory=dict)
    catches: tuple[str, ...] = ()
    about: str = ""
    family: str = ""

    @property
    def is_broken(self) -> bool:
        return bool(self.catches)

    def spec(self, **overrides: Any) -> Any:
        """The :class:`lossguard.LossSpec` for this entry (``overrides`` replace declared keys)."""
        from lossguard import declare

        kwargs = {**self.declaration, **overrides}
        return declare(self.fn, name=f"corpus:{self.id}", **kwargs)


_Decorator = Callable[[Callable[..., Any]], Callable[..., Any]]


def broken(family: str, catches: str | tuple[str, ...], about: str, **declaration: Any) -> _Decorator:
    """Register the decorated function as a broken loss that ``catches`` must flag."""
    names = (catches,) if isinstance(catches, str) else tuple(catches)

    def register(fn: Callable[..., Any]) -> Callable[..., Any]:
        REGISTRY.append(Entry(f"{family}-{fn.__name__}", fn, dict(declaration), names, about, family))
        return fn

    return register


def correct(about: str, **declaration: Any) -> _Decorator:
    """Register the decorated function as a correct loss that the default battery must pass."""

    def register(fn: Callable[..., Any]) -> Callable[..., Any]:
        REGISTRY.append(Entry(f"correct-{fn.__name__}", fn, dict(declaration), (), about, "correct"))
        return fn

    return register
