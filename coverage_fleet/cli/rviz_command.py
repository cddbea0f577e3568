"""`coverage-fleet rviz MISSION`: an RViz 2 configuration for a mission's graph.

RViz needs the topic of every display, and robot topics carry the robot's name, so the
configuration is made per mission: the map frame as fixed frame, a grid, the partition
markers on /coverage/cells (namespaces cells, centroids, targets, labels; reliable and
transient-local as published, so RViz gets the latest at once), and per robot its predicted
plan (nav_msgs/Path) and its odometry (nav_msgs/Odometry, newest pose as an arrow), in the
robot's marker colour; a top-down view centred on the region.

The package installs the configuration of the demo mission (rviz/coverage_fleet_demo.rviz,
made by this module: test_cli_rviz.py checks it is current). The file layout is the one
RViz 2 reads and writes (YAML: Panels, Visualization Manager with Displays, Global Options,
Tools and Views, Window Geometry) with the display classes of rviz_default_plugins; keys
written from memory of that format, checked by loading the YAML and by the classes' names.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import TYPE_CHECKING, Any

import yaml

if TYPE_CHECKING:
    from coverage_fleet.fleet.mission import Mission

#: Where the package keeps the demo mission's configuration (installed under share/).
DEMO_CONFIG = Path("rviz") / "coverage_fleet_demo.rviz"


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "rviz",
        help="write an RViz 2 configuration for a mission (cells, targets, plans, odometry)",
        description=__doc__.split("\n\n")[1],
    )
    parser.add_argument("mission", type=Path, help="mission file (YAML)")
    parser.add_argument(
        "--out", type=Path, help="configuration file to write (default: <mission name>.rviz)"
    )
    parser.set_defaults(handler=run)


def _rgb(index: int) -> str:
    from coverage_fleet.ros.conversions import MARKER_PALETTE

    r, g, b = MARKER_PALETTE[index % len(MARKER_PALETTE)]
    return f"{round(255 * r)}; {round(255 * g)}; {round(255 * b)}"


def _topic(name: str, depth: int, latched: bool = False) -> dict[str, Any]:
    """A display's topic with the QoS the graph publishes it with (coverage_fleet.ros.qos)."""
    return {
        # Absolute: the graph's names are relative (ros/topics.py); this configuration is
        # for a fleet without a fleet namespace.
        "Value": name if name.startswith("/") else f"/{name}",
        "Depth": depth,
        "History Policy": "Keep Last",
        "Reliability Policy": "Reliable",
        "Durability Policy": "Transient Local" if latched else "Volatile",
    }


def rviz_config(mission: Mission) -> dict[str, Any]:
    """The configuration as a YAML-ready mapping."""
    from coverage_fleet.ros import topics

    x0, y0, x1, y1 = mission.region.bounds
    displays: list[dict[str, Any]] = [
        {
            "Class": "rviz_default_plugins/Grid", "Name": "ground grid (1 m)",
            "Enabled": True, "Value": True, "Reference Frame": "<Fixed Frame>",
            "Plane": "XY", "Cell Size": 1, "Plane Cell Count": int(max(x1 - x0, y1 - y0)) + 10,
            "Offset": {"X": round((x0 + x1) / 2, 3), "Y": round((y0 + y1) / 2, 3), "Z": 0},
            "Color": "160; 160; 164", "Alpha": 0.35,
        },
        {
            "Class": "rviz_default_plugins/MarkerArray", "Name": "coverage cells",
            "Enabled": True, "Value": True,
            "Namespaces": {"cells": True, "centroids": True, "targets": True, "labels": True},
            "Topic": _topic(topics.CELLS, 1, latched=True),
        },
    ]
    for index, name in enumerate(mission.robot_names):
        colour = _rgb(index)
        displays.append({
            "Class": "rviz_default_plugins/Path", "Name": f"{name} plan",
            "Enabled": True, "Value": True, "Color": colour, "Alpha": 1, "Line Style": "Lines",
            "Topic": _topic(topics.robot_topic(name, topics.PLAN), 1),
        })
        displays.append({
            "Class": "rviz_default_plugins/Odometry", "Name": f"{name} odometry",
            "Enabled": True, "Value": True, "Keep": 1, "Position Tolerance": 0.1,
            "Angle Tolerance": 0.1,
            "Shape": {
                "Value": "Arrow", "Color": colour, "Alpha": 1, "Shaft Length": 0.6,
                "Shaft Radius": 0.06, "Head Length": 0.25, "Head Radius": 0.12,
            },
            "Covariance": {"Value": False},
            "Topic": _topic(topics.robot_topic(name, topics.ODOM), 1),
        })
    span = max(x1 - x0, y1 - y0, 1.0)
    return {
        "Panels": [
            {"Class": "rviz_common/Displays", "Name": "Displays"},
            {"Class": "rviz_common/Views", "Name": "Views"},
        ],
        "Visualization Manager": {
            "Class": "",
            "Displays": displays,
            "Enabled": True,
            "Global Options": {
                "Fixed Frame": topics.MAP_FRAME, "Background Color": "250; 250; 247",
                "Frame Rate": 30,
            },
            "Name": "root",
            "Tools": [
                {"Class": "rviz_default_plugins/MoveCamera"},
                {"Class": "rviz_default_plugins/Select"},
                {"Class": "rviz_default_plugins/Measure"},
            ],
            "Value": True,
            "Views": {
                "Current": {
                    "Class": "rviz_default_plugins/TopDownOrtho",
                    "Name": "Current View",
                    "X": round((x0 + x1) / 2, 3),
                    "Y": round((y0 + y1) / 2, 3),
                    "Angle": 0,
                    # Pixels per metre: the region fills about 700 pixels.
                    "Scale": round(700.0 / span, 3),
                    "Target Frame": "<Fixed Frame>",
                },
                "Saved": None,
            },
        },
        "Window Geometry": {"Width": 1100, "Height": 800},
    }


def rviz_text(mission: Mission) -> str:
    header = (
        f"# RViz 2 configuration for mission {mission.name!r}: written by "
        "`coverage-fleet rviz`;\n# open with `rviz2 -d <this file>`. Fixed frame: map.\n"
    )
    return header + yaml.safe_dump(rviz_config(mission), sort_keys=False, width=100)


def run(args: argparse.Namespace) -> int:
    from coverage_fleet.fleet.mission import load_mission
    from coverage_fleet.inputs.outputs import check_output_location

    mission = load_mission(args.mission)
    out = args.out or Path(f"{mission.name}.rviz")
    check_output_location(out, "--out")
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(rviz_text(mission))
    print(f"rviz: configuration for {mission.name!r} ({len(mission.roster)} robots) in {out}")
    print(f"rviz: open it with `rviz2 -d {out}` on a machine in the graph's ROS_DOMAIN_ID")
    return 0
