"""What the package's launcher (coverage_fleet.cli.launcher) and the node processes it
starts agree on. No rclpy here, so the launcher can import it cheaply."""

from __future__ import annotations

#: Set by the launcher to its own pid in every node's environment: the node asks Linux to
#: stop it when the launcher dies (coverage_fleet.ros.runtime.die_with_launcher).
PARENT_PID_VARIABLE = "COVERAGE_FLEET_LAUNCHER_PID"

#: The simulator's exit status when its run ended (duration, settled or stuck) while a
#: robot's controller was not answering: never a clean end with a robot missing.
EXIT_ROBOTS_MISSING = 3
#: The simulator's exit status when SIGTERM or SIGHUP stopped it before its run was over
#: (SIGINT, the operator's Ctrl-C and how launchers stop a whole graph, is a clean stop: 0).
EXIT_STOPPED_EARLY = 4
