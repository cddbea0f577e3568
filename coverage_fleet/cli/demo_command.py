"""`coverage-fleet demo`: the main job end to end on the invented orchard demo mission: the
ROS 2 graph (base station, one controller process per robot, headless simulator in lockstep
mode) recorded into a trial directory with its report. `--offline` runs the same mission
through the offline closed-loop simulation instead."""

from __future__ import annotations

import argparse
from pathlib import Path

from coverage_fleet.cli.simulate_command import (
    SAFETY_NOTE,
    ProgressBar,
    default_trial_directory,
    simulate_to_trial,
    summary_lines,
)
from coverage_fleet.errors import ConfigError
from coverage_fleet.fleet.mission import load_mission, package_config_dir
from coverage_fleet.inputs.outputs import check_output_location

DEMO_MISSION = "orchard_frost_watch.yaml"


def demo_mission_path() -> Path:
    config = package_config_dir()
    if config is None or not (config / "missions" / DEMO_MISSION).is_file():
        raise ConfigError.single(
            DEMO_MISSION,
            "",
            "demo mission not found in the package's config/missions (is the package installed?)",
        )
    return config / "missions" / DEMO_MISSION


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser("demo", help="run the most complete demo on a demo mission")
    parser.add_argument(
        "--out",
        type=Path,
        help="trial directory to create (default: trials/<mission>-seed<N>-<UTC time>)",
    )
    parser.add_argument(
        "--offline", action="store_true",
        help="simulate offline in this process instead of running the ROS 2 graph",
    )
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    path = demo_mission_path()
    mission = load_mission(path)
    how = "simulated offline" if args.offline else "run as a ROS 2 graph (lockstep simulation)"
    print(f"demo: invented mission {mission.name} ({len(mission.roster)} robots), {how}")
    print(f"demo: mission file {path}")
    out = args.out or default_trial_directory(mission, mission.simulation.seed)
    check_output_location(out, "--out")
    if args.offline:
        progress = ProgressBar("demo")
        trial, _, metrics = simulate_to_trial(mission, out, progress=progress)
        progress.finish("done")
        for line in summary_lines(metrics):
            print(line)
        print(SAFETY_NOTE)
        status = 0
    else:
        # The launcher prints the safety caution, what it started and the summary.
        from coverage_fleet.cli.launch_command import run_graph

        result = run_graph(mission, "lockstep", out=out)
        trial, status = result.trial, result.status
    print(f"trial written to {trial}")
    print(f"report: {trial / 'report'} (metrics.json and PNG figures)")
    return status
