"""`coverage-fleet vehicle FILE...`: check vehicle files and print what the controller uses."""

from __future__ import annotations

import argparse

from coverage_fleet.vehicles.describe import main as describe_main


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "vehicle",
        help="check vehicle parameter files and print their model, limits and MPC settings",
    )
    parser.add_argument("files", nargs="+", metavar="VEHICLE_FILE")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    return describe_main(list(args.files))
