"""Torch state the adapter touches, scoped and restored: intra-op threads and module mode.

Nothing here changes the user's process for longer than one evaluation: the thread count and
every submodule's train/eval flag are put back on exit, grad mode is only ever entered through
``torch.no_grad()`` / ``torch.enable_grad()`` scopes, and the default dtype and deterministic
flags are never written.

Threads: a loss on the menu's small cases spends its time in Python and dispatch, not in
arithmetic, so intra-op threads gain nothing there; two batteries side by side on two cores,
each with a thread per core, oversubscribed them (measured: 20.7 s against 3.75 s for one alone,
the issue's figures). Even one battery alone on a busy machine loses: a float64
cross-entropy at logits (1024, 300) took 2.2 ms forward and 4.1 ms with its backward pass on one
thread, 19 ms and 87 ms on two (measured here, load average 11). So: one thread per evaluation
unless a single call carries at least :data:`THREADED_ELEMENTS` elements and no pytest-xdist
worker already takes a core. The rule reads only the work's size (never the machine's load), so
the same seed gives the same bits: torch's parallel reductions may round differently with
another thread count.
"""

from __future__ import annotations

import inspect
import os
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from typing import Any

__all__ = ["THREADED_ELEMENTS", "torch_module", "threads_for", "scoped", "resolve"]

#: Elements in one call from which intra-op threads are used: (4096, 1000) logits and up.
THREADED_ELEMENTS = 1 << 22


def _torch() -> Any:
    import torch

    return torch


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def torch_module(loss: Any) -> bool:
    """True for an ``nn.Module`` instance or subclass (only asked once torch is imported)."""
    torch = _torch()
    if inspect.isclass(loss):
        return issubclass(loss, torch.nn.Module)
    return isinstance(loss, torch.nn.Module)


def resolve(loss: Callable[..., Any], params: Mapping[str, Any]) -> tuple[Callable[..., Any], dict[str, Any], Any]:
    """(callable, keyword arguments of each call, module or ``None``).

    An ``nn.Module`` class is built once with ``params`` as its constructor arguments and called
    with none; a module instance or a function gets ``params`` on every call.
    """
    if inspect.isclass(loss) and torch_module(loss):
        module = loss(**params)
        return module, {}, module
    return loss, dict(params), loss if torch_module(loss) else None


def threads_for(elements: int, user_threads: int) -> int:
    """Intra-op threads for one call over ``elements`` prediction values."""
    workers = os.environ.get("PYTEST_XDIST_WORKER_COUNT", "")
    if elements < THREADED_ELEMENTS or (workers.isdigit() and int(workers) > 1):
        return 1
    return max(1, min(user_threads, _cores()))


@contextmanager
def scoped(elements: int, module: Any = None, train: bool = False) -> Iterator[None]:
    """Set the thread count for ``elements`` and ``module``'s mode; restore both on exit."""
    torch = _torch()
    before = torch.get_num_threads()
    want = threads_for(elements, before)
    modes = [(m, m.training) for m in module.modules()] if module is not None else []
    try:
        if want != before:
            torch.set_num_threads(want)
        if module is not None:
            module.train(train)
        yield
    finally:
        for m, flag in modes:
            m.training = flag
        if torch.get_num_threads() != before:
            torch.set_num_threads(before)
