"""The self-test corpus: deliberately broken losses and correct ones, each with its declaration.

Every broken loss is modelled on a bug practitioners actually hit and names the check(s) meant to
catch it; every correct loss is written in a different style and must pass the whole default
battery. ``tests/test_corpus.py`` asserts both; ``benchmarks/detection.py`` counts them.

Modules, by kind of bug: ``broken_numerics`` (extremes), ``broken_masks`` (ignore label and
padded examples, −inf logits of masked classes), ``broken_conventions`` (smoothing, weighting,
targets), ``broken_reductions`` (batch), ``broken_custom_grad`` (jax.custom_vjp and declared
numpy gradients), ``broken_precision`` (float16/bfloat16), ``broken_properties`` (invariances,
sign, determinism, dead gradients, properness); ``correct_losses`` holds the correct ones;
``torch_losses`` the PyTorch ones, broken and correct (only where torch is installed).

Example:
    >>> from corpus import by_id
    >>> entry = by_id("numerics-log_of_softmax")
    >>> entry.catches, entry.spec().kind
    (('finite',), 'categorical')
"""

from __future__ import annotations

from . import (  # noqa: F401  (importing a module registers its entries)
    broken_conventions,
    broken_custom_grad,
    broken_masks,
    broken_numerics,
    broken_precision,
    broken_properties,
    broken_reductions,
    correct_losses,
)
try:  # the torch entries need torch (the `torch` extra, installed in CI)
    import torch  # noqa: F401
except ImportError:  # pragma: no cover - depends on the install
    pass
else:
    from . import torch_losses  # noqa: F401

from ._entry import REGISTRY, Entry
from .known import KNOWN_FALSE_ALARMS, KNOWN_GAPS

__all__ = ["Entry", "ALL", "BROKEN", "CORRECT", "KNOWN_GAPS", "KNOWN_FALSE_ALARMS", "by_id"]

ALL: list[Entry] = list(REGISTRY)
BROKEN: list[Entry] = [e for e in ALL if e.is_broken]
CORRECT: list[Entry] = [e for e in ALL if not e.is_broken]


def by_id(entry_id: str) -> Entry:
    """The entry called ``entry_id``."""
    for e in ALL:
        if e.id == entry_id:
            return e
    raise KeyError(entry_id)
