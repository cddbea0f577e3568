"""`coverage-fleet stop | resume`: the fleet-wide software stop of a running fleet.

The command joins the running graph as a short-lived node with the launcher's network
settings (ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST unless set; the ROS_DOMAIN_ID the launch
printed, from the environment or --domain-id: a domain is never guessed, since a stop sent
to the wrong domain reaches nobody) and calls the reference gate's stop service
(coverage_fleet.ros.fleet_stop). It says, every time, that this does not replace the
robots' own emergency stops.
"""

from __future__ import annotations

import argparse
import os
import sys

from coverage_fleet.inputs.fields import Collector, integer_fault, number_fault

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


def add_graph_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--domain-id", type=int,
        help="ROS_DOMAIN_ID of the running fleet, as `coverage-fleet launch` printed it "
             "(default: the ROS_DOMAIN_ID environment variable)",
    )
    parser.add_argument(
        "--wait", type=float, default=10.0,
        help="seconds to wait for the fleet's nodes to answer (default: 10)",
    )


def graph_environment(args: argparse.Namespace) -> None:
    """Check the options and join the launcher's network settings (this process only)."""
    options = Collector("command line")
    options.check("--wait", number_fault(args.wait, minimum=0.0, exclusive_minimum=True,
                                         maximum=WAIT_MAX))
    domain = graph_domain(args.domain_id, options)
    options.raise_if_any()
    join_domain(domain)


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

    graph_environment(args)
    verb = args.command
    domain = os.environ["ROS_DOMAIN_ID"]
    answer = request_fleet_stop(args.stopped, args.wait)
    if answer is None:
        print(
            f"{verb}: no fleet stop service answered in domain {domain} within {args.wait:g} s "
            "(is the base station running, in this domain?)"
            + (": use the robots' own emergency stops now" if args.stopped else ""),
            file=sys.stderr,
        )
        print(STOP_CAUTION, file=sys.stderr)
        return EXIT_NOT_REACHED
    print(f"{verb}: {answer}")
    if args.stopped:
        print(f"{verb}: release with `coverage-fleet resume --domain-id {domain}`")
    else:
        print(STOP_CAUTION)
    return 0
