"""`coverage-fleet stop | resume`: the fleet-wide software stop of a running fleet;
`coverage-fleet arm`: let the controllers of real robots command them (ros/arming.py).

The command joins the running graph as a short-lived node with the launcher's network
settings (ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST unless set; the ROS_DOMAIN_ID the launch
printed, from the environment or --domain-id: a domain is never guessed, since a stop sent
to the wrong domain reaches nobody) and calls the reference gate's stop service
(coverage_fleet.ros.fleet_stop). It says, every time, that this does not replace the
robots' own emergency stops.

A fleet started under a namespace (`--fleet-namespace`, the launch files' `fleet_namespace`)
is joined under the same one: every command that joins a running graph takes it through
add_namespace_option / graph_namespace, so all of them spell it alike.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from coverage_fleet.inputs.fields import Collector, integer_fault, number_fault
from coverage_fleet.inputs.names import robot_name_problem

from .launcher import ros_environment

#: Fast DDS maps domain ids up to 232 to ports (ROS 2 documentation, "The ROS_DOMAIN_ID";
#: from memory).
DOMAIN_ID_MAX = 232
WAIT_MAX = 600.0
EXIT_NOT_REACHED = 1


def register(subparsers: argparse._SubParsersAction) -> None:
    for verb, stopped, text in (
        ("stop", True, "stop every robot of a running fleet (software stop: braking input "
                       "held until `resume`)"),
        ("resume", False, "release the fleet-wide software stop of a running fleet"),
    ):
        parser = subparsers.add_parser(
            verb, help=text,
            description=f"{text[0].upper()}{text[1:]}. Does not replace the robots' own "
            "emergency stops.",
        )
        add_graph_options(parser)
        parser.set_defaults(handler=run_stop, stopped=stopped)
    parser = subparsers.add_parser(
        "arm", help="let the controllers of a running fleet's real robots command them",
        description="Controllers of robots the roster marks real start disarmed (they send "
        "nothing); this arms them (lifecycle configure if needed, then activate). Robots "
        "the roster marks simulated arm themselves.",
    )
    parser.add_argument("mission", type=Path, help="mission file of the running fleet")
    parser.add_argument(
        "--robot", action="append", default=[], metavar="NAME",
        help="arm only this robot (repeatable; default: every robot marked real)",
    )
    add_graph_options(parser)
    parser.set_defaults(handler=run_arm)


def add_namespace_option(parser: argparse.ArgumentParser) -> None:
    """The fleet namespace option, one spelling for launch, watch, stop, resume and arm."""
    parser.add_argument(
        "--fleet-namespace", default="", metavar="NAME",
        help="the fleet's ROS namespace, one name segment such as yard_b: its nodes and "
             "topics live under /NAME (default: none, topics such as /coverage/cells)",
    )


def graph_namespace(name: str, options: Collector) -> str:
    """--fleet-namespace as a namespace: "" -> "", "yard_b" -> "/yard_b". A namespace is one
    ROS name segment, under the robot-name rule (coverage_fleet.inputs.names), as the launch
    files' fleet_namespace is; faults go to `options`."""
    if not name:
        return ""
    problem = robot_name_problem(name)
    if problem:
        options.add("--fleet-namespace", problem)
        return ""
    return f"/{name}"


def namespace_words(namespace: str) -> str:
    """What to add to a printed command line so that it reaches the same fleet."""
    return f" --fleet-namespace {namespace.strip('/')}" if namespace else ""


def add_graph_options(parser: argparse.ArgumentParser) -> None:
    add_namespace_option(parser)
    parser.add_argument(
        "--domain-id", type=int,
        help="ROS_DOMAIN_ID of the running fleet, as `coverage-fleet launch` printed it "
             "(default: the ROS_DOMAIN_ID environment variable)",
    )
    parser.add_argument(
        "--wait", type=float, default=10.0,
        help="seconds to wait for the fleet's nodes to answer (default: 10)",
    )


def graph_environment(args: argparse.Namespace) -> str:
    """Check the options and join the launcher's network settings (this process only);
    returns the fleet namespace ("" or "/yard_b")."""
    options = Collector("command line")
    options.check("--wait", number_fault(args.wait, minimum=0.0, exclusive_minimum=True,
                                         maximum=WAIT_MAX))
    domain = graph_domain(args.domain_id, options)
    namespace = graph_namespace(args.fleet_namespace, options)
    options.raise_if_any()
    join_domain(domain)
    return namespace


def graph_domain(domain: int | None, options: Collector) -> int | None:
    """The running fleet's domain: --domain-id, else ROS_DOMAIN_ID; faults go to `options`
    (shared by every command that joins a running graph: stop, resume, watch)."""
    if domain is None:
        text = os.environ.get("ROS_DOMAIN_ID", "")
        if not text:
            options.add("--domain-id", "is required (or set ROS_DOMAIN_ID): use the domain "
                        "`coverage-fleet launch` printed; a domain is never guessed")
        elif not text.isdigit():
            options.add("--domain-id", f"ROS_DOMAIN_ID must be an integer, got {text!r}")
        else:
            domain = int(text)
    if domain is not None:
        options.check("--domain-id", integer_fault(domain, 0, DOMAIN_ID_MAX))
    return domain


def join_domain(domain: int) -> None:
    """This process joins `domain` with the launcher's discovery setting."""
    env, _ = ros_environment({**os.environ, "ROS_DOMAIN_ID": str(domain)})
    os.environ.update(
        {k: env[k] for k in ("ROS_AUTOMATIC_DISCOVERY_RANGE", "ROS_DOMAIN_ID")}
    )


def run_stop(args: argparse.Namespace) -> int:
    from coverage_fleet.ros.fleet_stop import STOP_CAUTION, request_fleet_stop

    namespace = graph_environment(args)
    verb = args.command
    domain = os.environ["ROS_DOMAIN_ID"]
    answer = request_fleet_stop(args.stopped, args.wait, namespace)
    if answer is None:
        where = f" under {namespace}" if namespace else " without a fleet namespace"
        print(
            f"{verb}: no fleet stop service answered in domain {domain}{where} within "
            f"{args.wait:g} s (is the base station running, in this domain, under this "
            "--fleet-namespace?)"
            + (": use the robots' own emergency stops now" if args.stopped else ""),
            file=sys.stderr,
        )
        print(STOP_CAUTION, file=sys.stderr)
        return EXIT_NOT_REACHED
    print(f"{verb}: {answer}")
    if args.stopped:
        print(f"{verb}: release with `coverage-fleet resume --domain-id {domain}"
              f"{namespace_words(namespace)}`")
    else:
        print(STOP_CAUTION)
    return 0


def run_arm(args: argparse.Namespace) -> int:
    from coverage_fleet.fleet.mission import load_mission_with
    from coverage_fleet.ros.arming import arm_controllers

    from .graph import controller_node_spec
    from .launcher import SAFETY_CAUTION

    options = Collector("command line")
    options.check("--wait", number_fault(args.wait, minimum=0.0, exclusive_minimum=True,
                                         maximum=WAIT_MAX))
    domain = graph_domain(args.domain_id, options)
    namespace = graph_namespace(args.fleet_namespace, options)
    mission = load_mission_with(args.mission, options)
    unknown = sorted(set(args.robot) - set(mission.robot_names))
    if unknown:
        options.add("--robot", f"not in the roster: {', '.join(unknown)}")
    options.raise_if_any()
    join_domain(domain)
    robots = args.robot or [e.name for e in mission.roster if not e.simulated]
    if not robots:
        print("arm: the roster marks no robot real; simulated robots arm themselves")
        return 0
    print(SAFETY_CAUTION)
    paths = {}
    for robot in robots:
        spec = controller_node_spec(mission.source, robot, fleet=namespace.strip("/"))
        paths[robot] = f"{spec.namespace.rstrip('/')}/{spec.name}"
    outcomes = arm_controllers(paths, args.wait)
    for robot, outcome in outcomes.items():
        print(f"arm: {robot}: {outcome}")
    if any(o.startswith("NOT") for o in outcomes.values()):
        return EXIT_NOT_REACHED
    print(f"arm: stop every robot with `coverage-fleet stop --domain-id {domain}"
          f"{namespace_words(namespace)}`; it does not replace the robots' own emergency "
          "stops")
    return 0
