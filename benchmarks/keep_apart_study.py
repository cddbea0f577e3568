"""Keep-apart study (issue 12): every demo mission from packed starts, the same seeds with
the buffered cells on and off, in the same run; prints both distributions (smallest
clearance per run, settled fraction, time to settle) and the criteria
(coverage_fleet/report/keep_apart_study.py says what each means).

Starts: packed within --gap metres footprint to footprint (fleet/batch.packed_initial_poses).
Clearance: measured on the plants' paths at every RK4 substep. Runs go to a local cluster
of --workers processes (fleet/parallel.py), as `coverage-fleet batch` does.

Run: .venv/bin/python benchmarks/keep_apart_study.py [--seeds 50] [--gap 0.1]
     [--missions solar_row_quick_check,...] [--duration S] [--workers N] [--json FILE]
     --quick: 5 seeds per mission, 25 s on the quick mission and 4 s on the others (a check
     that it works; the CI test runs about this).
Exit status 0 when every criterion of every mission passes, 1 otherwise.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

from coverage_fleet.fleet.mission import load_mission
from coverage_fleet.fleet.parallel import Placement, default_workers
from coverage_fleet.report.keep_apart_study import criteria, run_side, side_summary, summary_lines

MISSIONS = Path(__file__).resolve().parents[1] / "config" / "missions"
#: --quick: simulated seconds per mission (the quick mission settles in about 15-20 s).
QUICK_DURATIONS = {"solar_row_quick_check": 25.0}
QUICK_OTHER_DURATION = 4.0
QUICK_SEEDS = 5


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--seeds", type=int, default=50)
    parser.add_argument("--first-seed", type=int, default=0)
    parser.add_argument("--gap", type=float, default=0.1, help="packed starts gap (m)")
    parser.add_argument("--missions", default=",".join(sorted(
        p.stem for p in MISSIONS.glob("*.yaml"))))
    parser.add_argument("--duration", type=float, help="simulated seconds per run "
                        "(default: each mission's own)")
    parser.add_argument("--workers", type=int, default=default_workers())
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--json", type=Path, help="write every row and summary here")
    args = parser.parse_args(argv)
    seeds = list(range(args.first_seed, args.first_seed
                       + (QUICK_SEEDS if args.quick else args.seeds)))
    placement = Placement(workers=max(1, args.workers))
    print(f"keep-apart study: seeds {seeds[0]}..{seeds[-1]}, packed within {args.gap:g} m, "
          f"{placement.describe()}; load average {os.getloadavg()[0]:.2f}")
    document: dict[str, object] = {"seeds": seeds, "gap": args.gap, "missions": {}}
    every_pass = True
    started = time.perf_counter()
    for name in args.missions.split(","):
        mission = load_mission(MISSIONS / f"{name}.yaml")
        duration = args.duration
        if args.quick:
            duration = QUICK_DURATIONS.get(name, QUICK_OTHER_DURATION)
        sides = {}
        for keep_apart in (True, False):
            label = "on" if keep_apart else "off"
            began = time.perf_counter()
            rows = run_side(mission, seeds, args.gap, duration, keep_apart, placement)
            print(f"  {name} keep-apart {label}: {len(rows)} runs in "
                  f"{time.perf_counter() - began:.0f} s wall", file=sys.stderr, flush=True)
            sides[label] = rows
        on, off = side_summary(sides["on"]), side_summary(sides["off"])
        found = criteria(on, off)
        every_pass &= all(c.passed for c in found)
        duration_text = f"{duration:g} s" if duration else f"{mission.simulation.duration:g} s"
        for line in summary_lines(f"{name} ({len(mission.roster)} robots, {duration_text} "
                                  "per run)", on, off, found):
            print(line, flush=True)
        document["missions"][name] = {"duration_s": duration, "on": on, "off": off,
                                      "criteria": [c.__dict__ for c in found],
                                      "rows": sides}
    print(f"all criteria {'PASS' if every_pass else 'FAIL'}; "
          f"{time.perf_counter() - started:.0f} s wall; load average {os.getloadavg()[0]:.2f}")
    if args.json is not None:
        args.json.write_text(json.dumps(document, indent=2, default=str) + "\n")
    return 0 if every_pass else 1


if __name__ == "__main__":
    sys.exit(main())
