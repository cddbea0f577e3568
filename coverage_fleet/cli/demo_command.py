"""`coverage-fleet demo`: the main job end to end on an invented demo mission."""

from __future__ import annotations

import argparse


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser("demo", help="run the most complete demo on a demo mission")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    print("coverage-fleet demo: the demo lands with the fleet simulation (issue 4/5).")
    return 1
