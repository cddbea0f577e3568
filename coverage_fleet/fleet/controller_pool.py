"""The offline fleet's controllers split over this process and worker processes, so that
the MPC solves of one tick run on all cores.

Design (measured in benchmarks/fleet_sim_benchmark.py, 16 mixed robots, 20 s simulated, 2
cores):
- `workers` counts the processes that solve: this one and `workers - 1` worker processes.
  This process answers a share of the robots itself between sending the workers theirs and
  collecting their answers: one process fewer to start, and no core waits while this
  process only waits. The partition, gate, plants and trial records stay here; the workers
  are idle while this process does them (5-10 % of the tick loop): they all need every
  robot's answer of the tick before, so there is nothing to overlap them with.
- A worker is forked from this process (multiprocessing's "fork" start): it starts with the
  package imported and the mission in memory, in about 10 ms. A fresh interpreter
  (`python -m ...`, as before) took 0.7-0.8 s to import the package, and the mission had
  to be pickled to it (0.23 MB at 16 robots with a raster density, more than a socket
  buffers, so the send held this process until the worker read it): start-up was 1.0 s
  and the first tick ended 0.6 s later than in one process; forked, start-up is 0.2-0.3 s
  and the first tick ends earlier than in one process (1.1 s against 1.3 s after the
  start, 16 robots). It works because this process runs no Python thread of its own at
  that moment (the only other threads are the BLAS libraries' pools, which prepare for a
  fork themselves); the worker then uses the libraries exactly as this process does, BLAS
  threads included, so its answers are the ones this process would give. What it inherits
  is frozen for its garbage collector (gc.freeze across the fork), which would otherwise
  walk this process's heap (an earlier run's builds and logs too) in every full pass.
  POSIX only, as the socket pairs already were.
- A worker holds its robots' sampled controllers for the whole run: warm starts, held
  inputs and fallback plans stay where they were made, and only states, targets and
  answers cross the process boundary (a few hundred bytes per robot and tick).
- Every vehicle file's MPC problem (for the fleet's keep-apart row count) and its full
  solve are built here, for one robot of each vehicle file, before the workers are
  forked: casadi objects do not pickle, but a forked worker inherits them in memory (copy
  on write), so each is built once per run instead of once per process that holds a
  robot of that vehicle file (the worker reports the problems it built while starting:
  `start_builds`, 0). The terminal ingredients go into their cache on the way
  (control/terminal.py). Before, each process built its own (the split then kept vehicle
  files together on short runs to build fewer, and so balanced the ticks worse). What is
  built on first use (the smaller row budgets' problems, the IPOPT rescue, the full solve
  of a budget's problem) is still built in the process that first needs it. This
  process's own share uses the same builds as the workers: a run does not borrow builds
  from the thread's earlier runs, so a pooled run and a one-process run build the same
  problems.
- The first tick waits for a worker's "ready" only when it needs its answers: this
  process answers its share of the first tick meanwhile.
- Every process runs on a CPU of its own (process k on the k-th usable CPU, modulo their
  number; this thread's former CPUs come back at `close`). Unpinned, two workers on a
  quiet 2-core machine waited for a CPU while the other CPU idled, in some runs little
  (on a core 94 % of their busy time) and in others 2.2-2.8 s each of a 5.5-7.5 s tick
  loop (their /proc schedstat run-queue waits; on a core 61-70 %, also in the 64-robot
  run): a tick's messages can wake a worker on the CPU of the process that sent them,
  where the scheduler leaves it queued. Pinned: 0.02-0.3 s. A run that shares the machine
  with other work cannot escape a busy CPU this way; on two cores it hardly could anyway.
- Robots are split for the least expected critical work (`controllers.assign_robots`):
  tick by tick, so that a mixed fleet neither puts its slow vehicles on one process nor
  all the robots that solve on the same ticks (0.2 s vessels among 0.1 s vehicles). The
  split is fixed for the run (a controller's state does not move between processes), so
  it cannot follow the work that comes in bursts: the full solves of samples the
  real-time step could not answer (1 % of the samples, a quarter of the solve time); in
  those ticks one process works while the other waits.
- Each tick this process sends every worker its robots' states (and any newly committed
  targets and keep-apart snapshots) before it answers its own share and then waits for
  the replies, so all processes solve at the same time; the answers are put back in
  roster order.
- Measured (benchmarks/fleet_sim_benchmark.py, quiet 2-core machine, before and after these
  changes one right after the other): the tick loop on 2 processes against one process at
  4 / 16 / 64 robots 1.09x / 1.13x / 1.43x before, 1.29x / 1.40x / 1.51-1.61x after;
  setup + loop 0.76x / 0.86x / 1.04x before, 1.28x / 1.38x / 1.49-1.57x after. A pooled
  solve now takes as long as in one process (mean 1.08 against 1.09 ms at 16 robots).
  What kept it from 2x then: the bursts above and the fixed split (at 16 robots the
  busiest process per tick was 85 % of the loop against 62 % and 69 % busy), and the
  partition, gate, plants and records (about 10 % of the loop), while the workers wait.
  With the builds made before the fork (16 mixed robots, 20 s, alternating with the
  commit before): the split that kept two vehicle files on each process left the vessels'
  process 8.4 ms busy on the ticks they solve and 2.8 ms on the others, against 6.1 and
  5.8 ms for the other process (per-tick medians; the busiest process summed over the
  ticks 1.97 s against 1.49-1.57 s busy); mixed, both are 7.4-7.6 and 4.5 ms, and the
  first tick, which built four full solvers per process, 0.31 -> 0.14 s. Tick loop
  2.33-2.36 -> 1.96-1.98 s, setup 0.19-0.21 -> 0.57-0.63 s (the builds now before the
  fork, in one process), setup + loop 2.52-2.58 -> 2.54-2.60 s.
- Same results as in one process: a controller's answer depends only on what it was given
  and on its own history, never on where it runs. Only the measured solve times differ
  from run to run (as they do between two runs in one process).
- Why not the Dask cluster of fleet/parallel.py: a tick needs a round trip of well under a
  millisecond to every worker, many thousand times per run; a task scheduler adds
  milliseconds per task, and its workers do not keep per-robot state between tasks. A pipe
  per worker (a socket pair inherited by the child) does both.
- Workers run in a session of their own: a terminal's Ctrl-C reaches only this process,
  which stops at its next safe point and closes the workers in order. A worker keeps only
  its own end of the sockets and ends when it closes, so it also ends when this process
  dies. Nothing leaves the machine: the socket pair has no address.
"""

from __future__ import annotations

import contextlib
import gc
import multiprocessing
import multiprocessing.process
import os
import socket
import time
import traceback
from collections.abc import Hashable, Mapping
from multiprocessing.connection import Connection
from typing import Any

import numpy as np

from coverage_fleet.control.sampling import Answer
from coverage_fleet.control.shared_problems import SharedProblems
from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.controllers import LocalControllers, assign_robots
from coverage_fleet.fleet.mission import Mission
from coverage_fleet.fleet.parallel import default_workers
from coverage_fleet.geometry.buffered_cells import FleetSnapshot
from coverage_fleet.interrupts import raise_if_interrupted

#: Robots per process below which the simulate command keeps its controllers in one process
#: by default (benchmarks/fleet_sim_benchmark.py: with fewer, the pool's start-up and the
#: per-tick round trips cost more than the second core gains on short runs).
ROBOTS_PER_WORKER_MIN = 4
#: Seconds a worker may take to import and build its controllers (busy 2-core machine,
#: 64+ robots per worker).
WORKER_START_TIMEOUT_S = 600.0
#: Seconds a worker may take to stop before it is killed.
WORKER_STOP_TIMEOUT_S = 10.0
_POLL_S = 0.1
#: Workers are forked from this process (module docstring).
_FORK = multiprocessing.get_context("fork")


def default_simulation_workers(robots: int, cores: int | None = None) -> int:
    """Controller processes for an offline run of `robots` robots by default (this one
    included): one per core, as long as each gets at least ROBOTS_PER_WORKER_MIN robots;
    1 (this process alone) otherwise."""
    cores = default_workers() if cores is None else cores
    return max(1, min(cores, robots // ROBOTS_PER_WORKER_MIN))


def usable_cpus() -> list[int]:
    """The CPUs this thread may run on, in order (empty where the platform cannot say)."""
    if not hasattr(os, "sched_getaffinity"):
        return []
    return sorted(os.sched_getaffinity(0))


def pin_to(cpu: int | None) -> set[int] | None:
    """Keep the calling thread (and threads it starts) on `cpu`; returns the CPUs it was
    allowed before (None: nothing changed)."""
    if cpu is None or not hasattr(os, "sched_setaffinity"):
        return None
    before = set(os.sched_getaffinity(0))
    try:
        os.sched_setaffinity(0, {cpu})
    except OSError:
        return None
    return before


class ControllerPool:
    """The mission's controllers over `workers` processes: this one and `workers - 1`
    worker processes (fewer when there are fewer robots). Use as a context manager, or call
    `close`."""

    def __init__(self, mission: Mission, step: float, workers: int) -> None:
        if workers < 1:
            raise ValueError(f"workers must be at least 1, got {workers}")
        split = assign_robots(mission.roster, step, workers)
        #: Robot names per process: this process's first (it may be empty), then each
        #: worker's.
        self.shares = [split[0], *(share for share in split[1:] if share)]
        self._worker_of = {name: w for w, share in enumerate(self.shares) for name in share}
        # One robot of each vehicle file: its terminal ingredients go into the cache and
        # its problem and full solve into `builds` before the workers are forked, so every
        # process holds them (module docstring).
        firsts = list({e.vehicle.cache_key: e.name for e in reversed(mission.roster)}.values())
        builds: SharedProblems = SharedProblems()
        LocalControllers(mission, step, firsts, builds=builds)
        self._processes: list[multiprocessing.process.BaseProcess] = []
        self._connections: list[Connection] = []
        #: Whether each worker has said it built its controllers (its first tick waits).
        self._started: list[bool] = []
        #: Problems each worker built while it built its controllers (the ones this
        #: process built before the fork are inherited: 0 for a roster's own vehicle
        #: files), known once it has started.
        self.start_builds: list[int | None] = []
        self._targets: list[list[tuple[str, Hashable, np.ndarray, float]]] = [
            [] for _ in self.shares
        ]
        self._snapshots: list[FleetSnapshot] = []
        #: Seconds each process spent answering ticks (this process: its own share;
        #: workers: targets, snapshots, answers, what each measured itself, so its waits
        #: for work are left out).
        self.busy_seconds = [0.0] * len(self.shares)
        #: Sum over ticks of the busiest process's seconds: the least the ticks' answers
        #: could have taken with this split (the rest of the wait is idle processes,
        #: messages and wake-ups).
        self.critical_seconds = 0.0
        #: CPU seconds each process used within its busy seconds (time.process_time): the
        #: rest of its busy time it waited for a core.
        self.cpu_seconds = [0.0] * len(self.shares)
        cpus = usable_cpus() if len(self.shares) > 1 else []
        self._cpu_of = [cpus[k % len(cpus)] if cpus else None for k in range(len(self.shares))]
        self._allowed_before: set[int] | None = None
        try:
            # What the workers inherit is kept out of their garbage collector's passes
            # (frozen across the fork, Python's gc.freeze documentation): a worker would
            # otherwise walk this process's whole heap (an earlier run's builds and logs
            # included) again and again.
            gc.freeze()
            try:
                for index, share in enumerate(self.shares[1:], start=1):
                    self._start_worker(mission, step, share, self._cpu_of[index], builds)
                    self._started.append(False)
                    self.start_builds.append(None)
            finally:
                gc.unfreeze()
            self._allowed_before = pin_to(self._cpu_of[0])
            # The builds made above, as the workers' (a run does not borrow the builds of
            # this thread's earlier runs).
            self._local = LocalControllers(mission, step, self.shares[0], builds=builds)
        except BaseException:
            self.close()
            raise

    @property
    def workers(self) -> int:
        """Processes answering: this one and the worker processes."""
        return len(self.shares)

    @property
    def worker_pids(self) -> list[int]:
        """The worker processes' ids, in the order of `shares[1:]`."""
        return [process.pid for process in self._processes]

    def _start_worker(
        self, mission: Mission, step: float, names: list[str], cpu: int | None,
        builds: SharedProblems,
    ) -> None:
        ours, theirs = socket.socketpair()
        with ours, theirs:
            # The sockets of the workers started before stay with this process alone.
            inherited = [c.fileno() for c in self._connections] + [ours.fileno()]
            process = _FORK.Process(
                target=_worker_main, name=f"controller-worker-{len(self._processes) + 1}",
                args=(theirs.fileno(), inherited, mission, float(step), names, cpu, builds),
                daemon=True,
            )
            process.start()
            self._processes.append(process)
            self._connections.append(Connection(ours.detach()))

    def _receive(self, worker: int, timeout: float | None, doing: str) -> Any:
        """The next message of worker `worker` (0 is the first worker process)."""
        connection, process = self._connections[worker], self._processes[worker]
        if timeout is not None:
            waited = 0.0
            while not connection.poll(_POLL_S):
                raise_if_interrupted()
                waited += _POLL_S
                if not process.is_alive() or waited > timeout:
                    why = ("no answer" if process.is_alive()
                           else f"exit status {process.exitcode}")
                    raise ConfigError.single(
                        "command line", "--workers",
                        f"controller worker {worker + 1} did not {doing} ({why})")
        try:
            kind, payload = connection.recv()
        except (EOFError, OSError):
            raise RuntimeError(
                f"controller worker {worker + 1} ended during {doing} (exit status "
                f"{process.exitcode}); its error is above") from None
        if kind == "error":
            raise RuntimeError(
                f"controller worker {worker + 1} failed during {doing}:\n{payload}")
        return payload

    def set_target(
        self, name: str, key: Hashable, target: np.ndarray, distance_at_commit: float
    ) -> None:
        process = self._worker_of[name]
        if process == 0:
            self._local.set_target(name, key, target, distance_at_commit)
        else:
            self._targets[process].append(
                (name, key, np.asarray(target, float), float(distance_at_commit)))

    def add_snapshot(self, snapshot: FleetSnapshot) -> None:
        self._local.add_snapshot(snapshot)
        self._snapshots.append(snapshot)

    def answer_all(
        self, states: Mapping[str, np.ndarray], state_time: float
    ) -> dict[str, Answer]:
        # Send to every worker first, then answer this process's share, then collect: all
        # processes solve at the same time.
        for process in range(1, len(self.shares)):
            batch = [(name, states[name]) for name in self.shares[process] if name in states]
            self._connections[process - 1].send(
                ("answer", float(state_time), self._targets[process], self._snapshots, batch))
            self._targets[process] = []
        self._snapshots = []
        started, cpu_started = time.perf_counter(), time.process_time()
        answers = self._local.answer_all(
            {name: states[name] for name in self.shares[0] if name in states}, state_time)
        busiest = time.perf_counter() - started
        self.busy_seconds[0] += busiest
        self.cpu_seconds[0] += time.process_time() - cpu_started
        for process in range(1, len(self.shares)):
            if not self._started[process - 1]:
                self.start_builds[process - 1] = self._receive(
                    process - 1, WORKER_START_TIMEOUT_S, "start")
                self._started[process - 1] = True
            share_answers, busy, cpu = self._receive(process - 1, None, "a tick")
            answers.update(share_answers)
            self.busy_seconds[process] += busy
            self.cpu_seconds[process] += cpu
            busiest = max(busiest, busy)
        self.critical_seconds += busiest
        return {name: answers[name] for name in states}

    def close(self) -> None:
        """Ask every worker to stop, close the sockets, kill a worker that does not end;
        this thread may run on its former CPUs again."""
        for connection in self._connections:
            with contextlib.suppress(OSError, ValueError):
                connection.send(("stop", None))
            connection.close()
        for process in self._processes:
            process.join(WORKER_STOP_TIMEOUT_S)
            if process.is_alive():
                process.kill()
                process.join()
        self._connections, self._processes = [], []
        if self._allowed_before is not None:
            with contextlib.suppress(OSError):
                os.sched_setaffinity(0, self._allowed_before)
            self._allowed_before = None

    def __enter__(self) -> ControllerPool:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _worker_main(
    descriptor: int, inherited: list[int], mission: Mission, step: float, names: list[str],
    cpu: int | None, builds: SharedProblems,
) -> None:
    """A forked worker's first steps: a session of its own (a terminal's Ctrl-C reaches only
    the parent), only its own socket, its CPU; then `serve` with the builds it inherited."""
    os.setsid()
    for other in inherited:
        with contextlib.suppress(OSError):
            os.close(other)
    pin_to(cpu)
    serve(Connection(descriptor), mission, step, names, builds)


def serve(
    connection: Connection, mission: Mission, step: float, names: list[str],
    builds: SharedProblems,
) -> None:
    """The worker's side: build the controllers of `names` (with `builds`), say "ready" with
    the number of problems that took, then answer ticks until told to stop or the socket
    closes. Faults go back as ("error", traceback)."""
    before = builds.builds
    try:
        controllers = LocalControllers(mission, step, names, builds=builds)
    except Exception:
        connection.send(("error", traceback.format_exc()))
        return
    connection.send(("ready", builds.builds - before))
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

