"""coverage_fleet: density-weighted coverage with a fleet of MPC-controlled robots.

Layers (dependencies point downward only): cli/report -> ros -> fleet -> control ->
vehicles -> geometry. Nothing below `ros` imports rclpy.
"""

__version__ = "0.1.0"
