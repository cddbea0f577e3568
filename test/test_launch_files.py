"""The launch files run by the real ROS 2 launch service (`launch` + `launch_ros`), as
`ros2 launch` runs them on a ROS 2 install.

The two packages have no wheels; their unmodified sources and a runner live outside this
repository in ../shared/vendor/ros2-launch (nothing of them is copied here). Tests skip with
the reason where that folder is absent. Each test builds the package with colcon and runs
the installed launch files against the installed executables.

What is checked (outcomes, not timings): the simulated fleet launch settles the quick-check
mission and ends by itself when the simulator ends; on SIGINT every process exits cleanly
within the launch service's grace period (the service logs an escalation to SIGTERM
otherwise); launch arguments reach the nodes.
"""

from __future__ import annotations

import os
import signal
import sys
from pathlib import Path

import pytest
from support_colcon import REPO, colcon_install
from support_processes import WatchedProcess

VENDOR = Path(
    os.environ.get("COVERAGE_FLEET_ROS2_LAUNCH", REPO.parent / "shared" / "vendor" / "ros2-launch")
)
QUICK_MISSION = "config/missions/solar_row_quick_check.yaml"
#: Wall seconds a launch may take before the test gives up (a hang, not a timing check).
PATIENCE = 240.0

pytestmark = pytest.mark.skipif(
    not (VENDOR / "run_launch.py").is_file(),
    reason=f"the launch service sources are not at {VENDOR} (a clone without ../shared)",
)


@pytest.fixture(scope="module")
def install_prefix(tmp_path_factory: pytest.TempPathFactory) -> Path:
    pytest.importorskip("osrf_pycommon", reason="osrf-pycommon (a dependency of launch)")
    return colcon_install(tmp_path_factory.mktemp("launch_ws"))


class LaunchRun(WatchedProcess):
    """One `run_launch.py FILE name:=value ...` process with its output collected."""

    def __init__(self, prefix: Path, launch_file: str, **arguments: str) -> None:
        site = prefix / "lib" / f"python{sys.version_info[0]}.{sys.version_info[1]}" / (
            "site-packages"
        )
        env = dict(
            os.environ,
            AMENT_PREFIX_PATH=str(prefix),
            PYTHONPATH=os.pathsep.join([str(VENDOR), str(VENDOR / "placeholders"), str(site)]),
            PATH=f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}",
            PYTHONUNBUFFERED="1",
        )
        command = [
            sys.executable,
            str(VENDOR / "run_launch.py"),
            str(prefix / "share" / "coverage_fleet" / "launch" / launch_file),
            *(f"{name}:={value}" for name, value in arguments.items()),
        ]
        # A process group of its own, as a shell gives a foreground job: Ctrl-C in a
        # terminal signals the whole group, and the launch service relies on that (on its own
        # SIGINT it does not forward SIGINT to its children).
        super().__init__(command, PATIENCE, env=env, own_group=True)

    def wait_for(self, text: str) -> None:
        self.wait_until(lambda: text in self.output, repr(text))

    def interrupt(self) -> int:
        """Ctrl-C as a terminal sends it: SIGINT to the launch and every process it started."""
        os.killpg(self.process.pid, signal.SIGINT)
        return self.wait()

    def cleanup(self) -> None:
        if self.process.poll() is None:
            os.killpg(self.process.pid, signal.SIGKILL)
            self.process.wait()


def assert_every_process_ended_cleanly(run: LaunchRun, expected: int) -> None:
    output = run.output
    assert "escalating" not in output, output[-4000:]
    assert "process has died" not in output, output[-4000:]
    assert output.count("process has finished cleanly") == expected, output[-4000:]


def test_fleet_launch_settles_and_ends_with_the_simulator(install_prefix: Path) -> None:
    mission = install_prefix / "share" / "coverage_fleet" / QUICK_MISSION
    # A duration argument well beyond the usual settling time (about 20 s simulated): on a
    # loaded machine the base station can lag the lockstep clock and settling takes longer.
    run = LaunchRun(install_prefix, "fleet_sim.launch.py", mission=str(mission),
                    sim_mode="lockstep", duration="150")
    status = run.wait()
    output = run.output
    assert status == 0, output[-4000:]
    assert "generation 1 committed" in output, output[-4000:]
    run_over = [line for line in run.lines if "run over at" in line]
    assert run_over and "settled" in run_over[0], output[-4000:]
    # base station, three controllers, simulator
    assert_every_process_ended_cleanly(run, expected=5)


def test_fleet_launch_stops_cleanly_on_sigint_mid_run(install_prefix: Path) -> None:
    mission = install_prefix / "share" / "coverage_fleet" / QUICK_MISSION
    run = LaunchRun(install_prefix, "fleet_sim.launch.py", mission=str(mission),
                    sim_mode="lockstep")
    run.wait_for("generation 2 committed")
    status = run.interrupt()
    assert status == 0, run.output[-4000:]
    assert_every_process_ended_cleanly(run, expected=5)


def test_base_station_and_robot_launches_take_their_arguments(
    install_prefix: Path, tmp_path: Path
) -> None:
    share = install_prefix / "share" / "coverage_fleet"
    mission = share / QUICK_MISSION
    # A vehicle file of our own: the controller must report this file, not the roster's.
    vehicle = tmp_path / "rover_for_launch_test.yaml"
    vehicle.write_text((share / "config" / "vehicles" / "differential_drive.yaml").read_text())
    # A node-tuning file of our own (the package's with another rate) and a fleet namespace.
    tuning = tmp_path / "tuning_for_launch_test.yaml"
    tuning.write_text(
        (share / "config" / "node_tuning.yaml").read_text().replace("rate: 10.0", "rate: 2.0")
    )
    base = LaunchRun(install_prefix, "base_station.launch.py", mission=str(mission),
                     use_sim_time="false", density_updates="true", fleet_namespace="fleet_x",
                     node_tuning=str(tuning))
    robot = LaunchRun(install_prefix, "robot_controller.launch.py", robot="rover_b",
                      mission=str(mission), vehicle_file=str(vehicle), use_sim_time="false",
                      fleet_namespace="fleet_x")
    try:
        robot.wait_for(f"rover_b: differential_drive from {vehicle}")
        base.wait_for(f"partitioning {mission.stem!r} for 3 robots at 2 Hz")
        base.wait_for("densities from /fleet_x/coverage/density")
    finally:
        statuses = [run.interrupt() for run in (robot, base)]
    assert statuses == [0, 0], robot.output[-2000:] + base.output[-2000:]
    assert "fleet_x.rover_b.controller" in robot.output
    assert "fleet_x.coverage_partition" in base.output
    assert_every_process_ended_cleanly(robot, expected=1)
    assert_every_process_ended_cleanly(base, expected=1)
