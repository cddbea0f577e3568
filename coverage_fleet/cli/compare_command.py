"""`coverage-fleet compare A B`: two trials' metrics side by side with their differences,
what differs in their provenance, and their cost against time overlaid (a PNG)."""

from __future__ import annotations

import argparse
from pathlib import Path

from coverage_fleet.errors import ConfigError


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "compare",
        help="compare two trials: metrics side by side, differences, cost against time",
        description="Compare two trial directories (offline or ROS): every metric of both "
        "with the difference B - A, the provenance items that differ, and a PNG of both "
        "cost curves against time.",
    )
    parser.add_argument("first", type=Path, metavar="A", help="trial directory")
    parser.add_argument("second", type=Path, metavar="B", help="trial directory")
    parser.add_argument(
        "--plot", type=Path,
        help="PNG of both cost curves to write (default: compare-<A>-vs-<B>.png next to A)",
    )
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    from coverage_fleet.report.compare import comparison_lines, load_trial, plot_cost_overlay

    first, second = load_trial(args.first), load_trial(args.second)
    plot = args.plot or first.path.parent / f"compare-{first.label}-vs-{second.label}.png"
    if plot.exists():
        raise ConfigError.single(str(plot), "--plot", "already exists; choose another file")
    if not plot.parent.is_dir():
        raise ConfigError.single(str(plot), "--plot", "its folder does not exist")
    for line in comparison_lines(first, second):
        print(line)
    plot_cost_overlay(plot, first, second)
    print(f"cost against time of both: {plot}")
    return 0
