"""The one trial writer: a mission's trial log -> its trial directory (CSV logs, mission as
run, vehicle files, report with metrics and figures). The offline simulation and a
recording of the ROS graph both end here, so their trial directories have the same files,
columns and metrics keys.

Self-contained: every robot's vehicle file is copied into `vehicles/<robot>.yaml` and the
mission as run names those copies (a `--vehicle` override is therefore what the mission as
run holds), so `coverage-fleet simulate <trial>/mission.yaml` reruns the trial anywhere;
metrics.json carries the provenance (package, commit, library versions, command line, the
vehicle files' sha256). The mission's data files (rasters, GeoJSON regions) are copied into
`data/` the same way, with their sha256."""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from coverage_fleet.fleet.density_updates import density_in_force
from coverage_fleet.fleet.mission import Mission, bundle_data_files, mission_as_run
from coverage_fleet.fleet.trial import TrialLog, write_trial
from coverage_fleet.provenance import provenance as current_provenance

VEHICLES_FOLDER = "vehicles"


def vehicle_copy_name(robot: str) -> str:
    return f"{VEHICLES_FOLDER}/{robot}.yaml"


def write_mission_trial(
    directory: str | Path,
    mission: Mission,
    log: TrialLog,
    provenance: Mapping[str, Any] | None = None,
    files: Mapping[str, bytes | Path] | None = None,
    move_files: bool = False,
) -> tuple[Path, dict[str, Any]]:
    """Write the trial directory of `log` (a run of `mission`); returns (path, metrics).
    `provenance` defaults to this process's (offline runs); `files` are placed in the trial
    as fleet.trial.write_trial does."""
    from coverage_fleet.report import write_report

    found = dict(current_provenance() if provenance is None else provenance)
    #: Where each vehicle file came from (a recording knows; offline: the file loaded).
    sources = found.pop("vehicle_sources", {})
    as_run = mission_as_run(mission, seed=log.seed, duration=log.duration)
    contents: dict[str, bytes | Path] = {}
    vehicles: dict[str, dict[str, Any]] = {}
    for item, entry in zip(as_run["roster"], mission.roster, strict=True):
        data = entry.vehicle_path.read_bytes()
        name = vehicle_copy_name(entry.name)
        item["vehicle"] = name
        contents[name] = data
        digest = hashlib.sha256(data).hexdigest()
        vehicles[entry.name] = {
            "file": name,
            "source": sources.get(entry.name, str(entry.vehicle_path)),
            "sha256": digest,
            # The file on disk was edited after the run loaded it: the copy is not what ran.
            "changed_since_loaded": digest != entry.vehicle.content_hash,
        }
    found["vehicles"] = vehicles
    # Raster and GeoJSON files too: the trial reruns from its own folder alone.
    data_sources = found.pop("data_sources", {})
    data_files: dict[str, dict[str, str]] = {}
    for name, source in bundle_data_files(as_run).items():
        data = source.read_bytes()
        contents[name] = data
        data_files[name] = {
            "source": data_sources.get(name, str(source)),
            "sha256": hashlib.sha256(data).hexdigest(),
        }
    found["data_files"] = data_files
    found.setdefault("recording", None)
    metrics: dict[str, Any] = {}
    density = final_density(mission, log)

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
                extra_metrics={"provenance": found},
                held=mission.settle.cells,
            )
        )

    path = write_trial(
        directory, as_run, log, report=report, files={**contents, **(files or {})},
        move_files=move_files,
    )
    return path, metrics


def rebuild_report(trial: str | Path, out: str | Path) -> dict[str, Any]:
    """Write a fresh report folder `out` for a trial directory from its CSV logs and mission
    as run (the way to redo an offline trial's report after the report code changed);
    returns the metrics. The provenance is the trial's own, when its metrics name one."""
    import json

    from coverage_fleet.fleet.mission import load_mission
    from coverage_fleet.fleet.trial import read_trial_log
    from coverage_fleet.report import write_report

    trial = Path(trial)
    mission = load_mission(trial / "mission.yaml")
    log = read_trial_log(trial, mission)
    metrics_path = trial / "report" / "metrics.json"
    old = json.loads(metrics_path.read_text()) if metrics_path.is_file() else {}
    out = Path(out)
    out.mkdir(parents=True)
    return write_report(
        out, log, mission.region, final_density(mission, log), mission.settle.distance,
        footprints={e.name: e.footprint_radius for e in mission.roster},
        map_origin=None if mission.frame is None else mission.frame.describe(),
        extra_metrics={"provenance": old.get("provenance", current_provenance())},
        held=mission.settle.cells,
    )


def final_density(mission: Mission, log: TrialLog):
    """The density in force at the end of the run (a scripted update may have replaced the
    mission's): the final cells, the CVT gap and the density drawn are judged with it."""
    end = log.time[-1] if log.time else 0.0
    return density_in_force(mission.density, mission.density_updates, end)
