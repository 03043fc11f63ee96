"""Framework adapters: how a user's loss is called on stacked cases.

``jax_loss`` (vmapped or one case at a time, jitted) and ``numpy_loss`` (plain calls, declared
gradient). :class:`lossguard.evaluate.Evaluator` probes the loss and picks one.
"""

from __future__ import annotations

from ._base import Adapter

__all__ = ["Adapter"]
