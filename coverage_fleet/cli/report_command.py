"""`coverage-fleet report RECORDING_OR_TRIAL`: (re)build a trial directory and its report.

- A recording (an MCAP file written by `coverage-fleet launch`): the trial is built from it
  by the same trial writer as every other trial; a recording cut short (recorder killed)
  is recovered up to its last complete chunk, with a warning.
- A trial directory holding its recording (a run of the ROS graph): rebuilt from that
  recording into a new trial directory.
- A trial directory without one (an offline simulation): its report is rebuilt from its
  CSV logs and mission as run into `--out` (a report folder).
"""

from __future__ import annotations

import argparse
import sys
from datetime import UTC, datetime
from pathlib import Path

from coverage_fleet.errors import ConfigError

MCAP_MAGIC = b"\x89MCAP0\r\n"
RECORDING_IN_TRIAL = "recording.mcap"


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "report",
        help="build a trial directory and report from a recording, or rebuild a trial's report",
        description="Build a trial directory (CSV logs, mission as run, vehicle files, report) "
        "from a recording of the ROS graph (MCAP), also one cut short; or rebuild the report "
        "of a trial directory.",
    )
    parser.add_argument(
        "source", type=Path, metavar="RECORDING_OR_TRIAL",
        help="an MCAP recording or a trial directory",
    )
    parser.add_argument(
        "--out", type=Path,
        help="directory to create (default: next to the source, named after it and the time)",
    )
    parser.set_defaults(handler=run)


def is_recording(path: Path) -> bool:
    with path.open("rb") as handle:
        return handle.read(len(MCAP_MAGIC)) == MCAP_MAGIC


def _default_out(source: Path, suffix: str) -> Path:
    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    return source.parent / f"{source.stem}-{suffix}-{stamp}"


def _check_free(out: Path) -> None:
    if out.exists():
        raise ConfigError.single(str(out), "--out", "already exists; a trial is never overwritten")


def run(args: argparse.Namespace) -> int:
    source: Path = args.source
    if not source.exists():
        raise ConfigError.single(str(source), "RECORDING_OR_TRIAL", "no such file or directory")
    if source.is_dir():
        recording = source / RECORDING_IN_TRIAL
        if recording.is_file():
            return _from_recording(recording, args.out or _default_out(source, "rebuilt"))
        return _from_trial_logs(source, args.out or _default_out(source, "report"))
    if not is_recording(source):
        raise ConfigError.single(
            str(source), "RECORDING_OR_TRIAL",
            "is neither an MCAP recording nor a trial directory",
        )
    return _from_recording(source, args.out or _default_out(source, "trial"))


def _from_recording(recording: Path, out: Path) -> int:
    from coverage_fleet.cli.simulate_command import summary_lines
    from coverage_fleet.ros.trial_from_recording import trial_from_recording

    _check_free(out)
    path, metrics, read = trial_from_recording(recording, out)
    if not read.complete:
        print(f"report: warning: {recording}: {read.problem}", file=sys.stderr)
    for line in summary_lines(metrics):
        print(line)
    print(f"trial written to {path} (report in {path / 'report'})")
    return 0


def _from_trial_logs(trial: Path, out: Path) -> int:
    from coverage_fleet.cli.simulate_command import summary_lines
    from coverage_fleet.report.trial import rebuild_report

    _check_free(out)
    metrics = rebuild_report(trial, out)
    for line in summary_lines(metrics):
        print(line)
    print(f"report written to {out}")
    return 0
