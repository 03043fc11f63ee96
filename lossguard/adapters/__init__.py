"""Framework adapters: how a user's loss is called on stacked cases.

``jax_loss`` (vmapped or one case at a time, jitted), ``torch_loss`` (autograd, forward-mode AD,
modules; optional) and ``numpy_loss`` (plain calls, declared gradient). Each implements the whole
:class:`Adapter` protocol and declares its :class:`Capabilities`;
:class:`lossguard.evaluate.Evaluator` probes the loss and picks one.
"""

from __future__ import annotations

from ._base import Adapter, Capabilities

__all__ = ["Adapter", "Capabilities"]
