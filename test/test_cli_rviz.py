"""The RViz 2 configuration: the installed one is current for the demo mission, and a
mission's configuration shows what the graph publishes.

Outside references: the fixed frame is `map`, where every position of the graph lives
(REP 105, "Coordinate Frames for Mobile Platforms"); the display classes are those of
rviz_default_plugins (its API documentation lists GridDisplay, MarkerArrayDisplay,
PathDisplay and OdometryDisplay, registered as rviz_default_plugins/<Name>); the topics
and their durability are checked against the graph's own contract (topics.py, qos.py) and
the marker namespaces against the markers the partition node really sends.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml

pytest.importorskip("rclpy", reason="ROS 2 wheels not installed (scripts/setup_env.sh)")

from rclpy.qos import DurabilityPolicy

from coverage_fleet.cli.main import main
from coverage_fleet.cli.rviz_command import DEMO_CONFIG, rviz_text
from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.ros import conversions as cv
from coverage_fleet.ros import qos, topics

REPO = Path(__file__).resolve().parents[1]
DEMO_MISSION = REPO / "config" / "missions" / "orchard_frost_watch.yaml"
RVIZ_DISPLAYS = {
    "rviz_default_plugins/Grid", "rviz_default_plugins/MarkerArray",
    "rviz_default_plugins/Path", "rviz_default_plugins/Odometry",
}


def test_the_installed_configuration_is_current_for_the_demo_mission() -> None:
    assert (REPO / DEMO_CONFIG).read_text() == rviz_text(load_mission(DEMO_MISSION)), (
        "regenerate: coverage-fleet rviz config/missions/orchard_frost_watch.yaml "
        f"--out {DEMO_CONFIG}"
    )


def test_a_missions_configuration_shows_cells_plans_and_odometry(tmp_path: Path) -> None:
    out = tmp_path / "view" / "demo.rviz"
    assert main(["rviz", str(DEMO_MISSION), "--out", str(out)]) == 0
    config = yaml.safe_load(out.read_text())
    manager = config["Visualization Manager"]
    assert manager["Global Options"]["Fixed Frame"] == "map"
    displays = manager["Displays"]
    assert {d["Class"] for d in displays} == RVIZ_DISPLAYS
    by_topic = {d["Topic"]["Value"]: d for d in displays if "Topic" in d}
    robots = load_mission(DEMO_MISSION).robot_names
    for robot in robots:
        # The graph's names are relative; the configuration names them from the root.
        assert by_topic["/" + topics.robot_topic(robot, topics.PLAN)]["Class"].endswith("/Path")
        assert by_topic["/" + topics.robot_topic(robot, topics.ODOM)]["Class"].endswith(
            "/Odometry")
    cells = by_topic["/" + topics.CELLS]
    latched = qos.LATCHED.durability == DurabilityPolicy.TRANSIENT_LOCAL
    assert latched and cells["Topic"]["Durability Policy"] == "Transient Local"
    # The namespaces shown are exactly those the partition node's markers use.
    markers = cv.partition_markers(
        cv.seconds_to_stamp(0.0), {0: "rover_1"},
        {0: np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]])},
        {0: np.array([0.3, 0.3])}, {0: np.array([0.4, 0.4])},
    ).markers
    assert set(cells["Namespaces"]) == {m.ns for m in markers[1:]}


def test_an_existing_file_is_never_overwritten(tmp_path: Path, capsys) -> None:
    out = tmp_path / "taken.rviz"
    out.write_text("mine")
    assert main(["rviz", str(DEMO_MISSION), "--out", str(out)]) == 2
    assert "--out" in capsys.readouterr().err and out.read_text() == "mine"
