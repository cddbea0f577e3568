"""Signals held over a C call (coverage_fleet.interrupts): a stop signal that arrives inside
the block reaches the handler installed before it, once the block is over, and not
earlier. Why it matters: a launcher's Ctrl-C landing inside rclpy's take surfaced as a
pybind11 RuntimeError and a traceback instead of a clean stop (CI, test_cli_launch_ownership).
Python runs signal handlers in the main thread between bytecodes (Python documentation,
`signal` module, "Execution of Python signal handlers"), so os.kill to ourselves is seen at
once."""

from __future__ import annotations

import os
import signal

import pytest

from coverage_fleet.interrupts import RUN_STOP_SIGNALS, signals_held


class StopError(Exception):
    pass


def _raise_stop(number: int, _frame: object) -> None:
    raise StopError(number)


@pytest.mark.parametrize("number", RUN_STOP_SIGNALS, ids=lambda n: signal.Signals(n).name)
def test_a_stop_signal_inside_the_block_is_delivered_after_it(number: int) -> None:
    previous = signal.signal(number, _raise_stop)
    try:
        finished_inside = False
        with pytest.raises(StopError) as stopped, signals_held(RUN_STOP_SIGNALS):
            os.kill(os.getpid(), number)
            finished_inside = True  # the handler did not run inside the block
        assert finished_inside
        assert stopped.value.args == (number,)
        assert signal.getsignal(number) is _raise_stop  # the handler is back
    finally:
        signal.signal(number, previous)


def test_without_a_signal_nothing_is_delivered_and_handlers_are_restored() -> None:
    before = {n: signal.getsignal(n) for n in RUN_STOP_SIGNALS}
    with signals_held(RUN_STOP_SIGNALS):
        pass
    assert {n: signal.getsignal(n) for n in RUN_STOP_SIGNALS} == before


def test_without_holding_the_handler_runs_at_once() -> None:
    """Positive control: the same signal outside the block stops the code right there."""
    previous = signal.signal(signal.SIGTERM, _raise_stop)
    try:
        reached = False
        with pytest.raises(StopError):
            os.kill(os.getpid(), signal.SIGTERM)
            reached = True
        assert not reached
    finally:
        signal.signal(signal.SIGTERM, previous)
