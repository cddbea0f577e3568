"""Ctrl-C at safe points for long offline runs.

A SIGINT that lands while casadi (or numpy) runs C code does not surface cleanly: casadi
turns it into a RuntimeError from the function it was evaluating, which the controller's
fallback then treats as a solver fault, so the operator's Ctrl-C is lost or ends in an
unrelated traceback. Inside `interrupts_at_safe_points()` a SIGINT only records the request;
long loops call `raise_if_interrupted()` between steps, where KeyboardInterrupt is safe and
the CLI turns it into exit status 130 with nothing half-written.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Iterator
from contextlib import contextmanager

_requested = threading.Event()


def _record(_signum: int, _frame: object) -> None:
    _requested.set()


@contextmanager
def interrupts_at_safe_points() -> Iterator[None]:
    """Hold SIGINT as a request until the next `raise_if_interrupted()` (main thread only;
    elsewhere Python cannot install signal handlers and this does nothing)."""
    if threading.current_thread() is not threading.main_thread():
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
