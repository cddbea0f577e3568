"""A node process that was told to stop ends even when the middleware's teardown stalls.

A launch service gives a stopping process a few seconds before it escalates to SIGTERM and
then SIGKILL (launch's default sigterm_timeout of 5 s, from memory); once in CI two
controllers and the base station stayed in DDS teardown longer than that, after their last
word had gone out. A process ends within `runtime.TEARDOWN_LIMIT` of its teardown starting
and says why, with the status it would have had (common practice: an emergency or operator
stop must not depend on a clean middleware shutdown).

Real node processes over DDS on loopback, run through the same `main_for` as every console
script. The stalled teardown is a node whose `destroy_node` waits an hour (the real stall
could not be produced on demand); the same node without the wait is the positive control:
it ends without the warning. A stall that holds the interpreter lock (libc's sleep through
ctypes.PyDLL) is ended by faulthandler's watchdog instead, with status 1 and the stacks.
"""

from __future__ import annotations

import signal
import sys
import textwrap

import pytest
from support_processes import WatchedProcess

pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

#: Wall seconds before the test gives up on a process (a hang, not a timing check: the limit
#: under test is a few seconds).
PATIENCE = 60.0

NODE_PROCESS = textwrap.dedent(
    """
    import sys
    import time

    from rclpy.node import Node

    from coverage_fleet.ros.runtime import main_for

    STALL = sys.argv[1] == "stall"
    LOCKED_STALL = sys.argv[1] == "locked stall"


    class TeardownProbe(Node):
        def __init__(self):
            super().__init__("teardown_probe")
            self.create_timer(0.05, self._spinning)
            self._said = False

        def _spinning(self):
            if not self._said:
                print("spinning", flush=True)
                self._said = True

        def before_stop(self):
            print("last word sent", flush=True)

        def destroy_node(self):
            if STALL:
                time.sleep(3600.0)
            if LOCKED_STALL:
                import ctypes

                # libc's sleep called through PyDLL keeps the interpreter lock, as a
                # middleware call that never returns would.
                ctypes.PyDLL(None).sleep(3600)
            super().destroy_node()


    main_for(TeardownProbe, program="teardown_probe")
    """
)


def stopped_probe(teardown: str, stop_signal: signal.Signals) -> tuple[int, str]:
    """Start the probe node with `teardown` ("stall", "locked stall", "prompt"), stop it once
    it spins; its exit status and output."""
    process = WatchedProcess([sys.executable, "-c", NODE_PROCESS, teardown], PATIENCE)
    process.wait_until(lambda: "spinning" in process.output, "the node spinning")
    process.process.send_signal(stop_signal)
    status = process.wait()
    return status, process.output


@pytest.mark.parametrize("stop_signal", [signal.SIGINT, signal.SIGTERM], ids=["sigint", "sigterm"])
@pytest.mark.parametrize("teardown", ["stall", "prompt"])
def test_a_stopped_node_process_ends_even_when_its_teardown_stalls(
    teardown: str, stop_signal: signal.Signals
) -> None:
    status, output = stopped_probe(teardown, stop_signal)
    assert status == 0, output
    assert "last word sent" in output, output
    warned = "took more than" in output and "to destroy the nodes" in output
    assert warned == (teardown == "stall"), output
    assert "Traceback" not in output, output


@pytest.mark.parametrize("stop_signal", [signal.SIGINT, signal.SIGTERM], ids=["sigint", "sigterm"])
def test_a_teardown_stalled_with_the_interpreter_lock_held_still_ends_and_shows_where(
    stop_signal: signal.Signals,
) -> None:
    """A stall that keeps the interpreter lock leaves no Python thread able to run (the
    timer of the test above cannot fire; Python's documentation of the global interpreter
    lock): the process still ends, on its own, with status 1 and every thread's stack in its
    output, the stalled call included (Python's faulthandler.dump_traceback_later)."""
    status, output = stopped_probe("locked stall", stop_signal)
    assert status == 1, output
    assert "last word sent" in output, output
    assert "Timeout" in output and "in destroy_node" in output, output
