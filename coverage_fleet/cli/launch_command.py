"""`coverage-fleet launch MISSION`: start the mission's ROS graph as separate processes
(base station, one controller per robot, optionally the headless simulator), record the run
and end with the trial directory and its report. The same node list as launch/*.launch.py
(coverage_fleet.cli.graph).

While the graph runs the launcher shows the live view of `coverage-fleet watch` (redrawn in
place in a terminal; plain status lines every LAUNCH_PLAIN_PERIOD seconds when its output
is a pipe or a log) and relays the nodes' warnings and errors from /rosout to stderr.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import shlex
import signal
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from coverage_fleet.errors import ConfigError
from coverage_fleet.inputs.fields import Collector, number_fault
from coverage_fleet.inputs.outputs import check_output_location
from coverage_fleet.ros.launcher_contract import EXIT_ROBOTS_MISSING

from .fleet_command import add_namespace_option, graph_namespace, namespace_words
from .graph import (
    SIMULATION_MODES,
    SimulationMode,
    fleet_nodes,
    recorder_node_spec,
    select_nodes,
)
from .launcher import SAFETY_CAUTION, GraphProcesses, StopSignals, ros_environment

if TYPE_CHECKING:
    from coverage_fleet.fleet.mission import Mission

EXIT_NODE_DIED = 1
EXIT_INTERRUPTED = 130
EXIT_NOT_CONFIRMED = 1
#: Simulator exit status 0 means its run is over (duration reached, fleet settled or stuck).
SIMULATOR_ROLE = "simulator"
#: Seconds between plain status blocks when the launcher's output is not a terminal.
LAUNCH_PLAIN_PERIOD = 5.0


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "launch",
        help="start a mission's ROS 2 graph (optionally with the headless simulator)",
        description="Start the mission's ROS 2 graph as separate processes: the base station "
        "(partition and reference gate), one controller per robot and, with --headless-sim, "
        "the simulator. Records the run and writes a trial directory with a report at the "
        "end (simulation over, or Ctrl-C).",
    )
    parser.add_argument("mission", type=Path, help="mission file (YAML)")
    parser.add_argument(
        "--headless-sim", action="store_true",
        help="simulate the robots marked simulated (default: all robots are real)",
    )
    parser.add_argument(
        "--sim-mode", choices=SIMULATION_MODES, default="lockstep",
        help="lockstep: time advances when every controller has answered (fast, repeatable); "
        "realtime: wall-clock pace (default: lockstep)",
    )
    parser.add_argument(
        "--vehicle", action="append", default=[], metavar="ROBOT=FILE",
        help="use another vehicle parameter file for one robot (repeatable)",
    )
    parser.add_argument(
        "--duration", type=float, default=0.0,
        help="simulated seconds before the run ends (default: the mission's)",
    )
    parser.add_argument(
        "--only", action="append", default=[], metavar="PART",
        help="start only this part (repeatable): base_station, simulator, or a robot's name "
        "(its controller), e.g. on a robot's own computer",
    )
    parser.add_argument(
        "--density-updates", action="store_true",
        help="the partition node takes nav_msgs/OccupancyGrid densities from "
        "/coverage/density at run time (README, Density updates)",
    )
    add_namespace_option(parser)
    parser.add_argument("--out", type=Path, help="trial directory (default: trials/...)")
    parser.add_argument(
        "--no-record", action="store_true", help="do not record a trial (just run the graph)"
    )
    parser.add_argument(
        "--confirm-real-robots", action="store_true",
        help="start controllers of robots marked real without asking (they start disarmed "
             "all the same: `coverage-fleet arm`); required when no one can answer, e.g. "
             "stdin is not a terminal",
    )
    parser.set_defaults(handler=run)


def _overrides(items: list[str], options: Collector) -> dict[str, Path]:
    """`--vehicle ROBOT=FILE` items by robot (the files themselves are checked with the
    mission, see with_vehicle_overrides)."""
    found = {}
    for item in items:
        robot, sep, path = item.partition("=")
        if not sep or not robot or not path:
            options.add("--vehicle", f"{item!r}: expected ROBOT=FILE")
        elif robot in found:
            options.add("--vehicle", f"{item!r}: {robot!r} is given twice")
        else:
            found[robot] = Path(path)
    return found


def confirm_real_robots(mission: Mission, only: list[str], confirmed: bool) -> bool:
    """Controllers of real robots are about to start: ask the person at the terminal (they
    start disarmed, but arming is then one command away). Refused up front when nobody can
    answer and --confirm-real-robots is not given."""
    real = [e.name for e in mission.roster if not e.simulated and (not only or e.name in only)]
    if not real or confirmed:
        return True
    if not sys.stdin.isatty():
        raise ConfigError.single(
            "command line", "--confirm-real-robots",
            f"is required: the roster has real robots ({', '.join(real)}) and stdin is not a "
            "terminal, so nobody can confirm",
        )
    print(SAFETY_CAUTION)
    print(
        f"launch: real robots: {', '.join(real)}. Their controllers start DISARMED; "
        "`coverage-fleet arm` lets them move. Check that the area is clear, the emergency "
        "stops work and a qualified operator supervises."
    )
    answer = input("launch: start the graph? Type 'yes' to go on: ")
    return answer.strip().lower() == "yes"


def run(args: argparse.Namespace) -> int:
    from coverage_fleet.fleet.mission import (
        DURATION_MAX,
        load_mission,
        with_vehicle_overrides,
    )

    # Everything is checked before anything starts, with the checks `simulate` applies.
    options = Collector("command line")
    if args.duration != 0.0:
        options.check("--duration", number_fault(
            args.duration, minimum=0.0, exclusive_minimum=True, maximum=DURATION_MAX))
    overrides = _overrides(args.vehicle, options)
    namespace = graph_namespace(args.fleet_namespace, options)
    try:
        mission = load_mission(args.mission)
    except ConfigError as error:
        options.extend(error)
        options.raise_if_any()
    mission = with_vehicle_overrides(mission, overrides, options)
    if not confirm_real_robots(mission, args.only, args.confirm_real_robots):
        print("launch: not started")
        return EXIT_NOT_CONFIRMED
    result = run_graph(
        mission,
        args.sim_mode if args.headless_sim else None,
        overrides,
        duration=args.duration,
        out=args.out,
        record=not args.no_record,
        only=args.only,
        density_updates=args.density_updates,
        command_line=["coverage-fleet", *sys.argv[1:]],
        namespace=namespace,
    )
    return result.status


@dataclass(frozen=True)
class GraphRun:
    """How a run of the graph ended: exit status, trial directory and report metrics (None
    without recording)."""

    status: int
    trial: Path | None
    metrics: dict[str, Any]


def run_graph(
    mission: Mission,
    simulation: SimulationMode | None,
    vehicle_overrides: dict[str, Path] | None = None,
    duration: float = 0.0,
    out: Path | None = None,
    record: bool = True,
    only: list[str] | None = None,
    density_updates: bool = False,
    command_line: list[str] | None = None,
    namespace: str = "",
) -> GraphRun:
    """Start the mission's graph, watch it until the simulation is over, a node other than a
    controller dies or Ctrl-C, stop it and write the trial (when recording). Every node,
    the recorder and the live view run under the fleet `namespace` ("" or "/yard_b").

    While it runs, `<out>.run/` holds the recording (recording.mcap, written by the
    recorder process) and the node logs (logs/); the trial is then built from the
    recording and both move into it. Recording needs the base station's part of the
    deployment (it is where the trial is kept)."""
    parts = only or []
    record = record and (not parts or "base_station" in parts)
    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    out = out or Path("trials") / f"{mission.name}-ros-{stamp}"
    if out.exists():
        raise ConfigError.single(str(out), "--out", "already exists; a trial is never overwritten")
    check_output_location(out, "--out")
    run_dir = Path(f"{out}.run")
    if run_dir.exists():
        raise ConfigError.single(
            str(run_dir), "--out", "already exists (the working folder of another run)"
        )
    specs = select_nodes(
        fleet_nodes(
            mission.source, simulation, vehicle_overrides, duration=duration, recorded=record,
            density_updates=density_updates, fleet=namespace.strip("/"),
        ),
        parts,
        str(mission.source),
    )
    recording = run_dir / "recording.mcap"
    if record:
        specs.insert(0, recorder_node_spec(
            mission.source, recording, vehicle_overrides, duration, simulation,
            shlex.join(command_line or sys.argv), fleet=namespace.strip("/"),
        ))
    log_dir = run_dir / "logs"
    env, notes = ros_environment(os.environ)
    # This process hosts the live view: it joins the same domain on loopback.
    os.environ.update(
        {k: env[k] for k in ("ROS_AUTOMATIC_DISCOVERY_RANGE", "ROS_DOMAIN_ID")}
    )
    print(SAFETY_CAUTION)
    for note in notes:
        print(f"launch: set {note}")
    with StopSignals() as stop_signals:
        return _run_and_record(
            mission, simulation, specs, out, log_dir, env,
            recording if record else None, stop_signals, namespace,
        )


def _run_and_record(
    mission: Mission,
    simulation: SimulationMode | None,
    specs: list,
    out: Path,
    log_dir: Path,
    env: dict[str, str],
    recording: Path | None,
    stop_signals: StopSignals,
    namespace: str = "",
) -> GraphRun:
    joining = f"--domain-id {env['ROS_DOMAIN_ID']}{namespace_words(namespace)}"
    graph = GraphProcesses(log_dir, env)
    started = time.monotonic()
    status = 0
    view = None
    try:
        graph.start(specs)
        print(
            f"launch: mission {mission.name!r}, {len(mission.roster)} robots, "
            f"{'headless simulation (' + simulation + ')' if simulation else 'real robots'}; "
            f"started {len(specs)} processes (ROS_DOMAIN_ID={env['ROS_DOMAIN_ID']}):"
        )
        graph.describe(sys.stdout)
        print(
            "launch: from another terminal: "
            f"coverage-fleet watch {joining} "
            f"--mission {mission.source}; RViz: {namespace}/coverage/cells in frame map; "
            "node logs in "
            f"{log_dir} (moved into the trial at the end); Ctrl-C stops everything",
            flush=True,
        )
        print(
            f"launch: `coverage-fleet stop {joining}` brakes every "
            "robot until `coverage-fleet resume`; a software stop does NOT replace the "
            "robots' own emergency stops",
            flush=True,
        )
        real = [e.name for e in mission.roster if not e.simulated]
        if real:
            print(
                f"launch: real robots ({', '.join(real)}) start DISARMED: arm them with "
                f"`coverage-fleet arm {mission.source} {joining}`",
                flush=True,
            )
        view = _start_view(mission, namespace)
        status = _watch(graph, view.wait if view is not None else time.sleep)
    except KeyboardInterrupt as interrupt:
        name = getattr(interrupt, "signal_name", "SIGINT")
        print(
            f"launch: {name}: stopping the graph (again to kill what is still running)",
            file=sys.stderr, flush=True,
        )
        status = EXIT_INTERRUPTED
    finally:
        # From here on a stop signal only hurries the stop: no node is ever left running.
        stop_signals.stopping()
        if view is not None:
            view.close()
        graph.stop(hurry=lambda: stop_signals.hurry)
    print(f"launch: all processes stopped after {time.monotonic() - started:.1f} s")
    if recording is None:
        print(f"launch: node logs in {log_dir}")
        return GraphRun(status, None, {})
    return _trial_from_run(status, recording, log_dir, out)


def _trial_from_run(status: int, recording: Path, log_dir: Path, out: Path) -> GraphRun:
    """Build the trial from the run's recording (the recording and the node logs move into
    it); a recording cut short (recorder killed) is recovered up to its last full chunk."""
    from coverage_fleet.cli.simulate_command import summary_lines
    from coverage_fleet.ros.trial_from_recording import trial_from_recording

    if not recording.is_file():
        print(
            f"launch: no recording was written (see {log_dir}); no trial", file=sys.stderr,
            flush=True,
        )
        return GraphRun(status or EXIT_NODE_DIED, None, {})
    try:
        path, metrics, read = trial_from_recording(
            recording, out, move_recording=True, extra_files={"logs": log_dir}
        )
    except (ConfigError, ValueError, IndexError) as error:
        print(
            f"launch: the trial could not be built from {recording}: {error}; rebuild it "
            f"with: coverage-fleet report {recording} --out {out}",
            file=sys.stderr, flush=True,
        )
        return GraphRun(status or EXIT_NODE_DIED, None, {})
    with contextlib.suppress(OSError):
        recording.parent.rmdir()
    if not read.complete:
        print(f"launch: warning: {read.problem}", file=sys.stderr, flush=True)
    for line in summary_lines(metrics):
        print(f"launch: {line}")
    print(
        f"launch: trial written to {path} (report in {path / 'report'}, recording "
        f"{path / 'recording.mcap'}, node logs in {path / 'logs'})"
    )
    return GraphRun(status, path, metrics)


def _relay(line) -> None:
    print(f"launch: {line.level} from {line.node}: {line.message}", file=sys.stderr, flush=True)


def _start_view(mission: Mission, namespace: str = ""):
    """The live view of the graph, or None (said so) if it cannot start: the run goes on
    without it."""
    from .watch_command import LiveView, is_terminal

    plain = not is_terminal(sys.stdout)
    try:
        return LiveView(
            list(mission.robot_names), sys.stdout, plain,
            period=LAUNCH_PLAIN_PERIOD if plain else None, on_log=_relay,
            namespace=namespace,
        )
    except Exception as error:  # the view is for people; the run must not depend on it
        print(f"launch: no live view ({error!r})", file=sys.stderr, flush=True)
        return None


#: Signals with which a process crashes (rather than is stopped); launched nodes print their
#: Python stack on them (`launcher.ros_environment`: PYTHONFAULTHANDLER).
CRASH_SIGNALS = frozenset({signal.SIGSEGV, signal.SIGBUS, signal.SIGFPE, signal.SIGILL,
                           signal.SIGABRT})


def exit_text(code: int | None) -> str:
    """"status N", naming the signal that ended the process (subprocess gives -number)."""
    if code is None or code >= 0:
        return f"status {code}"
    try:
        name = signal.Signals(-code).name
    except ValueError:
        name = f"signal {-code}"
    crashed = "; its log ends with the Python stack" if -code in CRASH_SIGNALS else ""
    return f"status {code} (ended by {name}{crashed})"


def _watch(graph: GraphProcesses, wait: Callable[[float], None] = time.sleep) -> int:
    """Until the simulation is over or a node other than a controller exits; returns the
    exit status (EXIT_NODE_DIED when any node died). `wait` passes the time between checks
    (the live view handles its messages and redraws meanwhile)."""
    status = 0
    while True:
        for node in graph.exited():
            code = node.returncode
            if node.spec.role == SIMULATOR_ROLE and code == 0:
                print("launch: the simulation is over", flush=True)
                return status
            if node.spec.role == SIMULATOR_ROLE and code == EXIT_ROBOTS_MISSING:
                print(
                    "launch: the simulation is over, but not with the whole fleet: a "
                    f"controller was not answering (see {node.log_path})",
                    file=sys.stderr, flush=True,
                )
                # A controller that died already set the status: keep that, it says more.
                return status or EXIT_ROBOTS_MISSING
            if node.spec.role.startswith("controller"):
                # A fault in one robot never takes the fleet down: the others go on.
                print(
                    f"launch: {node.spec.label} exited with {exit_text(code)} "
                    f"(see {node.log_path}); the rest of the fleet goes on",
                    file=sys.stderr, flush=True,
                )
                status = EXIT_NODE_DIED
                continue
            partial = "; the trial is partial" if node.spec.role == SIMULATOR_ROLE else ""
            print(
                f"launch: {node.spec.label} exited with {exit_text(code)} "
                f"(see {node.log_path}); stopping the graph{partial}",
                file=sys.stderr, flush=True,
            )
            return EXIT_NODE_DIED
        wait(0.1)
