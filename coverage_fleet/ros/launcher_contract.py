"""What the package's launcher (coverage_fleet.cli.launcher) and the node processes it
starts agree on. No rclpy here, so the launcher can import it cheaply."""

from __future__ import annotations

#: Set by the launcher to its own pid in every node's environment: the node asks Linux to
#: stop it when the launcher dies (coverage_fleet.ros.runtime.die_with_launcher).
PARENT_PID_VARIABLE = "COVERAGE_FLEET_LAUNCHER_PID"
