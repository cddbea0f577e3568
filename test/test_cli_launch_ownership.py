"""`coverage-fleet launch` owns the processes it starts, and checks its input before it
starts anything.

Real processes: the launcher runs the invented quick-check mission (three rovers in a solar
yard) in lockstep; the tests send it the signals a field team's tools send (SIGTERM from a
service manager, SIGHUP from a closed terminal, Ctrl-C twice, SIGKILL) and check outcomes:
every node process is gone afterwards, and, where the launcher survives long enough, the
trial is written. Waits are bounded by a patience limit (a hang fails), never timed.
"""

from __future__ import annotations

import contextlib
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from support_processes import WatchedProcess

pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

REPO = Path(__file__).resolve().parents[1]
QUICK_MISSION = REPO / "config" / "missions" / "solar_row_quick_check.yaml"
VEHICLES = REPO / "config" / "vehicles"
PATIENCE = 180.0


class Launcher(WatchedProcess):
    def __init__(self, *arguments: str) -> None:
        super().__init__(
            [sys.executable, "-m", "coverage_fleet.cli.main", "launch", *arguments], PATIENCE
        )

    def node_pids(self) -> list[int]:
        return [int(p) for p in re.findall(r"\bpid (\d+)", self.output)]

    def cleanup(self) -> None:
        for pid in [self.process.pid, *self.node_pids()]:
            with contextlib.suppress(ProcessLookupError):
                os.kill(pid, signal.SIGKILL)


def running(pid: int) -> bool:
    """The process exists and is not a zombie (a reparented child nobody reaped yet)."""
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (FileNotFoundError, IndexError):
        return False
    return state not in ("Z", "X")


def wait_until_gone(pids: list[int]) -> list[int]:
    deadline = time.monotonic() + 60.0
    while time.monotonic() < deadline and any(running(p) for p in pids):
        time.sleep(0.2)
    return [p for p in pids if running(p)]


def started_and_committing(launcher: Launcher, out: Path) -> None:
    """Wait until the nodes are up and the gate has committed a first generation."""
    # recorder, base station, three controllers and the simulator
    launcher.wait_until(lambda: len(launcher.node_pids()) == 6, "six node processes")
    base_log = Path(f"{out}.run") / "logs" / "base_station.log"
    launcher.wait_until(
        lambda: base_log.is_file() and "generation 1 committed" in base_log.read_text(),
        "a committed generation",
    )


@pytest.mark.parametrize(
    ("first", "second"),
    [(signal.SIGTERM, None), (signal.SIGHUP, None), (signal.SIGINT, signal.SIGINT)],
    ids=["sigterm", "sighup", "ctrl-c-twice"],
)
def test_a_stop_signal_stops_every_node_and_keeps_the_trial(
    tmp_path: Path, first: signal.Signals, second: signal.Signals | None
) -> None:
    out = tmp_path / "trial"
    launcher = Launcher(str(QUICK_MISSION), "--headless-sim", "--out", str(out))
    started_and_committing(launcher, out)
    pids = launcher.node_pids()
    launcher.process.send_signal(first)
    if second is not None:
        launcher.wait_until(lambda: "stopping the graph" in launcher.output, "the stop begin")
        launcher.process.send_signal(second)
    status = launcher.wait()
    assert status == 130, launcher.output[-3000:]
    assert wait_until_gone(pids) == [], launcher.output[-3000:]
    assert (out / "report" / "metrics.json").is_file(), launcher.output[-3000:]
    if second is not None:
        assert "again: killing the nodes still running" in launcher.output


def test_nodes_die_with_a_killed_launcher(tmp_path: Path) -> None:
    out = tmp_path / "trial"
    launcher = Launcher(str(QUICK_MISSION), "--headless-sim", "--out", str(out))
    started_and_committing(launcher, out)
    pids = launcher.node_pids()
    launcher.process.kill()
    launcher.wait()
    left = wait_until_gone(pids)
    for pid in left:  # do not leave them behind for the next test
        os.kill(pid, signal.SIGKILL)
    assert left == [], f"node processes outlived the launcher: {left}"


def _vehicle_with_sample_time(folder: Path, sample_time: float) -> Path:
    text = (VEHICLES / "differential_drive.yaml").read_text()
    changed = re.sub(r"sample_time:\s*[0-9.eE+-]+", f"sample_time: {sample_time}", text, count=1)
    assert changed != text, "the rover file has no sample_time to change"
    path = folder / "rover_odd_sample_time.yaml"
    path.write_text(changed)
    return path


@pytest.mark.parametrize(
    ("arguments", "expected"),
    [
        (["--duration", "-1"], "command line: --duration"),
        (["--duration", "inf"], "command line: --duration"),
        (["--vehicle", "rover_a"], "command line: --vehicle: 'rover_a': expected ROBOT=FILE"),
        (["--vehicle", "nobody=VEHICLE"], "'nobody' is not in the roster"),
        (["--vehicle", "rover_a=MISSING"], "roster[0].vehicle"),
        (["--vehicle", "rover_b=ODD"], "not a whole multiple of the simulation step"),
    ],
    ids=["negative-duration", "infinite-duration", "no-file", "unknown-robot", "missing-file",
         "sample-time"],
)
def test_bad_input_is_refused_before_anything_starts(
    tmp_path: Path, arguments: list[str], expected: str
) -> None:
    replacements = {
        "VEHICLE": str(VEHICLES / "differential_drive.yaml"),
        "MISSING": str(tmp_path / "no_such_vehicle.yaml"),
        "ODD": str(_vehicle_with_sample_time(tmp_path, 0.15)),
    }
    arguments = [
        re.sub("|".join(replacements), lambda m: replacements[m.group(0)], a) for a in arguments
    ]
    out = tmp_path / "trial"
    result = subprocess.run(
        [sys.executable, "-m", "coverage_fleet.cli.main", "launch", str(QUICK_MISSION),
         "--headless-sim", "--out", str(out), *arguments],
        capture_output=True, text=True, timeout=120,
    )
    assert result.returncode == 2, result.stdout + result.stderr
    assert expected in result.stderr, result.stderr
    assert "Traceback" not in result.stderr
    assert "started" not in result.stdout  # no process was started
    assert not out.exists() and not Path(f"{out}.run").exists()
