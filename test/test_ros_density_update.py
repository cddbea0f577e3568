"""A geodetic mission through the ROS graph, with a density raster published mid-run.

The invented pasture mission (region as GeoJSON in WGS 84, raster placed by longitude/
latitude) runs with `coverage-fleet launch --headless-sim --density-updates`: real node
processes over DDS on loopback. Once the fleet is a few generations in, the test publishes
a nav_msgs/OccupancyGrid on /coverage/density that makes the south-west corner matter most.

Outside references: a centroidal Voronoi configuration is a fixed point of Lloyd's
iteration (Lloyd, IEEE Trans. Inf. Theory 28(2), 1982; Du, Faber & Gunzburger, SIAM Review
41(4), 1999, sections 1 and 5.2), so Lloyd's iteration (fleet/lloyd.py) on the new density,
started at the settled positions, must barely move them; the occupancy layout (row-major,
row 0 at the origin, 0..100) is the one nav_msgs/OccupancyGrid documents.
"""

from __future__ import annotations

import csv
import signal
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pytest
import yaml

rclpy = pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from nav_msgs.msg import OccupancyGrid  # noqa: E402
from std_msgs.msg import UInt32  # noqa: E402

from coverage_fleet.fleet.density_updates import occupancy_density  # noqa: E402
from coverage_fleet.fleet.lloyd import lloyd  # noqa: E402
from coverage_fleet.fleet.mission import load_mission  # noqa: E402
from coverage_fleet.ros import qos, topics  # noqa: E402
from coverage_fleet.ros.conversions import (  # noqa: E402
    OccupancyValues,
    occupancy_to_msg,
    seconds_to_stamp,
)

REPO = Path(__file__).resolve().parents[1]
PASTURE = REPO / "config" / "missions" / "hillside_pasture_survey.yaml"
RUN_TIMEOUT = 400
#: A grid over the pasture (map frame, 1 m cells, row 0 at the origin = south): the
#: south-west corner matters most (100), the rest a little (5).
ORIGIN = (-9.0, -7.0)
CELLS = np.full((14, 18), 5, dtype=np.int8)
CELLS[:5, :6] = 100


def test_density_update_through_the_graph_settles_at_the_new_cvt(tmp_path: Path) -> None:
    trial = tmp_path / "trial"
    rclpy.init()
    node = rclpy.create_node("density_test_publisher")
    publisher = node.create_publisher(OccupancyGrid, topics.DENSITY, qos.LATCHED)
    generation = [-1]
    node.create_subscription(
        UInt32, topics.GENERATION, lambda m: generation.__setitem__(0, m.data), qos.LATCHED
    )
    published = threading.Event()
    done = threading.Event()

    def watch() -> None:
        while not done.is_set():
            rclpy.spin_once(node, timeout_sec=0.05)
            if generation[0] >= 3 and not published.is_set():
                publisher.publish(occupancy_to_msg(
                    OccupancyValues("map", CELLS, ORIGIN, 0.0, 1.0), seconds_to_stamp(0.0)))
                published.set()

    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    process = subprocess.Popen(
        [sys.executable, "-m", "coverage_fleet.cli.main", "launch", str(PASTURE),
         "--headless-sim", "--density-updates", "--out", str(trial)],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )
    try:
        output, _ = process.communicate(timeout=RUN_TIMEOUT)
    finally:
        if process.poll() is None:
            process.send_signal(signal.SIGINT)
            process.wait(timeout=60)
        done.set()
        watcher.join(timeout=10)
        node.destroy_node()
        rclpy.shutdown()
    logs = {p.name: p.read_text() for p in (trial / "logs").glob("*.log")}
    tails = "\n".join(f"--- {name}\n{text[-1500:]}" for name, text in logs.items())
    assert published.is_set(), output[-3000:]
    assert process.returncode == 0, output[-3000:] + tails

    with (trial / "gate_openings.csv").open(newline="") as handle:
        reasons = {row["generation"]: row["reason"] for row in csv.DictReader(handle)}
    assert list(reasons.values()).count("density") == 1, reasons
    assert any("density update 1 from /coverage/density" in text for text in logs.values())

    as_run = yaml.safe_load((trial / "mission.yaml").read_text())
    assert as_run["region"]["origin"] == [11.0001, 46.00005]  # the stated default rule

    mission = load_mission(PASTURE)
    final = []
    for name in mission.robot_names:
        with (trial / "robots" / f"{name}.csv").open(newline="") as handle:
            last = list(csv.DictReader(handle))[-1]
        final.append([float(last["x"]), float(last["y"])])
    final = np.array(final)
    new_density = occupancy_density(CELLS, ORIGIN, 1.0, mission.region)
    reference = lloyd(final, mission.region, new_density, max_iterations=200, tolerance=1e-6)
    assert reference.converged
    # Within a few settle distances of Lloyd's fixed point (slow convergence along flat
    # directions, Du, Faber & Gunzburger 1999, section 5.2) ...
    assert np.abs(reference.positions[-1] - final).max() < 3 * mission.settle.distance
    # ... and far from a configuration of the mission's own density.
    old = lloyd(final, mission.region, mission.density, max_iterations=200, tolerance=1e-6)
    assert np.abs(old.positions[-1] - final).max() > 1.0
