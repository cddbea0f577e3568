"""Running a node process: start-up errors reported as problems (exit 2), clean shutdown on
SIGINT and SIGTERM, a node's own exit status kept.

Signals are handled here, not by rclpy's own handler: rclpy installs a C-level handler that
Python cannot save and restore, so any code that swaps the SIGINT handler for a moment (the
MPC holds Ctrl-C until a solve returns) silently removed it, and a node idle in a wait (for
example after the simulated clock stopped) then ignored SIGINT until the launch service
escalated to SIGTERM. Instead the interpreter's wakeup file descriptor (written by the
C-level trampoline for every handled signal, whichever Python handler is current) is read
by a small thread that wakes the executor through a guard condition (StopSignals).

A stopping process first lets every node say its last word (`before_stop`: the controller's
braking input, the recorder's last messages), then destroys the nodes; it gives that
teardown `TEARDOWN_LIMIT` seconds and then exits anyway (a stall that holds the interpreter
lock: `HARD_TEARDOWN_MARGIN` later, status 1, stacks in the log), so that a stall inside
the middleware never outlasts a launch service's grace period.
"""

from __future__ import annotations

import contextlib
import faulthandler
import os
import signal
import sys
import threading
from collections.abc import Callable, Iterator, Sequence
from typing import NoReturn

import rclpy
from rclpy.exceptions import InvalidParameterTypeException, InvalidParameterValueException
from rclpy.executors import ExternalShutdownException, SingleThreadedExecutor
from rclpy.node import Node
from rclpy.signals import SignalHandlerOptions

from coverage_fleet.errors import ConfigError
from coverage_fleet.ros.launcher_contract import PARENT_PID_VARIABLE

EXIT_BAD_INPUT = 2


class RunFinished(Exception):  # noqa: N818 - a normal end, not an error
    """Raised from a callback to end the process with a status (the simulator when its run
    is over)."""

    def __init__(self, status: int = 0) -> None:
        super().__init__(status)
        self.status = status


STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)


class StopRequested(Exception):  # noqa: N818 - a normal end, not an error
    """SIGINT or SIGTERM arrived: raised in the executor's thread to end the spin."""


class StopSignals:
    """SIGINT and SIGTERM end the spin through a guard condition (see the module docstring).

    A thread reads the interpreter's wakeup descriptor and triggers the guard; its callback
    raises StopRequested in the executor's thread, so the nodes are destroyed by the thread
    that owns them. A signal that arrives before the nodes exist (their set-up can take
    seconds) is kept and acted on as soon as the guard is attached."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._received = False
        #: The first stop signal that arrived (its number), for the nodes' exit status.
        self.number: int | None = None
        self._guard = None
        read_end, write_end = os.pipe()
        os.set_blocking(write_end, False)
        signal.set_wakeup_fd(write_end, warn_on_full_buffer=False)
        for number in STOP_SIGNALS:
            # Nothing at the Python level: the reader thread acts, even while the main
            # thread is inside a solver or a wait.
            signal.signal(number, lambda _number, _frame: None)
        threading.Thread(
            target=self._read, args=(read_end,), name="stop-signals", daemon=True
        ).start()

    def _read(self, read_end: int) -> None:
        while True:
            received = os.read(read_end, 1)
            if not received or received[0] in STOP_SIGNALS:
                with self._lock:
                    self._received = True
                    if self.number is None and received:
                        self.number = received[0]
                    if self._guard is not None:
                        self._guard.trigger()

    def attach(self, node: Node) -> None:
        with self._lock:
            self._guard = node.create_guard_condition(self._stop)
            if self._received:
                self._guard.trigger()

    @staticmethod
    def _stop() -> None:
        raise StopRequested


PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>


def die_with_launcher() -> None:
    """When started by the package's launcher, ask Linux to send this process SIGTERM (a
    clean stop, see StopSignals) when the launcher dies, even by SIGKILL, so that no node
    is left commanding a robot on its own. If the launcher is already gone, stop now."""
    launcher = os.environ.get(PARENT_PID_VARIABLE)
    if not launcher or not sys.platform.startswith("linux"):
        return
    import ctypes

    ctypes.CDLL(None, use_errno=True).prctl(PR_SET_PDEATHSIG, signal.SIGTERM, 0, 0, 0)
    if str(os.getppid()) != launcher:
        os.kill(os.getpid(), signal.SIGTERM)


def run_nodes(
    factories: Sequence[Callable[[], Node]],
    program: str,
    args: Sequence[str] | None = None,
) -> int:
    """Create the nodes and spin them in one executor until shutdown. Returns the exit
    status: 0 on a signal or a finished run, 2 on bad configuration. For a process that
    ends right after (`main_for`): if destroying the nodes takes longer than
    `TEARDOWN_LIMIT`, the process exits with that status there and then."""
    # `kill -USR1 <pid>` prints every thread's stack to the node's log: the way to see
    # where a node that stopped answering is stuck.
    faulthandler.register(signal.SIGUSR1, all_threads=True)
    # A crash (SIGSEGV in the middleware or a solver, ...) prints the Python stack too.
    faulthandler.enable(all_threads=True)
    rclpy.init(
        args=list(sys.argv if args is None else args),
        signal_handler_options=SignalHandlerOptions.NO,
    )
    stop_signals = StopSignals()
    die_with_launcher()
    nodes: list[Node] = []
    status = 0
    try:
        # The executor first: a signal during start-up then finds everything it needs to
        # shut down quietly.
        executor = SingleThreadedExecutor()
        for factory in factories:
            nodes.append(factory())
            executor.add_node(nodes[-1])
        if nodes:
            stop_signals.attach(nodes[0])
        executor.spin()
    except ConfigError as error:
        logger = rclpy.logging.get_logger(program)
        logger.error("bad input:\n  " + "\n  ".join(str(p) for p in error.problems))
        status = EXIT_BAD_INPUT
    except (InvalidParameterValueException, InvalidParameterTypeException) as error:
        # Out of its declared range or of the wrong type: rclpy names the parameter.
        rclpy.logging.get_logger(program).error(f"bad parameter: {error}")
        status = EXIT_BAD_INPUT
    except RunFinished as finished:
        status = finished.status
    except (StopRequested, KeyboardInterrupt, ExternalShutdownException):
        status = max((_status_on_stop(n, stop_signals.number) for n in nodes), default=0)
    except Exception:
        # A signal during start-up shuts the context down under the node being built.
        if rclpy.ok():
            status = 1
            raise
        status = 0
    finally:
        for node in nodes:
            _before_stop(node, program)
        with _bounded_teardown(program, status):
            for node in nodes:
                node.destroy_node()
            rclpy.try_shutdown()
    return status


#: Wall seconds the middleware gets to destroy a stopping process's nodes. It usually takes
#: 6-70 ms on this project's graph; once in a CI run two controllers and the base station
#: took more than 5 s after their last word (the braking input, acknowledged) and the
#: launch service escalated to SIGTERM; probing under load found single destroys of 1.0 and
#: 3.0 s. A launch service waits 5 s (from memory: launch's default sigterm_timeout) before
#: it escalates, and a process stopped on its own must free its robot's name for a restart.
TEARDOWN_LIMIT = 2.0
#: A teardown that holds the interpreter lock is ended this long after TEARDOWN_LIMIT, still
#: before a launch service escalates (`_bounded_teardown`).
HARD_TEARDOWN_MARGIN = 1.5


@contextlib.contextmanager
def _bounded_teardown(program: str, status: int) -> Iterator[None]:
    """Exit the process with `status` if the block takes longer than `TEARDOWN_LIMIT`.

    Only for the teardown after every node's last word: nothing the nodes still owe their
    robots or peers is left, and peers notice a participant that left without saying so
    when its lease runs out, as they do for a process that was killed."""

    def give_up() -> None:
        # Straight to the log's descriptor: the ROS logger could wait on a lock held by the
        # teardown that stalled.
        os.write(2, (
            f"[WARN] [{program}]: stopping: the middleware took more than {TEARDOWN_LIMIT} s "
            "to destroy the nodes; exiting without waiting further (everything the nodes had "
            "to send was sent)\n"
        ).encode())
        exit_process(status)

    timer = threading.Timer(TEARDOWN_LIMIT, give_up)
    timer.daemon = True
    timer.start()
    # The timer above needs the interpreter lock; a stall inside a middleware call that
    # holds it (seen once in a full test run: the simulator ignored SIGINT and SIGTERM for 15 s
    # and was killed) keeps the timer from running. faulthandler's watchdog is a thread
    # of its own without the lock: it prints every thread's stack to the log (where the
    # stall was) and exits with status 1.
    faulthandler.dump_traceback_later(TEARDOWN_LIMIT + HARD_TEARDOWN_MARGIN, exit=True)
    try:
        yield
    finally:
        timer.cancel()
        faulthandler.cancel_dump_traceback_later()


def _status_on_stop(node: Node, number: int | None) -> int:
    """A stop signal is a clean end (0) unless the node says otherwise: its optional
    `status_on_stop(signal number or None)` (the simulator stopped before its run was
    over)."""
    status_on_stop = getattr(node, "status_on_stop", None)
    return 0 if status_on_stop is None else int(status_on_stop(number))


def _before_stop(node: Node, program: str) -> None:
    """A node's last word before it goes (the controller sends its braking input), while the
    context still works; a failure there is logged and never keeps the process alive."""
    last_word = getattr(node, "before_stop", None)
    if last_word is None or not rclpy.ok():
        return
    try:
        last_word()
    except Exception as error:  # stopping must go on whatever happened
        rclpy.logging.get_logger(program).error(f"while stopping: {error!r}")


def exit_process(status: int) -> NoReturn:
    """End a node process once run_nodes has returned: nodes destroyed, the context shut
    down (which also closes the ROS log files). Python's own finalisation is skipped: the
    middleware's global destructors take 0.5-3 s on a loaded machine, which is longer than
    a launch service's grace period when several nodes stop at once (measured on this
    project's graph: controllers escalated from SIGINT to SIGTERM after 5 s)."""
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(status)


def main_for(*factories: Callable[[], Node], program: str) -> NoReturn:
    """Console-script entry point body: run the nodes in one process, then exit."""
    exit_process(run_nodes(list(factories), program))
