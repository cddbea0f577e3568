"""The offline fleet's controllers split over worker processes, so that the MPC solves of one
tick run on all cores.

Design (measured in benchmarks/fleet_sim_benchmark.py):
- A worker is a child process (`python -m coverage_fleet.fleet.controller_pool`) that
  holds its robots' sampled controllers for the whole run: warm starts, held inputs and
  fallback plans stay where they were made, and only states, targets and answers cross the
  process boundary (a few hundred bytes per robot and tick). casadi objects do not pickle,
  so each worker builds its controllers from the vehicle specs in the mission; the terminal
  ingredients are computed (or read) once here first, so the workers read them from the
  cache (control/terminal.py).
- Robots are split by expected solve work (`controllers.assign_robots`), so a mixed fleet
  does not put its slow vehicles on one worker.
- Each tick this process sends every worker its robots' states (and any newly committed
  targets) before it waits for the first reply, so the workers solve at the same time;
  partition, gate, plants and the trial records stay here, in roster order.
- Same results as in one process: a controller's answer depends only on what it was given
  and on its own history, and the workers run with one BLAS thread
  (OMP/OPENBLAS/MKL_NUM_THREADS=1, as fleet/parallel.py's local cluster) so that a
  library's floating-point results do not depend on a thread count. Only the measured solve
  times differ from run to run (as they do between two runs in one process).
- Why not the Dask cluster of fleet/parallel.py: a tick needs a round trip of well under a
  millisecond to every worker, many thousand times per run; a task scheduler adds
  milliseconds per task, and its workers do not keep per-robot state between tasks. A pipe
  per worker (a socket pair inherited by the child) does both.
- Workers run in a session of their own: a terminal's Ctrl-C reaches only this process,
  which stops at its next safe point and closes the workers in order. A worker ends when
  its socket closes, so it also ends when this process dies. Nothing leaves the machine:
  the socket pair has no address.
"""

from __future__ import annotations

import contextlib
import os
import socket
import subprocess
import sys
import time
import traceback
from collections.abc import Hashable, Mapping
from multiprocessing.connection import Connection
from typing import Any

import numpy as np

from coverage_fleet.control.sampling import Answer
from coverage_fleet.control.terminal import terminal_for_vehicle
from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.controllers import LocalControllers, assign_robots
from coverage_fleet.fleet.mission import Mission
from coverage_fleet.fleet.parallel import PINNED_THREADS, default_workers
from coverage_fleet.geometry.buffered_cells import FleetSnapshot
from coverage_fleet.interrupts import raise_if_interrupted

#: Robots per worker below which the simulate command keeps its controllers in one process
#: by default (benchmarks/fleet_sim_benchmark.py: with fewer, the pool's start-up and the
#: per-tick round trips cost more than the second core gains on short runs).
ROBOTS_PER_WORKER_MIN = 4
#: Seconds a worker may take to import and build its controllers (busy 2-core machine,
#: 64+ robots per worker).
WORKER_START_TIMEOUT_S = 600.0
#: Seconds a worker may take to stop before it is killed.
WORKER_STOP_TIMEOUT_S = 10.0
_POLL_S = 0.1


def default_simulation_workers(robots: int, cores: int | None = None) -> int:
    """Controller workers for an offline run of `robots` robots by default: one per core,
    as long as each gets at least ROBOTS_PER_WORKER_MIN robots; 1 (this process) otherwise."""
    cores = default_workers() if cores is None else cores
    return max(1, min(cores, robots // ROBOTS_PER_WORKER_MIN))


class ControllerPool:
    """The mission's controllers over `workers` worker processes (fewer if there are fewer
    robots). Use as a context manager, or call `close`."""

    def __init__(self, mission: Mission, step: float, workers: int) -> None:
        if workers < 1:
            raise ValueError(f"workers must be at least 1, got {workers}")
        self.shares = assign_robots(mission.roster, step, workers)
        self._worker_of = {name: w for w, share in enumerate(self.shares) for name in share}
        seen: set[str] = set()
        for entry in mission.roster:
            if entry.vehicle.cache_key not in seen:
                seen.add(entry.vehicle.cache_key)
                terminal_for_vehicle(entry.vehicle)  # into the cache before the workers read
        self._processes: list[subprocess.Popen] = []
        self._connections: list[Connection] = []
        self._targets: list[list[tuple[str, Hashable, np.ndarray, float]]] = [
            [] for _ in self.shares
        ]
        self._snapshots: list[FleetSnapshot] = []
        #: Seconds each worker spent answering ticks (targets, snapshots, answers; what it
        #: measured itself, so its waits for work are left out).
        self.busy_seconds = [0.0] * len(self.shares)
        #: Sum over ticks of the busiest worker's seconds: the least the ticks' answers
        #: could have taken on these workers (the rest of the wait is the other workers'
        #: idle time, messages and wake-ups).
        self.critical_seconds = 0.0
        #: CPU seconds each worker used within its busy seconds (what it measured itself
        #: with time.process_time): the rest of its busy time it waited for a core.
        self.cpu_seconds = [0.0] * len(self.shares)
        try:
            for share in self.shares:
                self._start_worker()
                self._connections[-1].send(("start", mission, float(step), share))
            for index in range(len(self.shares)):
                self._receive(index, WORKER_START_TIMEOUT_S, "start")
        except BaseException:
            self.close()
            raise

    @property
    def workers(self) -> int:
        return len(self.shares)

    def _start_worker(self) -> None:
        ours, theirs = socket.socketpair()
        with ours, theirs:
            process = subprocess.Popen(
                [sys.executable, "-m", "coverage_fleet.fleet.controller_pool",
                 str(theirs.fileno())],
                pass_fds=(theirs.fileno(),), stdin=subprocess.DEVNULL,
                start_new_session=True, env={**os.environ, **PINNED_THREADS},
            )
            self._processes.append(process)
            self._connections.append(Connection(ours.detach()))

    def _receive(self, index: int, timeout: float | None, doing: str) -> Any:
        connection, process = self._connections[index], self._processes[index]
        if timeout is not None:
            waited = 0.0
            while not connection.poll(_POLL_S):
                raise_if_interrupted()
                waited += _POLL_S
                if process.poll() is not None or waited > timeout:
                    why = ("no answer" if process.poll() is None
                           else f"exit status {process.returncode}")
                    raise ConfigError.single(
                        "command line", "--workers",
                        f"controller worker {index} did not {doing} ({why})")
        try:
            kind, payload = connection.recv()
        except (EOFError, OSError):
            raise RuntimeError(
                f"controller worker {index} ended during {doing} (exit status "
                f"{process.poll()}); its error is above") from None
        if kind == "error":
            raise RuntimeError(f"controller worker {index} failed during {doing}:\n{payload}")
        return payload

    def set_target(
        self, name: str, key: Hashable, target: np.ndarray, distance_at_commit: float
    ) -> None:
        self._targets[self._worker_of[name]].append(
            (name, key, np.asarray(target, float), float(distance_at_commit)))

    def add_snapshot(self, snapshot: FleetSnapshot) -> None:
        self._snapshots.append(snapshot)

    def answer_all(
        self, states: Mapping[str, np.ndarray], state_time: float
    ) -> dict[str, Answer]:
        # Send to every worker first, then collect: the workers solve at the same time.
        for index, share in enumerate(self.shares):
            batch = [(name, states[name]) for name in share if name in states]
            self._connections[index].send(
                ("answer", float(state_time), self._targets[index], self._snapshots, batch))
            self._targets[index] = []
        self._snapshots = []
        answers: dict[str, Answer] = {}
        busiest = 0.0
        for index in range(len(self.shares)):
            share_answers, busy, cpu = self._receive(index, None, "a tick")
            answers.update(share_answers)
            self.busy_seconds[index] += busy
            self.cpu_seconds[index] += cpu
            busiest = max(busiest, busy)
        self.critical_seconds += busiest
        return {name: answers[name] for name in states}

    def close(self) -> None:
        """Ask every worker to stop, close the sockets, kill a worker that does not end."""
        for connection in self._connections:
            with contextlib.suppress(OSError, ValueError):
                connection.send(("stop", None))
            connection.close()
        for process in self._processes:
            try:
                process.wait(timeout=WORKER_STOP_TIMEOUT_S)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()
        self._connections, self._processes = [], []

    def __enter__(self) -> ControllerPool:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def serve(connection: Connection) -> None:
    """The worker's side: build the controllers named in the start message, then answer
    ticks until told to stop or the socket closes. Faults go back as ("error", traceback)."""
    try:
        _, mission, step, names = connection.recv()
    except EOFError:
        return
    try:
        controllers = LocalControllers(mission, step, names)
    except Exception:
        connection.send(("error", traceback.format_exc()))
        return
    connection.send(("ready", None))
    while True:
        try:
            message = connection.recv()
        except EOFError:
            return
        if message[0] != "answer":
            return
        _, state_time, targets, snapshots, batch = message
        started, cpu_started = time.perf_counter(), time.process_time()
        try:
            for name, key, target, distance in targets:
                controllers.set_target(name, key, target, distance)
            for snapshot in snapshots:
                controllers.add_snapshot(snapshot)
            answers = controllers.answer_all(dict(batch), state_time)
        except Exception:
            connection.send(("error", traceback.format_exc()))
            continue
        busy = time.perf_counter() - started
        connection.send(("answers", (answers, busy, time.process_time() - cpu_started)))


if __name__ == "__main__":
    serve(Connection(int(sys.argv[1])))
