"""Recording a run of the ROS graph in MCAP and building the trial from the recording.

A 3-robot lockstep run (`coverage-fleet launch --headless-sim`, real node processes over
DDS on loopback) is recorded by the recorder process; the recording is read back with the
`mcap` package's own reader and the `mcap-ros2-support` decoder (independent of this
package's reading code), its trial is compared with the offline simulation of the same
mission, and `coverage-fleet report` rebuilds trials from it, also from a copy cut short.
A recorder SIGKILLed while it records leaves a file whose complete chunks read back. The run
overrides rover_a's vehicle file (--vehicle); launching the trial's mission as run again
reproduces it within stated tolerances.

Outside references: the MCAP format specification (Foxglove, "MCAP file format
specification", 2022, sections "Records" and "Well-known encodings": profile "ros2",
schema encoding "ros2msg", message encoding "cdr", chunks with message indexes); the ROS 2
message definitions shipped by the interface packages (share/<pkg>/msg/*.msg); lockstep
sampling: one state per simulation step, one MPC solve per controller sample time (common
practice of sampled-data control).
"""

from __future__ import annotations

import csv
import hashlib
import itertools
import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")
mcap_reader = pytest.importorskip("mcap.reader")
mcap_ros2_decoder = pytest.importorskip("mcap_ros2.decoder")

from rclpy.qos import QoSProfile  # noqa: E402
from std_msgs.msg import Float64  # noqa: E402

from coverage_fleet.fleet.mission import load_mission, with_vehicle_overrides  # noqa: E402
from coverage_fleet.fleet.simulation import simulate_mission  # noqa: E402
from coverage_fleet.inputs.fields import Collector  # noqa: E402
from coverage_fleet.report.trial import write_mission_trial  # noqa: E402
from coverage_fleet.ros.recording import CHUNK_BYTES, read_recording  # noqa: E402

MISSION = """\
name: harbour_recorded_trio   # invented test scenario (harbour water survey), uniform density
region: {vertices: [[0, 0], [14, 0], [14, 10], [0, 10]]}
density: {kind: uniform}
roster:
  - {name: rover_a, vehicle: differential_drive, initial_pose: [1.5, 1.5, 0.0]}
  - {name: drone_b, vehicle: multirotor, initial_pose: [3.5, 1.5, 0.0]}
  - {name: boat_d, vehicle: surface_vessel, initial_pose: [3.5, 3.5, 0.0]}
gate: {noise_tolerance: 0.02, progress_tolerance: 0.05}
settle: {distance: 0.1}
simulation: {duration: 15.0, seed: 1, plant_substeps: 8}
"""
ROBOTS = {"rover_a": 0.1, "drone_b": 0.1, "boat_d": 0.2}  # robot -> MPC sample time (s)
STEP = 0.1  # simulation step: the smallest sample time
RUN_TIMEOUT = 400
REPO = Path(__file__).resolve().parents[1]


def command(*args: str, timeout: float = RUN_TIMEOUT) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "coverage_fleet.cli.main", *args],
        capture_output=True, text=True, timeout=timeout,
    )


def simulator_warnings(trial: Path) -> list[str]:
    """The simulator's warnings (participants not answering, pauses): why solves went
    missing, for a failure message."""
    log = trial / "logs" / "simulator.log"
    return [line for line in log.read_text().splitlines() if "[WARN]" in line]


def rows(path: Path) -> list[dict[str, str]]:
    with path.open(newline="") as handle:
        return list(csv.DictReader(handle))


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("recording")
    (path / "mission.yaml").write_text(MISSION)
    return path


SLOW_SPEED = 0.5  # rover_a's --vehicle override: half the built-in rover's top speed


def slow_rover_file(folder: Path) -> Path:
    """The --vehicle override: the built-in rover with a lower top speed (same sample time,
    so ROBOTS holds)."""
    path = folder / "slow_rover.yaml"
    if not path.is_file():
        text = (REPO / "config/vehicles/differential_drive.yaml").read_text()
        assert "max_speed: 1.0" in text
        path.write_text(text.replace("max_speed: 1.0", f"max_speed: {SLOW_SPEED}"))
    return path


@pytest.fixture(scope="module")
def recorded(folder: Path) -> tuple[subprocess.CompletedProcess, Path]:
    trial = folder / "ros_trial"
    result = command("launch", str(folder / "mission.yaml"), "--headless-sim", "--out", str(trial),
                     "--vehicle", f"rover_a={slow_rover_file(folder)}")
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    return result, trial


@pytest.fixture(scope="module")
def offline_trial(folder: Path) -> tuple[Path, dict]:
    mission = with_vehicle_overrides(load_mission(folder / "mission.yaml"),
                                     {"rover_a": slow_rover_file(folder)}, Collector("test"))
    return write_mission_trial(folder / "offline_trial", mission, simulate_mission(mission))


def test_the_recording_reads_back_with_the_mcap_reader_and_the_ros2_decoder(recorded) -> None:
    _, trial = recorded
    with (trial / "recording.mcap").open("rb") as handle:
        reader = mcap_reader.make_reader(
            handle, decoder_factories=[mcap_ros2_decoder.DecoderFactory()]
        )
        header = reader.get_header()
        summary = reader.get_summary()
        decoded: dict[str, list] = {}
        for _schema, channel, _message, value in reader.iter_decoded_messages():
            decoded.setdefault(channel.topic, []).append(value)
        metadata = {m.name: dict(m.metadata) for m in reader.iter_metadata()}
        attachments = {a.name: a.data for a in reader.iter_attachments()}
    assert header.profile == "ros2"
    schemas = {s.id: s for s in summary.schemas.values()}
    types = {c.topic: schemas[c.schema_id].name for c in summary.channels.values()}
    assert all(s.encoding == "ros2msg" for s in schemas.values())
    assert all(c.message_encoding == "cdr" for c in summary.channels.values())
    expected = {
        "/coverage/cells": "visualization_msgs/msg/MarkerArray",
        "/coverage/cost": "std_msgs/msg/Float64",
        "/coverage/candidates": "std_msgs/msg/Float64MultiArray",
        "/coverage/generation": "std_msgs/msg/UInt32",
        "/coverage/openings": "std_msgs/msg/Float64MultiArray",
        "/coverage/settling": "std_msgs/msg/String",
        "/diagnostics": "diagnostic_msgs/msg/DiagnosticArray",
        "/clock": "rosgraph_msgs/msg/Clock",
        "/rosout": "rcl_interfaces/msg/Log",
    }
    for robot in ROBOTS:
        expected |= {
            f"/{robot}/odom": "nav_msgs/msg/Odometry",
            f"/{robot}/coverage/target": "geometry_msgs/msg/PointStamped",
            f"/{robot}/coverage/progress": "geometry_msgs/msg/Vector3Stamped",
            f"/{robot}/coverage/plan": "nav_msgs/msg/Path",
            f"/{robot}/coverage/solve": "diagnostic_msgs/msg/DiagnosticStatus",
        }
    assert {t: types.get(t) for t in expected} == expected
    for topic in expected:
        assert decoded.get(topic), f"nothing decoded on {topic}"
    # Counts follow the rates: one state per step (lockstep may re-publish a state while it
    # waits: distinct stamps count), one solve per sample time.
    end = max(m.clock.sec + m.clock.nanosec * 1e-9 for m in decoded["/clock"])
    steps = round(end / STEP)
    for robot, sample_time in ROBOTS.items():
        stamps = {(m.header.stamp.sec, m.header.stamp.nanosec) for m in decoded[f"/{robot}/odom"]}
        # Every state, none missing: simulated odometry is recorded reliably, and the
        # simulator waits for the recorder's acknowledgement of the last ones.
        assert len(stamps) == steps + 1, (robot, len(stamps), steps, simulator_warnings(trial))
        solves = len(decoded[f"/{robot}/coverage/solve"])
        assert abs(solves - steps * STEP / sample_time) <= 3, (
            robot, solves, steps, simulator_warnings(trial)
        )
        first = decoded[f"/{robot}/odom"][0].pose.pose.position
        pose = load_mission_pose(trial, robot)
        # Recording starts before the simulator's first step: the first state recorded is
        # the initial pose itself (no noise in this mission).
        assert (first.x, first.y) == pytest.approx(pose, abs=1e-9)
    openings = decoded["/coverage/openings"]
    assert len(openings) == summary.statistics.channel_message_counts[
        next(c.id for c in summary.channels.values() if c.topic == "/coverage/openings")
    ]
    provenance = metadata["provenance"]
    for key in ("package_version", "git_commit", "python", "casadi", "numpy", "rmw",
                "ros_distro", "command_line"):
        assert provenance.get(key), key
    assert provenance["rmw"] == "rmw_fastrtps_cpp" and "launch" in provenance["command_line"]
    assert metadata["run"]["simulation"] == "lockstep"
    assert set(attachments) >= {"mission/mission.yaml", "mission_as_run.yaml",
                                *(f"vehicles/{r}.yaml" for r in ROBOTS)}
    # Written incrementally: many small chunks, none much over the 64 KiB limit (a chunk
    # closes once past it: one message may overshoot).
    chunks = summary.chunk_indexes
    assert len(chunks) >= 5
    assert max(c.uncompressed_size for c in chunks) <= CHUNK_BYTES + 64 * 1024


def test_the_recorder_subscribes_reliably_only_to_odometry_the_simulator_publishes(
    tmp_path: Path,
) -> None:
    """A reliable subscription does not match a best-effort publisher (ROS 2 documentation,
    "Quality of Service settings", 2023, section "QoS compatibilities"): the recorder asks
    for reliability only where the headless simulator publishes the odometry (a simulated
    robot in a simulated run) and stays best effort for a real robot's driver."""
    from rclpy.qos import ReliabilityPolicy

    from coverage_fleet.ros.recorder_node import graph_topics

    path = tmp_path / "mixed.yaml"
    path.write_text(MISSION.replace(
        "initial_pose: [3.5, 3.5, 0.0]}", "initial_pose: [3.5, 3.5, 0.0], simulated: false}"
    ))
    mission = load_mission(path)
    assert [e.simulated for e in mission.roster] == [True, True, False]

    def odometry_reliability(simulated_run: bool) -> dict[str, ReliabilityPolicy]:
        return {
            topic: profile.reliability
            for topic, _type, profile in graph_topics(mission, simulated_run)
            if topic.endswith("/odom")
        }

    reliable, best_effort = ReliabilityPolicy.RELIABLE, ReliabilityPolicy.BEST_EFFORT
    assert odometry_reliability(True) == {
        "rover_a/odom": reliable, "drone_b/odom": reliable, "boat_d/odom": best_effort,
    }
    assert set(odometry_reliability(False).values()) == {best_effort}


def load_mission_pose(trial: Path, robot: str) -> tuple[float, float]:
    mission = load_mission(trial / "mission.yaml")
    entry = mission.roster[mission.robot_names.index(robot)]
    return entry.initial_pose[0], entry.initial_pose[1]


def test_the_trial_built_from_the_recording_agrees_with_the_offline_run(
    recorded, offline_trial
) -> None:
    result, trial = recorded
    offline_path, offline_metrics = offline_trial
    ros_metrics = json.loads((trial / "report" / "metrics.json").read_text())
    assert set(ros_metrics) == set(offline_metrics)
    assert set(ros_metrics["solve_time"]) == set(offline_metrics["solve_time"]) == set(ROBOTS)
    assert set(ros_metrics["provenance"]) >= set(offline_metrics["provenance"])
    assert ros_metrics["provenance"]["recording"]["complete"] is True
    # Stated tolerances: the same mission, seed and start; both runs open the gate at t=0
    # from the same positions, so the first opening cost agrees to the first step noise (1e-6
    # relative); the smallest clearance is taken at the start in both (robots spread out
    # from a 2 m cluster), to 1 cm; every solve is counted at full rate on both paths, so
    # counts differ only by where the run ended (a couple of samples).
    for key in ("mission", "seed", "duration_s", "limit_violations"):
        assert ros_metrics[key] == offline_metrics[key], key
    # In the graph each controller brakes until the partition node's first keep-apart
    # snapshot reaches it (offline the first snapshot comes with the first state); those
    # brakes are counted on their own, not as solver failures, and only at the start.
    waiting = 0
    for robot in ROBOTS:
        statuses = [
            r["status"] for r in rows(trial / "robots" / f"{robot}.csv")
            if r["controller_ran"] == "1"
        ]
        flags = [s.startswith("keep-apart: no snapshot") for s in statuses]
        start = flags.index(False) if False in flags else len(flags)
        assert not any(flags[start:]), (robot, statuses)
        waiting += start
    assert ros_metrics["keep_apart_brakes"] == waiting
    assert offline_metrics["keep_apart_brakes"] == 0
    assert ros_metrics["solver_failures"] == offline_metrics["solver_failures"]
    assert ros_metrics["opening_costs"][0] == pytest.approx(
        offline_metrics["opening_costs"][0], rel=1e-6
    )
    assert ros_metrics["smallest_clearance_m"] == pytest.approx(
        offline_metrics["smallest_clearance_m"], abs=0.01
    )
    for robot in ROBOTS:
        ros, off = ros_metrics["solve_time"][robot], offline_metrics["solve_time"][robot]
        assert abs(ros["solves"] - off["solves"]) <= 3, (
            robot, ros, off, simulator_warnings(trial)
        )
    openings = rows(trial / "gate_openings.csv")
    assert min(float(r["time"]) for r in openings) >= 0.0  # nothing before the first step
    for robot in ROBOTS:
        first = rows(trial / "robots" / f"{robot}.csv")[0]
        offline_first = rows(offline_path / "robots" / f"{robot}.csv")[0]
        assert (float(first["x"]), float(first["y"])) == (
            float(offline_first["x"]), float(offline_first["y"])
        )
    # Self-contained: vehicle copies with their hashes, node logs inside, recording inside.
    for robot in ROBOTS:
        copy = trial / "vehicles" / f"{robot}.yaml"
        vehicle = ros_metrics["provenance"]["vehicles"][robot]
        assert vehicle["file"] == f"vehicles/{robot}.yaml" and copy.is_file()
        assert hashlib.sha256(copy.read_bytes()).hexdigest() == vehicle["sha256"]
    assert (trial / "logs" / "recorder.log").is_file() and (trial / "logs" / "simulator.log")
    assert not Path(f"{trial}.run").exists(), result.stdout[-2000:]


def test_report_rebuilds_the_same_trial_from_the_recording(recorded, folder: Path) -> None:
    _, trial = recorded
    rebuilt = folder / "rebuilt"
    result = command("report", str(trial / "recording.mcap"), "--out", str(rebuilt))
    assert result.returncode == 0, result.stderr
    for name in ("fleet.csv", "gate_openings.csv", "mission.yaml",
                 *(f"robots/{r}.csv" for r in ROBOTS), *(f"vehicles/{r}.yaml" for r in ROBOTS)):
        assert (rebuilt / name).read_bytes() == (trial / name).read_bytes(), name
    assert json.loads((rebuilt / "report" / "metrics.json").read_text()) == json.loads(
        (trial / "report" / "metrics.json").read_text()
    )


def test_report_recovers_a_recording_cut_short(recorded, folder: Path) -> None:
    _, trial = recorded
    data = (trial / "recording.mcap").read_bytes()
    cut = folder / "cut.mcap"
    cut.write_bytes(data[: int(len(data) * 0.6)])
    out = folder / "from_cut"
    result = command("report", str(cut), "--out", str(out))
    assert result.returncode == 0, result.stderr
    assert "ends early" in result.stderr
    metrics = json.loads((out / "report" / "metrics.json").read_text())
    assert metrics["provenance"]["recording"]["complete"] is False
    # What was recovered is the start of the full run, row for row (the last row may lack
    # what came after the cut).
    for robot in ROBOTS:
        full = rows(trial / "robots" / f"{robot}.csv")
        part = rows(out / "robots" / f"{robot}.csv")
        assert 10 < len(part) < len(full)
        assert part[:-1] == full[: len(part) - 1]


def test_a_recorder_killed_mid_run_leaves_its_complete_chunks(folder: Path) -> None:
    """The recorder process alone, fed by this test over DDS: numbered cost messages; after
    a SIGKILL, what reads back is exactly the first messages sent, without a gap."""
    output = folder / "killed.mcap"
    recorder = subprocess.Popen(
        [sys.executable, "-m", "coverage_fleet.ros.recorder_node", "--ros-args",
         "-p", f"mission_file:={folder / 'mission.yaml'}", "-p", f"output:={output}"],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    rclpy.init()
    node = rclpy.create_node("recording_feeder")
    # Reliable with a deep history: the publisher drops nothing while the recorder catches
    # up, so any gap would be the recorder's.
    publisher = node.create_publisher(Float64, "/coverage/cost", QoSProfile(depth=10000))
    sent = 0
    try:
        deadline = time.monotonic() + 120
        while publisher.get_subscription_count() == 0:
            assert time.monotonic() < deadline and recorder.poll() is None, "no recorder"
            rclpy.spin_once(node, timeout_sec=0.1)
        # Warm-up messages (-1) until the recorder has written some: from then on both
        # sides have surely matched (a reliable reader may miss what was sent while its
        # side of the discovery was still under way).
        while not read_recording(output).messages:
            assert time.monotonic() < deadline, "the recorder never wrote a message"
            publisher.publish(Float64(data=-1.0))
            rclpy.spin_once(node, timeout_sec=0.1)
        # Enough numbered messages for several chunks, one at a time at about the whole
        # graph's rate (100 per second), then more until a flush has certainly happened.
        # (Faster, a recorder starved of CPU on a loaded machine overruns its queue of
        # RECORD_DEPTH messages and drops the oldest: see the README's recording section.)
        while sent < 1200 or len(read_recording(output).messages) < 1000:
            assert time.monotonic() < deadline, "the recorder never flushed"
            for _ in range(50):
                publisher.publish(Float64(data=float(sent)))
                sent += 1
                time.sleep(0.01)
        os.kill(recorder.pid, signal.SIGKILL)
        recorder.wait(timeout=30)
    finally:
        if recorder.poll() is None:
            recorder.kill()
        node.destroy_node()
        rclpy.shutdown()
    recording = read_recording(output)
    assert not recording.complete and "ends early" in recording.problem
    values = [m.data for m in recording.messages if m.topic == "/coverage/cost"]
    from rclpy.serialization import deserialize_message

    numbers = [deserialize_message(v, Float64).data for v in values]
    numbers = numbers[numbers.index(0.0):]
    assert len(numbers) >= 1000
    # In order, and the start of what was sent: everything up to the last message read
    # back is there but for what the middleware itself dropped on this loaded machine
    # (seen: one message in a thousand; stated tolerance 1 %).
    assert numbers == sorted(set(numbers))
    assert len(numbers) >= 0.99 * (numbers[-1] + 1)
    assert {"mission_as_run.yaml", "vehicles/rover_a.yaml"} <= set(recording.attachments)
    assert recording.metadata["provenance"]["package"] == "coverage_fleet"
    # The file's structure is sound up to the cut for the mcap package's own stream reader.
    from mcap.records import Message
    from mcap.stream_reader import StreamReader

    read = 0
    with output.open("rb") as handle, pytest.raises(Exception):  # noqa: B017 - any kind
        for record in StreamReader(handle).records:
            read += isinstance(record, Message)
    assert read == len(recording.messages)


def test_report_refuses_what_holds_no_trial(recorded, folder: Path) -> None:
    _, trial = recorded
    head = folder / "head.mcap"
    head.write_bytes((trial / "recording.mcap").read_bytes()[:3000])  # before any message
    for source, expected in ((head, "attachments: no mission_as_run.yaml attachment"),
                             (folder / "mission.yaml", "is neither an MCAP recording")):
        result = command("report", str(source), "--out", str(folder / "never"))
        assert result.returncode == 2, result.stderr
        assert f"{source}: " in result.stderr and expected in result.stderr, result.stderr
        assert "Traceback" not in result.stderr and not (folder / "never").exists()


def test_relaunching_the_mission_as_run_reproduces_the_overridden_run(recorded, folder) -> None:
    """The trial's mission as run, launched again without --vehicle, runs the overridden
    vehicle and reproduces the first lockstep run within the tolerances below.

    Why not bit for bit: every node acts on every simulated step (the base station is part
    of the lockstep barrier, fleet/lockstep.py), but whether a robot's progress report for
    a step reaches the gate before or after the candidates of that step depends on DDS
    delivery order, and can move an opening by a step."""
    _, first = recorded
    second = folder / "relaunched"
    result = command("launch", str(first / "mission.yaml"), "--headless-sim", "--out", str(second))
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    a = json.loads((first / "report" / "metrics.json").read_text())
    b = json.loads((second / "report" / "metrics.json").read_text())
    slow = hashlib.sha256(slow_rover_file(folder).read_bytes()).hexdigest()
    assert a["provenance"]["vehicles"]["rover_a"]["sha256"] == slow
    assert b["provenance"]["vehicles"]["rover_a"]["sha256"] == slow
    assert (second / "vehicles" / "rover_a.yaml").read_bytes() == slow_rover_file(
        folder).read_bytes()
    # The override acted in the second run too: no step of rover_a beyond the slow limit (a
    # chord is no longer than its arc; 1 cm for the measurement noise of two positions).
    track = rows(second / "robots" / "rover_a.csv")
    for before, after in itertools.pairwise(track):
        step = math.hypot(float(after["x"]) - float(before["x"]),
                          float(after["y"]) - float(before["y"]))
        assert step <= SLOW_SPEED * (float(after["time"]) - float(before["time"])) + 0.01
    final = {}
    for trial in (first, second):
        final[trial] = {r: rows(trial / "robots" / f"{r}.csv")[-1] for r in ROBOTS}
    gaps = {r: math.hypot(float(final[first][r]["x"]) - float(final[second][r]["x"]),
                          float(final[first][r]["y"]) - float(final[second][r]["y"]))
            for r in ROBOTS}
    print("relaunch figures:", a["outcome"], b["outcome"], a["generations"], b["generations"],
          a["final_cost"], b["final_cost"], gaps)
    for key in ("mission", "seed", "duration_s", "outcome"):
        assert a[key] == b[key], key
    # Tolerances: an opening moved by a step moves the run's end by the distance driven in
    # that step and may add or drop a generation. Measured on a loaded 2-core machine
    # (2026-12-03, three runs, base station in the barrier): 59/59, 59/59 and 60/59
    # generations, final cost 3e-5, 4e-6 and 2e-4 apart (relative), final positions at most
    # 2 mm, 0.4 mm and 12 mm apart; with keep-apart snapshots in the graph (two runs):
    # 58/59 and 58/59, 2.5e-4 and 2.7e-3, 16 mm and 0.15 m (a controller may answer a step
    # before or after that step's snapshot arrives). (With the base station outside the
    # barrier it was 53/54, 51/52 and 51/45 generations, 0.25 % and 0.04-0.15 m.) On the CI
    # machine (2026-12-03): 58/62 generations, final cost 2e-5 apart, positions 1.7 mm: the
    # late generations, each moving the targets by millimetres, come and go with the order
    # of delivery while the end state does not. The bounds allow a tenth of the generations
    # (at least three), 1 % and 0.3 m.
    assert abs(a["generations"] - b["generations"]) <= max(3, 0.1 * a["generations"])
    assert b["final_cost"] == pytest.approx(a["final_cost"], rel=0.01)
    assert max(gaps.values()) <= 0.3, gaps
