"""ROS graph in real time: 8 robots, every controller in its own process at 10 Hz (sample
time 0.1 s), the headless simulator in realtime mode and the base station, all on this
machine. Prints, per run:

- the share of control periods that missed their deadline: between two successive commands
  of a robot (as they arrive here) a gap of g seconds holds round(g / period) - 1 missed
  periods (a late command delays its own period and may swallow the next ones);
- the median state-to-command latency: from the arrival here of the state a controller
  used (the plan it publishes with its command carries that state's stamp) to the arrival
  of that plan; it includes the wait for the controller's timer, up to one period;
- the baselines from the same run: the median MPC solve time the controllers report on
  /diagnostics during the run (so latency minus it is the graph's own overhead), and the
  median solve time of the same controllers in this process without ROS (a fixed 5 m move),
  with the ratios.

Usage: .venv/bin/python benchmarks/ros_realtime_benchmark.py [--robots 8] [--seconds 30]
"""

from __future__ import annotations

import argparse
import itertools
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

MISSION = """\
name: benchmark_solar_rows   # invented benchmark scenario (solar farm inspection)
region: {{vertices: [[0, 0], [40, 0], [40, 30], [0, 30]]}}
density:
  kind: gaussian_bumps
  background: 0.2
  bumps:
    - {{weight: 50.0, mean: [28.0, 20.0], covariance: [[30.0, 0.0], [0.0, 20.0]]}}
roster:
{robots}
"""
VEHICLES = ("differential_drive", "multirotor")


def write_mission(folder: Path, robots: int) -> Path:
    lines = []
    for i in range(robots):
        x, y = 4.0 + 4.0 * i, 4.0 + 2.0 * (i % 3)
        lines.append(
            f"  - {{name: robot_{i}, vehicle: {VEHICLES[i % 2]}, initial_pose: [{x}, {y}, 0.0]}}"
        )
    path = folder / "mission.yaml"
    path.write_text(MISSION.format(robots="\n".join(lines)))
    return path


def baseline_solve_times(mission_path: Path, samples: int = 20) -> list[float]:
    """In-process MPC solves of every roster robot towards a target 5 m away."""
    from coverage_fleet.control.controller import RobotController
    from coverage_fleet.control.terminal import terminal_for_vehicle
    from coverage_fleet.fleet.mission import load_mission
    from coverage_fleet.fleet.plants import initial_state

    mission = load_mission(mission_path)
    times = []
    for entry in mission.roster:
        spec = entry.vehicle
        terminal, _ = terminal_for_vehicle(spec)
        controller = RobotController(spec.model, spec.mpc, mission.region.halfspaces(), terminal)
        x = initial_state(entry, entry.initial_pose)
        target = np.asarray(entry.initial_pose[:2]) + np.array([5.0, 3.0])
        F = spec.model.discrete_dynamics(spec.mpc.sample_time, spec.mpc.substeps)
        for _ in range(samples):
            step = controller.step(x, target)
            times.append(step.solve_time)
            x = np.asarray(F(x, step.input), float).ravel()
    return times


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--robots", type=int, default=8)
    parser.add_argument("--seconds", type=float, default=30.0, help="measured wall seconds")
    args = parser.parse_args()

    from coverage_fleet.cli.graph import fleet_nodes
    from coverage_fleet.cli.launcher import GraphProcesses, ros_environment

    env, _ = ros_environment(os.environ)
    os.environ.update(env)
    import rclpy
    from rclpy.executors import SingleThreadedExecutor

    from coverage_fleet.ros import qos, topics
    from coverage_fleet.ros.conversions import command_message_type

    folder = Path(tempfile.mkdtemp(prefix="ros_benchmark_"))
    mission_path = write_mission(folder, args.robots)
    print(f"baseline: in-process MPC solves for {args.robots} robots ...", flush=True)
    solves = baseline_solve_times(mission_path)

    from coverage_fleet.fleet.mission import load_mission

    mission = load_mission(mission_path)
    specs = fleet_nodes(mission_path, "realtime", stop_when_settled=False, duration=1e6)
    graph = GraphProcesses(folder / "logs", env)
    rclpy.init(args=["ros_realtime_benchmark"])
    node = rclpy.create_node("ros_realtime_benchmark")
    state_arrival: dict[tuple[str, int], float] = {}
    commands: dict[str, list[float]] = {e.name: [] for e in mission.roster}
    latencies: dict[str, list[float]] = {e.name: [] for e in mission.roster}

    def on_odom(name: str, msg) -> None:
        state_arrival[(name, stamp_to_nanoseconds(msg.header.stamp))] = time.perf_counter()

    def on_command(name: str) -> None:
        commands[name].append(time.perf_counter())

    def on_plan(name: str, msg) -> None:
        used = state_arrival.pop((name, stamp_to_nanoseconds(msg.header.stamp)), None)
        if used is not None:
            latencies[name].append(time.perf_counter() - used)

    from diagnostic_msgs.msg import DiagnosticArray
    from nav_msgs.msg import Odometry
    from nav_msgs.msg import Path as PlanPath

    from coverage_fleet.ros.conversions import stamp_to_nanoseconds

    for entry in mission.roster:
        node.create_subscription(
            Odometry, topics.robot_topic(entry.name, topics.ODOM),
            lambda m, n=entry.name: on_odom(n, m), qos.REPORTS,
        )
        node.create_subscription(
            PlanPath, topics.robot_topic(entry.name, topics.PLAN),
            lambda m, n=entry.name: on_plan(n, m), qos.DISPLAY,
        )
        node.create_subscription(
            command_message_type(entry.vehicle.command_kind),
            topics.robot_topic(entry.name, topics.CMD_VEL),
            lambda _m, n=entry.name: on_command(n), qos.COMMAND,
        )
    graph_solves: list[float] = []

    def on_diagnostics(msg) -> None:
        for status in msg.status:
            for kv in status.values:
                if kv.key == "solve_time" and kv.value != "nan":
                    graph_solves.append(float(kv.value))

    node.create_subscription(DiagnosticArray, topics.DIAGNOSTICS, on_diagnostics, qos.REPORTS)
    executor = SingleThreadedExecutor()
    executor.add_node(node)
    status = 0
    try:
        graph.start(specs)
        print(f"started {len(specs)} processes; waiting for every controller ...", flush=True)
        deadline = time.monotonic() + 300.0
        while not all(commands.values()):
            if time.monotonic() > deadline or any(n.returncode is not None for n in graph.nodes):
                print("a controller never answered; see logs in", folder / "logs")
                return 1
            executor.spin_once(timeout_sec=0.05)
        for name in commands:
            commands[name].clear()
            latencies[name].clear()
        graph_solves.clear()
        start = time.perf_counter()
        while time.perf_counter() - start < args.seconds:
            executor.spin_once(timeout_sec=0.01)
        end = time.perf_counter()
    finally:
        graph.stop()
        node.destroy_node()
        rclpy.try_shutdown()

    period = 0.1
    periods = int((end - start) / period) * len(commands)
    missed = 0
    for stamps in commands.values():
        edges = [start, *stamps, end]
        missed += sum(max(0, round((b - a) / period) - 1) for a, b in itertools.pairwise(edges))
    share = missed / periods
    all_latencies = [v for values in latencies.values() for v in values]
    latency = statistics.median(all_latencies) if all_latencies else float("nan")
    solve = statistics.median(solves)
    print(f"robots: {args.robots}, sample time {period:g} s, measured {end - start:.1f} s, "
          f"{os.cpu_count()} CPUs")
    print(f"control periods missed: {missed} of {periods} = {100 * share:.1f} %")
    print(f"median state-to-command latency: {1000 * latency:.1f} ms "
          f"(95th percentile {1000 * float(np.percentile(all_latencies, 95)):.1f} ms, "
          f"{len(all_latencies)} commands)")
    in_graph = statistics.median(graph_solves) if graph_solves else float("nan")
    print(f"median MPC solve time inside the graph (/diagnostics): {1000 * in_graph:.1f} ms")
    print(f"ratio latency / in-graph solve time: {latency / in_graph:.2f}")
    print(f"baseline median MPC solve time (in process, no ROS, 5 m move): {1000 * solve:.1f} ms")
    print(f"ratio latency / baseline solve time: {latency / solve:.2f}")
    print(f"ratio latency / sample time: {latency / period:.2f}")
    return status


if __name__ == "__main__":
    sys.exit(main())
