"""`coverage-fleet demo`: the main job end to end on the invented orchard demo mission
(offline closed-loop simulation, trial directory, report)."""

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
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    path = demo_mission_path()
    mission = load_mission(path)
    print(
        f"demo: invented mission {mission.name} ({len(mission.roster)} robots), "
        f"simulated offline from {path}"
    )
    out = args.out or default_trial_directory(mission, mission.simulation.seed)
    progress = ProgressBar("demo")
    trial, _, metrics = simulate_to_trial(mission, out, progress=progress)
    progress.finish("done")
    for line in summary_lines(metrics):
        print(line)
    print(SAFETY_NOTE)
    print(f"trial written to {trial}")
    print(f"report: {trial / 'report'} (metrics.json and PNG figures)")
    return 0
