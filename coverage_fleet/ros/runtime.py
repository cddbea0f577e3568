"""Running a node process: start-up errors reported as problems (exit 2), clean shutdown on
SIGINT and SIGTERM (rclpy installs handlers for both), a node's own exit status kept."""

from __future__ import annotations

import faulthandler
import signal
import sys
from collections.abc import Callable, Sequence

import rclpy
from rclpy.exceptions import InvalidParameterTypeException, InvalidParameterValueException
from rclpy.executors import ExternalShutdownException, SingleThreadedExecutor
from rclpy.node import Node

from coverage_fleet.errors import ConfigError

EXIT_BAD_INPUT = 2


class RunFinished(Exception):  # noqa: N818 - a normal end, not an error
    """Raised from a callback to end the process with a status (the simulator when its run
    is over)."""

    def __init__(self, status: int = 0) -> None:
        super().__init__(status)
        self.status = status


def run_nodes(
    factories: Sequence[Callable[[], Node]],
    program: str,
    args: Sequence[str] | None = None,
) -> int:
    """Create the nodes and spin them in one executor until shutdown. Returns the exit
    status: 0 on a signal or a finished run, 2 on bad configuration."""
    # `kill -USR1 <pid>` prints every thread's stack to the node's log: the way to see
    # where a node that stopped answering is stuck.
    faulthandler.register(signal.SIGUSR1, all_threads=True)
    rclpy.init(args=list(sys.argv if args is None else args))
    nodes: list[Node] = []
    status = 0
    try:
        # The executor first: a signal during start-up then finds everything it needs to
        # shut down quietly.
        executor = SingleThreadedExecutor()
        for factory in factories:
            nodes.append(factory())
            executor.add_node(nodes[-1])
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
    except (KeyboardInterrupt, ExternalShutdownException):
        status = 0
    except Exception:
        # A signal during start-up shuts the context down under the node being built.
        if rclpy.ok():
            raise
        status = 0
    finally:
        for node in nodes:
            node.destroy_node()
        rclpy.try_shutdown()
    return status


def main_for(factory: Callable[[], Node], program: str) -> None:
    """Console-script entry point body for a single-node process."""
    sys.exit(run_nodes([factory], program))
