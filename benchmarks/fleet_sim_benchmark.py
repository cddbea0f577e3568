"""Offline fleet simulation at scale: real-time factor, time per stage and cost per
robot-step for mixed fleets of 4, 16, 64 and 256 robots, controllers in this process
(baseline) against controllers on worker processes, in the same run.

Scenario (invented, not a real site): a hexagonal reservoir-shore survey area whose size
grows with the fleet (about 150 m^2 per robot), a raster of invented inspection priority
(a shoreline band plus two inlets; 1 m cells), and a fleet that cycles through the four
shipped vehicle types (differential-drive rover, car-like utility vehicle, multirotor,
surface vessel) and starts packed in a grid in the south-west corner, so that every robot
has far to go and its MPC works for the whole run. The run does not stop when the fleet
settles (it would not within these durations anyway).

For each fleet size the same mission, seed and duration run twice, alternating:
- baseline: every controller in this process (`--workers 1` of `coverage-fleet simulate`);
- method:   controllers over N processes, this one and N - 1 worker processes
            (fleet/controller_pool.py; default N = cores), labelled "N workers".
Printed per run: simulated seconds, wall seconds of the tick loop, real-time factor
(simulated / wall), wall time per robot-step (one robot for one tick: its share of
partition, gate, solve, plant and logging), share of the tick loop per stage (plain
counters in fleet/step.StageTimes), and the start-up time (building the controllers, and
for the method spawning the workers and their imports; paid once per run, outside the tick
loop; for the method the workers' start-up that this process does not wait for is in the
tick loop's first tick, so compare setup + loop, printed as "total"). For the method a
second line splits its `solves` share: each process's busy time (this process's answers to
its own share first, then each worker's, what it measured answering,
fleet/controller_pool.py), the busiest process's per tick (the least the answers could
take with this split of robots) and the rest (the other processes' idle time, messages,
wake-ups, the workers' start-up); the last two sum to the `solves` share; "on a core" is
each process's CPU time over its busy time (below 100 %: it waited for a core, as on a
machine shared with other work; its solve times include the wait; for the baseline the
same over its whole run, start-up included). Under each run,
its solves: mean and median solve time (the loop pays the mean) and the share of samples
the real-time iteration answered alone against those handed to a full solve. The partition's
compiled loops are loaded once before any timing. Then the ratios
method/baseline, how the cost per robot-step grows with the fleet (slope of log cost
against log robots between sizes: 0 is flat, 1 is linear), and whether the two logs are
identical (every logged value but the measured solve times).

Targets (issue 13): at least 10x faster than real time for 16 mixed robots on a 2-core
machine; cost per robot-step flat as the fleet grows.

Durations are short for large fleets so that the whole script takes a few minutes;
`--quick` runs 4, 16 and 64 robots for even shorter durations (a check that it works).
With those, the printed slope mixes fleet size with run length (a short run's cold starts
and first builds weigh more per robot-step); `--duration S` runs every size for S
simulated seconds, so that the slope says how the cost grows with the fleet alone.
The machine may be shared: the load average is printed at the start and the end.
Run: .venv/bin/python benchmarks/fleet_sim_benchmark.py [--quick] [--workers N]
     [--sizes 4,16] [--duration S]
"""

from __future__ import annotations

import argparse
import itertools
import math
import os
import tempfile
import time
from pathlib import Path

import numpy as np

from coverage_fleet.fleet.mission import Mission, mission_from_mapping
from coverage_fleet.fleet.parallel import default_workers
from coverage_fleet.fleet.simulation import simulate_mission
from coverage_fleet.fleet.step import StageTimes
from coverage_fleet.fleet.trial import TrialLog, log_texts_without_wall_clock
from coverage_fleet.geometry.partition import compute_partition
from coverage_fleet.vehicles.settings import SOLVER_PLUGINS

VEHICLES = ("differential_drive", "car_like", "multirotor", "surface_vessel")
#: Simulated seconds per fleet size (full run, quick run).
DURATIONS = {4: (20.0, 5.0), 16: (20.0, 5.0), 64: (5.0, 1.0), 256: (1.5, None)}
AREA_PER_ROBOT = 150.0  # m^2
GRID_SPACING = 3.0  # m between starting positions (larger than two footprints)
RESOLUTION = 1.0  # m per raster cell
SEED = 3


def survey_mission(robots: int, duration: float, directory: Path) -> Mission:
    """The invented survey mission for `robots` robots (see the module docstring)."""
    radius = math.sqrt(AREA_PER_ROBOT * robots / (1.5 * math.sqrt(3.0)))
    angles = np.arange(6) * np.pi / 3
    vertices = [[radius * (1 + math.cos(a)), radius * (1 + math.sin(a))] for a in angles]
    cells = math.ceil(2 * radius / RESOLUTION) + 1
    centres = (np.arange(cells) + 0.5) * RESOLUTION
    x, y = np.meshgrid(centres, centres[::-1])  # north row first
    shore = np.exp(-(((x - radius) ** 2 + (y - radius) ** 2) ** 0.5 - 0.7 * radius) ** 2
                   / (0.02 * radius**2))
    inlets = (np.exp(-((x - 1.5 * radius) ** 2 + (y - 1.4 * radius) ** 2) / (0.03 * radius**2))
              + np.exp(-((x - 0.6 * radius) ** 2 + (y - 1.5 * radius) ** 2)
                       / (0.05 * radius**2)))
    values = 0.2 + shore + 2.0 * inlets
    columns = math.ceil(math.sqrt(robots))
    start_x = radius * 0.55
    start_y = radius * (1 - math.sin(np.pi / 3)) + 2.0
    roster = []
    for k in range(robots):
        row, column = divmod(k, columns)
        roster.append({
            "name": f"robot_{k:03d}",
            "vehicle": VEHICLES[k % len(VEHICLES)],
            "initial_pose": [start_x + GRID_SPACING * column, start_y + GRID_SPACING * row,
                             0.0],
        })
    raw = {
        "name": f"survey_{robots}",
        "description": "Invented reservoir-shore survey area (benchmark scenario).",
        "region": {"vertices": vertices},
        "density": {"kind": "raster", "values": values.tolist(), "origin": [0.0, 0.0],
                    "resolution": RESOLUTION},
        "roster": roster,
        "gate": {"noise_tolerance": 0.02, "progress_tolerance": 0.05},
        "settle": {"distance": 0.2, "speed": 0.05, "dwell": 2.0, "stuck_timeout": 30.0},
        "simulation": {"duration": duration, "seed": SEED, "plant_substeps": 8},
    }
    return mission_from_mapping(raw, directory / f"survey_{robots}.yaml")


def run_once(mission: Mission, workers: int) -> tuple[TrialLog, StageTimes, float]:
    times = StageTimes()
    started = time.perf_counter()
    log = simulate_mission(mission, stop_at_rest=False, workers=workers, stage_times=times)
    setup = time.perf_counter() - started - log.wall_time
    return log, times, setup


def describe(label: str, log: TrialLog, times: StageTimes, setup: float) -> str:
    simulated = log.duration
    per_step = log.wall_time / max(1, times.robot_steps)
    shares = "  ".join(f"{getattr(times, s) / times.total:6.1%}" for s in StageTimes.STAGES)
    return (f"  {label:<10} {simulated:6.1f} s sim  {log.wall_time:7.2f} s wall  "
            f"RTF {simulated / log.wall_time:6.2f}x  {per_step * 1e3:7.3f} ms/robot-step  "
            f"{shares}  setup {setup:5.2f} s  total {setup + log.wall_time:6.2f} s")


def describe_solves(log: TrialLog) -> str:
    """The solves behind the `solves` share: mean and median solve time (the fleet loop
    pays the mean), and how many samples the real-time iteration answered alone against
    those handed to a full solve (status naming a plugin: control/solver_chain.py), with
    the full solves' share of the summed solve time. Samples of neither kind (a
    keep-apart brake, a fallback without a solve) are counted apart."""
    times, full, fell_back = [], [], []
    for robot in log.robots.values():
        for ran, seconds, status, fallback in zip(
            robot.controller_ran, robot.solve_time, robot.status, robot.fallback, strict=True
        ):
            if ran:
                times.append(seconds)
                full.append(any(f"{plugin}:" in status for plugin in SOLVER_PLUGINS))
                fell_back.append(bool(fallback))
    if not times:
        return f"  {'':<10} no solves"
    seconds, handed = np.array(times), np.array(full)
    alone = ~handed & ~np.array(fell_back)
    others = len(seconds) - int(alone.sum()) - int(handed.sum())
    return (f"  {'':<10} solves {len(seconds)}: mean {seconds.mean() * 1e3:.2f} ms, median "
            f"{np.median(seconds) * 1e3:.2f} ms; real-time alone {alone.mean():.1%} (mean "
            f"{seconds[alone].mean() * 1e3 if alone.any() else 0.0:.2f} ms), full solve "
            f"{handed.mean():.1%} (mean "
            f"{seconds[handed].mean() * 1e3 if handed.any() else 0.0:.2f} ms, "
            f"{seconds[handed].sum() / max(seconds.sum(), 1e-12):.0%} of the solve time)"
            + (f", {others} braked or fell back without a full solve" if others else ""))


def describe_workers(log: TrialLog, times: StageTimes, setup: float) -> str:
    """Where the pooled run's `solves` share went: each process's busy time (this one
    first), the busiest process's per tick (the least the answers could take), and the
    rest (idle processes waiting for the busiest, messages, wake-ups, the workers'
    start-up), as shares of the tick loop."""
    busy = "  ".join(f"{b / times.total:5.1%}" for b in times.worker_busy)
    on_cpu = "  ".join(f"{c / max(b, 1e-12):4.0%}" for c, b in
                       zip(times.worker_cpu, times.worker_busy, strict=True))
    rest = times.solves - times.worker_critical
    return (f"  {'':<10} busy (this process, workers) {busy} of the loop (on a core {on_cpu} "
            f"of it); busiest per tick {times.worker_critical / times.total:5.1%}, waits and "
            "messages "
            f"{rest / times.total:5.1%}")


def load_text() -> str:
    one, five, fifteen = os.getloadavg()
    return f"load average {one:.2f} {five:.2f} {fifteen:.2f} on {os.cpu_count()} cores"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="4, 16, 64 robots, short runs")
    parser.add_argument("--workers", type=int, default=default_workers(),
                        help="processes of the method, this one included (default: one per "
                             "core)")
    parser.add_argument("--sizes", help="fleet sizes, comma-separated (default: all)")
    parser.add_argument("--duration", type=float,
                        help="simulated seconds for every size (default: shorter for larger "
                             "fleets, see the module docstring)")
    args = parser.parse_args()
    if args.workers < 2:
        parser.error("--workers must be at least 2 (1 is the baseline)")
    if args.duration is not None and not (math.isfinite(args.duration) and args.duration > 0):
        parser.error(f"--duration must be a positive number of seconds, got {args.duration}")
    column = 1 if args.quick else 0
    sizes = [n for n in DURATIONS if DURATIONS[n][column] is not None]
    if args.sizes:
        try:
            sizes = [int(text) for text in args.sizes.split(",")]
        except ValueError:
            parser.error(f"--sizes takes whole numbers separated by commas, got {args.sizes!r}")
        if any(n < 1 for n in sizes):
            parser.error(f"--sizes must be at least 1 robot each, got {args.sizes!r}")
    print(f"fleet simulation benchmark, {load_text()}")
    print(f"  {'':<10} {'':>6}        {'':>7}        {'':>10}  {'':>7}              "
          + "  ".join(f"{s:>6}" for s in StageTimes.STAGES))
    results = {}
    with tempfile.TemporaryDirectory() as folder:
        # The partition's compiled loops load (or compile, in a fresh checkout) on the first
        # call: outside the timing, as in partition_benchmark.py.
        warm = survey_mission(4, 1.0, Path(folder))
        compute_partition(np.array([e.initial_pose[:2] for e in warm.roster]), warm.region,
                          warm.density)
        for robots in sizes:
            duration = args.duration or DURATIONS.get(robots, (5.0, 1.0))[column] or 1.0
            mission = survey_mission(robots, duration, Path(folder))
            print(f"{robots} robots ({', '.join(VEHICLES)} in turn), {duration:g} s simulated")
            cpu_started, wall_started = time.process_time(), time.perf_counter()
            serial = run_once(mission, 1)
            on_core = (time.process_time() - cpu_started) / (time.perf_counter() - wall_started)
            print(describe("1 process", *serial) + f"  on a core {on_core:.0%}")
            print(describe_solves(serial[0]))
            parallel = run_once(mission, args.workers)
            print(describe(f"{args.workers} workers", *parallel))
            print(describe_workers(*parallel))
            print(describe_solves(parallel[0]))
            same = (log_texts_without_wall_clock(serial[0])
                    == log_texts_without_wall_clock(parallel[0]))
            ratio = serial[0].wall_time / parallel[0].wall_time
            total_ratio = (serial[0].wall_time + serial[2]) / (parallel[0].wall_time + parallel[2])
            print(f"  tick loop {ratio:.2f}x as fast on {args.workers} workers (setup + loop "
                  f"{total_ratio:.2f}x); logs "
                  f"{'identical' if same else 'DIFFERENT'} (solve times aside)")
            results[robots] = (serial, parallel)
    print("cost per robot-step as the fleet grows (slope of log cost / log robots; 0 = flat):")
    for label, pick in (("1 process", 0), (f"{args.workers} workers", 1)):
        costs = [(n, results[n][pick][0].wall_time / results[n][pick][1].robot_steps)
                 for n in results]
        slopes = [f"{a}->{b}: {math.log(cb / ca) / math.log(b / a):+.2f}"
                  for (a, ca), (b, cb) in itertools.pairwise(costs)]
        print(f"  {label:<10} " + ("  ".join(slopes) or "(needs two sizes)"))
    print(f"done, {load_text()}")


if __name__ == "__main__":
    main()
