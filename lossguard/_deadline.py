"""Time bounds: a per-call timeout for the user's loss and a time budget for a whole battery.

A Python call cannot be pre-empted from another thread. On the main thread (where a process's
signals are delivered) a deadline is a scoped ``SIGALRM`` timer (``signal.setitimer``): when it
expires, its handler raises in whatever Python code is running — a ``time.sleep`` or a Python
loop inside the loss is interrupted. Deadlines nest (a call's inside the battery's): one timer is
armed for the earliest, and the previous handler and timer are restored when the last scope ends.
Off the main thread, or where ``setitimer`` does not exist, calls cannot be interrupted: there
only the battery's budget holds, by :func:`call_in_worker`, which runs each check in a daemon
thread and abandons it when the budget runs out (the thread keeps running; nothing calls that
loss again in the battery).

The exceptions derive from ``BaseException`` on purpose: a loss's own ``except Exception`` (and
the adapters', which turn a loss's errors into :class:`~lossguard.errors.LossCallError`) must not
swallow them.

Example:
    >>> import time
    >>> try:
    ...     with deadline(0.05, lambda: CallTimeout("slow")):
    ...         time.sleep(5)
    ... except CallTimeout as exc:
    ...     print(exc)
    slow
"""

from __future__ import annotations

import contextvars
import signal
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

__all__ = [
    "CALL_SECONDS", "BATTERY_SECONDS", "Stopped", "CallTimeout", "BatteryTimeout", "Limits",
    "deadline", "can_interrupt", "call_in_worker", "BatteryClock", "limits_from", "bounded",
]

#: Default limit on one call of the user's loss (seconds). A call is the loss's own Python code:
#: for a JAX loss its tracing, never XLA's compilation of it.
CALL_SECONDS = 60.0
#: Default budget of a whole battery (seconds).
BATTERY_SECONDS = 300.0


class Stopped(BaseException):
    """lossguard stopped a call of the user's loss (too slow, or an unusable output); the message
    is the one line a report shows."""


class CallTimeout(Stopped):
    """One call of the loss ran past its per-call limit."""


class BatteryTimeout(BaseException):
    """The battery's time budget ran out (not a :class:`Stopped`: no check may catch it)."""


@dataclass(frozen=True)
class Limits:
    """The time bounds of one battery.

    Args:
        call_seconds: longest one call of the loss may run (default :data:`CALL_SECONDS`).
        battery_seconds: longest the whole battery may run (default :data:`BATTERY_SECONDS`).
    """

    call_seconds: float = CALL_SECONDS
    battery_seconds: float = BATTERY_SECONDS


@dataclass
class _Scope:
    at: float  # time.monotonic() at which it expires
    make: Callable[[], BaseException]
    fired: bool = False


_scopes: list[_Scope] = []
_saved: dict[str, Any] = {}


def can_interrupt() -> bool:
    """Whether a deadline can interrupt a call here (the main thread, on a system with setitimer)."""
    return hasattr(signal, "setitimer") and threading.current_thread() is threading.main_thread()


def _arm() -> None:
    live = [s.at for s in _scopes if not s.fired]
    if live:
        signal.setitimer(signal.ITIMER_REAL, max(min(live) - time.monotonic(), 1e-4))
    else:
        signal.setitimer(signal.ITIMER_REAL, 0)


def _on_alarm(signum: int, frame: Any) -> None:
    now = time.monotonic()
    due = [s for s in _scopes if not s.fired and s.at <= now + 1e-3]
    if not due:
        _arm()
        return
    scope = min(due, key=lambda s: s.at)
    scope.fired = True
    _arm()
    raise scope.make()


@contextmanager
def deadline(seconds: float, make: Callable[[], BaseException]) -> Iterator[None]:
    """Raise ``make()`` in this thread if the block runs past ``seconds``.

    Scoped: the previous ``SIGALRM`` handler and timer are restored when the outermost deadline
    ends. Off the main thread this does nothing (see :func:`call_in_worker`).

    Args:
        seconds: the limit; ``inf`` or ``None`` for none.
        make: builds the exception to raise (called only if the deadline expires).
    """
    if seconds is None or seconds == float("inf") or not can_interrupt():
        yield
        return
    scope = _Scope(time.monotonic() + max(float(seconds), 0.0), make)
    if not _scopes:
        _saved["handler"] = signal.signal(signal.SIGALRM, _on_alarm)
        _saved["timer"] = signal.getitimer(signal.ITIMER_REAL)
        _saved["since"] = time.monotonic()
    _scopes.append(scope)
    _arm()
    try:
        yield
    finally:
        _scopes.remove(scope)
        if _scopes:
            _arm()
        else:
            signal.setitimer(signal.ITIMER_REAL, 0)
            signal.signal(signal.SIGALRM, _saved.pop("handler"))
            left, interval = _saved.pop("timer")
            if left > 0:  # a timer of the caller's: give it back what is left of it
                signal.setitimer(signal.ITIMER_REAL, max(left - (time.monotonic() - _saved["since"]), 1e-4), interval)
            _saved.pop("since", None)


def call_in_worker(fn: Callable[[], Any], seconds: float, make: Callable[[], BaseException]) -> Any:
    """``fn()`` in a daemon thread, waiting at most ``seconds``; past that, raise ``make()`` and
    leave the thread behind (a Python call cannot be stopped from outside)."""
    box: dict[str, Any] = {}

    def work() -> None:
        try:
            box["value"] = fn()
        except BaseException as exc:  # noqa: BLE001 - handed back to the caller's thread
            box["error"] = exc

    context = contextvars.copy_context()  # the caller's context variables (replay framework …)
    worker = threading.Thread(target=context.run, args=(work,), name="lossguard-call", daemon=True)
    worker.start()
    worker.join(None if seconds == float("inf") else seconds)
    if worker.is_alive():
        raise make()
    if "error" in box:
        raise box["error"]
    return box["value"]


@dataclass
class BatteryClock:
    """The battery's budget: runs each check inside what is left of it.

    Example:
        >>> clock = BatteryClock(300.0)
        >>> clock.spent_out()
        False
    """

    seconds: float
    start: float = field(default_factory=time.monotonic)
    ran_out_in: str = ""

    def left(self) -> float:
        return self.seconds - (time.monotonic() - self.start)

    def spent_out(self) -> bool:
        return bool(self.ran_out_in) or self.left() <= 0

    def run(self, fn: Callable[[], Any], name: str) -> Any:
        """``fn()`` bounded by the time left; :class:`BatteryTimeout` if it runs out (noted)."""
        try:
            if can_interrupt():
                with deadline(self.left(), lambda: BatteryTimeout(name)):
                    return fn()
            # off the main thread: run it in a worker, abandoned if the budget runs out (nothing
            # runs after that: every later check is reported as not run)
            return call_in_worker(fn, max(self.left(), 0.0), lambda: BatteryTimeout(name))
        except BatteryTimeout:
            self.ran_out_in = name
            raise

    def why(self) -> str:
        """The one line of a check stopped or not run because the budget ran out."""
        return (f"time-budget={self.seconds:g} s: the battery's time budget ran out"
                + (f" during {self.ran_out_in}" if self.ran_out_in else "")
                + "; try a larger --time-budget, --effort quick, or --skip the slow checks")


def limits_from(call_timeout: Any, time_budget: Any) -> Limits:
    """Validated :class:`Limits` (seconds, positive; ``float('inf')`` for no limit).

    Raises:
        SpecError: a limit that is not a positive number.
    """
    from ._suggest import bad_value
    from .errors import SpecError

    for name, value, default in (("call_timeout", call_timeout, CALL_SECONDS),
                                 ("time_budget", time_budget, BATTERY_SECONDS)):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
            raise SpecError(bad_value(name, value, "a positive number of seconds", f"try {name}={default:g}"))
    return Limits(float(call_timeout), float(time_budget))


def bounded(fn: Callable[[], Any], limits: Limits, what: str) -> Any:
    """``fn()`` — a whole ``compare`` or ``profile`` — within ``limits.battery_seconds``.

    Its calls of the loss are bounded by the evaluators' guards (``limits.call_seconds``); past
    the budget the work is stopped and one line says so.

    Raises:
        LossguardError: ``"time-budget=…: expected … within it; try …"`` when the budget runs out.
    """
    from .errors import LossguardError

    clock = BatteryClock(limits.battery_seconds)
    try:
        return clock.run(fn, what)
    except BatteryTimeout:
        raise LossguardError(f"time-budget={limits.battery_seconds:g} s: expected {what} to finish within it; "
                             "try a larger --time-budget, or --effort quick") from None
