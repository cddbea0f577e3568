"""Where the runs of a study execute: in this process, on a local cluster over this
machine's cores (the default), or on an existing Dask cluster the user points at.

Engine: Dask distributed (`distributed` on the package index). Why Dask and not Ray:
- it is pure Python and light: the embedded local cluster (a Dask LocalCluster in a helper
  process this command starts and stops) is a scheduler plus one worker process per core,
  ready in a few seconds on a 2-core machine; Ray brings a
  compiled runtime, an object store and a dashboard service that cost memory and start-up
  time a study of a few dozen short simulations never earns back;
- a cluster someone already runs is reached by one address (`tcp://HOST:PORT`, started with
  `dask scheduler` and `dask worker ADDRESS` on the machines), with no change to our code;
- a run is a plain function call on picklable values (the mission, a seed), which is
  exactly Dask's future interface; nothing here needs Ray's actors.

Same results wherever a run executes: a run is a pure function of the mission and its
seed. The local cluster's workers run one task at a time with the BLAS thread pools pinned
to one thread (OMP/OPENBLAS/MKL_NUM_THREADS=1), so their floating-point results do not
depend on how many cores a library chose to use; workers of an existing cluster should be
started with the same variables for bit-identical results. Workers need this package
importable (the local cluster's workers are children of this process, so they have it).

Only loopback is used by the local cluster (scheduler, workers and the scheduler's small
status server listen on 127.0.0.1; no dashboard). Ctrl-C reaches only this process (the
cluster runs in a session of its own) and stops the study at the next safe point.
"""

from __future__ import annotations

import contextlib
import os
import re
import select
import signal
import subprocess
import sys
import tempfile
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from coverage_fleet.errors import ConfigError
from coverage_fleet.interrupts import raise_if_interrupted

#: Local worker processes at most (a typing mistake beyond this would fork-bomb a laptop).
WORKERS_MAX = 256
#: Seconds to reach an existing scheduler before giving up.
CONNECT_TIMEOUT_S = 10.0
#: Environment of the local cluster's worker processes (one BLAS thread each).
PINNED_THREADS = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1",
                  "MKL_NUM_THREADS": "1"}
_ADDRESS = re.compile(r"^(?:tcp://)?(?P<host>\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9._-]+):(?P<port>\d+)$")
#: How often the waiting loop looks for finished runs and for Ctrl-C.
_POLL_S = 0.1


@dataclass(frozen=True)
class Placement:
    """Where runs execute: `scheduler` (an existing Dask cluster's address) if given,
    else `workers` local worker processes (1: in this process, no cluster)."""

    workers: int = 1
    scheduler: str | None = None

    def describe(self) -> str:
        if self.scheduler is not None:
            return f"the Dask cluster at {self.scheduler}"
        if self.workers == 1:
            return "this process"
        return f"a local cluster of {self.workers} worker processes"


def default_workers() -> int:
    """One worker per core of this machine."""
    return max(1, os.cpu_count() or 1)


def scheduler_address_fault(text: Any) -> str | None:
    """Why `text` is not a scheduler address (`tcp://HOST:PORT` or `HOST:PORT`), or None."""
    if not isinstance(text, str) or not text:
        return "must be a scheduler address such as tcp://127.0.0.1:8786"
    match = _ADDRESS.match(text)
    if match is None:
        return (f"must be a scheduler address tcp://HOST:PORT (or HOST:PORT), got {text!r}; "
                "only the tcp protocol is supported")
    if not 1 <= int(match["port"]) <= 65535:
        return f"port must be 1..65535, got {match['port']}"
    return None


def _normalised(address: str) -> str:
    return address if address.startswith("tcp://") else f"tcp://{address}"


def run_all(
    task: Callable[..., Any],
    shared: Any,
    items: Sequence[Any],
    placement: Placement,
    on_done: Callable[[int, Any], None] | None = None,
) -> list[Any]:
    """[task(shared, item) for item in items], executed where `placement` says; returns the
    results in the order of `items`. `on_done(index, result)` is called in this process as
    each run finishes (in any order). `shared` (the mission) is sent to each worker once.
    An exception in a run is raised here; Ctrl-C (at safe points) stops waiting and shuts
    the local cluster down."""
    if placement.scheduler is None and min(placement.workers, len(items)) <= 1:
        results = []
        for index, item in enumerate(items):
            raise_if_interrupted()
            results.append(task(shared, item))
            if on_done is not None:
                on_done(index, results[-1])
        return results
    client, cluster = _connect(placement, len(items))
    try:
        remote_shared = client.scatter(shared, broadcast=True)
        futures = [client.submit(task, remote_shared, item, pure=False) for item in items]
        results: list[Any] = [None] * len(items)
        pending = set(range(len(items)))
        while pending:
            raise_if_interrupted()
            finished = sorted(i for i in pending if futures[i].done())
            if not finished:
                time.sleep(_POLL_S)
                continue
            for index in finished:
                pending.discard(index)
                results[index] = futures[index].result()
                if on_done is not None:
                    on_done(index, results[index])
        return results
    finally:
        client.close()
        if cluster is not None:
            _stop_local_cluster(cluster)


def _connect(placement: Placement, runs: int) -> tuple[Any, Any]:
    """A Dask client, and the local cluster helper it owns (None for an existing
    cluster)."""
    from distributed import Client  # imported here: only needed when runs go to workers

    helper = None
    if placement.scheduler is not None:
        address = _normalised(placement.scheduler)
    else:
        helper, address = _start_local_cluster(min(placement.workers, runs))
    try:
        client = Client(address, timeout=CONNECT_TIMEOUT_S, set_as_default=False)
    except (OSError, TimeoutError) as error:
        if helper is not None:
            _stop_local_cluster(helper)
        raise ConfigError.single(
            "command line", "--scheduler",
            f"cannot reach a Dask scheduler at {address} within "
            f"{CONNECT_TIMEOUT_S:g} s ({type(error).__name__}: {error})") from None
    return client, helper


#: Seconds the local cluster may take to start (imports on a busy 2-core machine).
LOCAL_START_TIMEOUT_S = 180.0


def _start_local_cluster(workers: int) -> tuple[subprocess.Popen, str]:
    """Start the embedded local cluster in a helper process and return it with the
    scheduler's address.

    Why a helper process in a session of its own: a terminal's Ctrl-C goes to the whole
    foreground process group. Worker processes that get it die mid-start with tracebacks;
    keeping them out of that group lets this process take the Ctrl-C alone (at its safe
    points, never lost) and stop the cluster in order. The helper stops when its standard
    input closes, so it also ends when this process dies."""
    with tempfile.TemporaryFile(mode="w+") as errors:
        helper = subprocess.Popen(
            [sys.executable, "-m", "coverage_fleet.fleet.parallel", str(workers)],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=errors, text=True,
            start_new_session=True, env={**os.environ, **PINNED_THREADS},
        )
        try:
            return helper, _await_address(helper, errors, workers)
        except BaseException:
            _stop_local_cluster(helper)
            raise


def _await_address(helper: subprocess.Popen, errors: Any, workers: int) -> str:
    """The scheduler address the helper prints; Ctrl-C is honoured while waiting."""
    assert helper.stdout is not None
    deadline = time.monotonic() + LOCAL_START_TIMEOUT_S
    while True:
        raise_if_interrupted()
        ready, _, _ = select.select([helper.stdout], [], [], _POLL_S)
        line = helper.stdout.readline().strip() if ready else ""
        if line.startswith("tcp://"):
            return line
        ended = helper.poll()
        if ended is not None or (ready and not line) or time.monotonic() > deadline:
            errors.seek(0)
            tail = " ".join(errors.read().strip().splitlines()[-3:])
            why = "no answer" if ended is None else f"exit status {ended}"
            raise ConfigError.single(
                "command line", "--workers",
                f"the local cluster of {workers} workers did not start ({why}"
                f"{': ' + tail if tail else ''})")


def _stop_local_cluster(helper: subprocess.Popen) -> None:
    """Close the helper's input (it closes its cluster and exits); kill its process group
    if it has not gone within a few seconds."""
    with contextlib.suppress(OSError):
        if helper.stdin is not None:
            helper.stdin.close()
    try:
        helper.wait(timeout=20.0)
    except subprocess.TimeoutExpired:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(helper.pid, signal.SIGKILL)
        helper.wait()


def serve_local_cluster(workers: int) -> None:
    """The helper's side: start the cluster (loopback only, one thread and one BLAS
    thread per worker, no dashboard), print the scheduler's address, and keep it until
    standard input closes."""
    import dask
    from distributed import LocalCluster

    with dask.config.set({"distributed.nanny.pre-spawn-environ": PINNED_THREADS}), \
            warnings.catch_warnings():
        # Its status page moves to a free loopback port when the usual one is taken.
        warnings.filterwarnings("ignore", message="Port .* is already in use")
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                               host="127.0.0.1", dashboard_address=None, silence_logs=50)
    with cluster:
        print(cluster.scheduler_address, flush=True)
        sys.stdin.read()


if __name__ == "__main__":
    serve_local_cluster(int(sys.argv[1]))
