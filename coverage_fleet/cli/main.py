"""The `coverage-fleet` command: one sub-command per module listed in COMMAND_MODULES.

Each command module exposes `register(subparsers)`, which adds its parser and sets
`handler=<function(args) -> int>`. Bad input (ConfigError) is printed as a list of problems
with exit status 2, never as a traceback.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from coverage_fleet import __version__
from coverage_fleet.errors import ConfigError

COMMAND_MODULES = [
    "coverage_fleet.cli.demo_command",
    "coverage_fleet.cli.vehicle_command",
    "coverage_fleet.cli.terminal_command",
    "coverage_fleet.cli.simulate_command",
    "coverage_fleet.cli.batch_command",
    "coverage_fleet.cli.sizing_command",
    "coverage_fleet.cli.launch_command",
    "coverage_fleet.cli.fleet_command",
    "coverage_fleet.cli.watch_command",
    "coverage_fleet.cli.rviz_command",
    "coverage_fleet.cli.report_command",
    "coverage_fleet.cli.compare_command",
]

EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 130


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="coverage-fleet",
        description="Plan, simulate, launch and report density-weighted fleet coverage.",
    )
    parser.add_argument("--version", action="version", version=f"%(prog)s {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        importlib.import_module(name).register(subparsers)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "handler", None):
        parser.print_help()
        return EXIT_BAD_INPUT
    try:
        return int(args.handler(args) or 0)
    except ConfigError as error:
        print(f"coverage-fleet {args.command}: bad input:", file=sys.stderr)
        for problem in error.problems:
            print(f"  {problem}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print(f"coverage-fleet {args.command}: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED


if __name__ == "__main__":
    sys.exit(main())
