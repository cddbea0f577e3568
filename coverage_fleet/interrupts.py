"""Ctrl-C (SIGINT) deferred to a point where stopping is safe: the one home for it.

A SIGINT that lands while casadi (or numpy) runs C code does not surface cleanly: casadi
turns it into a failed solve (IPOPT: NonIpopt_Exception_Thrown) or a RuntimeError from the
function it was evaluating, which the controller's fallback then treats as a solver fault,
so the operator's Ctrl-C is lost or ends in an unrelated traceback. Two scopes:

- `interrupts_at_safe_points()` (the CLI, around long offline runs): a SIGINT only records
  the request; loops call `raise_if_interrupted()` between steps, where KeyboardInterrupt
  is safe and the CLI turns it into exit status 130 with nothing half-written.
- `sigint_held()` (around one C call, e.g. a solver call): a SIGINT that arrives during the
  call is delivered to the handler that was installed before, right after the call
  returns. Calls take milliseconds, so that is as good as at once.

Both work in the main thread only (Python runs signal handlers there); elsewhere they do
nothing.
"""

from __future__ import annotations

import _signal  # signal's C core: signal.signal wraps every call in enum conversions
import signal
import threading
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager

_requested = threading.Event()

#: Signals that stop a launcher's run: Ctrl-C, a service manager's stop, a closed terminal.
RUN_STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)


def _record(_signum: int, _frame: object) -> None:
    _requested.set()


def _in_main_thread() -> bool:
    return threading.current_thread() is threading.main_thread()


@contextmanager
def interrupts_at_safe_points() -> Iterator[None]:
    """Hold SIGINT as a request until the next `raise_if_interrupted()`."""
    if not _in_main_thread():
        yield
        return
    _requested.clear()
    previous = signal.signal(signal.SIGINT, _record)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
        _requested.clear()


def raise_if_interrupted() -> None:
    """Raise KeyboardInterrupt if Ctrl-C was pressed since the last safe point."""
    if _requested.is_set():
        _requested.clear()
        raise KeyboardInterrupt


class signals_held:  # noqa: N801 (used like the context-manager functions here)
    """Hold the signals `numbers` whose Python handlers raise (a solver call's SIGINT; the
    launcher's SIGINT, SIGTERM and SIGHUP): each that arrives inside the block goes to its
    previous handler, in the order received, when the block ends. Inside
    `interrupts_at_safe_points()` SIGINT's handler already only records, so nothing is
    swapped; SIG_IGN / SIG_DFL set from outside Python are left alone.

    A class rather than a generator, and `_signal` rather than `signal`: it wraps every
    solver call (twice per real-time MPC sample at most). The generator pair it replaced
    cost 22 us a call, and `signal.signal` / `signal.getsignal` (which convert numbers and
    handlers to enums and back) still 17 us, 5 % of a real-time sample of the rover;
    `_signal`'s functions, which `signal` wraps, take under 1 us (measured)."""

    __slots__ = ("_held", "_numbers", "_received")

    def __init__(self, numbers: Iterable[int]) -> None:
        self._numbers = tuple(numbers)
        self._held: dict[int, Callable[[int, object], object]] = {}
        self._received: list[int] = []

    def _catch(self, number: int, _frame: object) -> None:
        self._received.append(number)

    def __enter__(self) -> None:
        if threading.current_thread() is not threading.main_thread():
            return
        for number in self._numbers:
            previous = _signal.getsignal(number)
            if previous is not _record and callable(previous):
                self._held[number] = previous
                _signal.signal(number, self._catch)

    def __exit__(self, *exc: object) -> None:
        held, self._held = self._held, {}
        for number, previous in held.items():
            _signal.signal(number, previous)
        received, self._received = self._received, []
        for number in received:
            held[number](number, None)


def sigint_held() -> signals_held:
    """Hold a SIGINT that arrives inside the block and hand it to the previous handler when
    the block ends (signals_held)."""
    return signals_held(_SIGINT_ONLY)


_SIGINT_ONLY = (signal.SIGINT,)
