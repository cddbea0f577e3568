"""Shared test set-up: every ROS process of this run stays on loopback in its own domain."""

from __future__ import annotations

import os
import random

# Set before any test starts a node or a subprocess, so children inherit them.
os.environ["ROS_AUTOMATIC_DISCOVERY_RANGE"] = "LOCALHOST"
os.environ.setdefault("ROS_DOMAIN_ID", str(random.SystemRandom().randint(5, 95)))
os.environ.setdefault("MPLBACKEND", "Agg")
