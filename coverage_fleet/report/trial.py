"""The one trial writer: a mission's trial log -> its trial directory (CSV logs, mission as
run, report with metrics and figures). The offline simulation and the ROS recorder both end
here, so their trial directories have the same files, columns and metrics keys."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from coverage_fleet.fleet.density_updates import density_in_force
from coverage_fleet.fleet.mission import Mission, mission_as_run
from coverage_fleet.fleet.trial import TrialLog, write_trial


def write_mission_trial(
    directory: str | Path, mission: Mission, log: TrialLog
) -> tuple[Path, dict[str, Any]]:
    """Write the trial directory of `log` (a run of `mission`); returns (path, metrics)."""
    from coverage_fleet.report import write_report

    metrics: dict[str, Any] = {}
    # The final cells, the CVT gap and the density drawn are judged with the density in
    # force at the end (a scripted update may have replaced the mission's).
    end = log.time[-1] if log.time else 0.0
    density = density_in_force(mission.density, mission.density_updates, end)

    def report(folder: Path) -> None:
        metrics.update(
            write_report(
                folder,
                log,
                mission.region,
                density,
                mission.settle.distance,
                footprints={e.name: e.footprint_radius for e in mission.roster},
                map_origin=None if mission.frame is None else mission.frame.describe(),
            )
        )

    as_run = mission_as_run(mission, seed=log.seed, duration=log.duration)
    return write_trial(directory, as_run, log, report=report), metrics
