"""Progress bookkeeping for the reference gate's rule: one home for "distance at commit",
"no farther" and "closer".

The gate (control/gate.py), the per-robot controller loop (control/sampling.py, which sends
the progress reports) and the trial log all judge progress here, so that a robot's flags
read the same wherever they are computed:

    no farther:  d(now) <= d(commit) + noise_tolerance
    closer:      d(now) <= d(commit) - progress_tolerance

`ProgressTracker` is one robot's view of its committed target: the target, the key that
names its generation (the gate's generation number offline, the target's stamp on the
wire) and the distance recorded at the commit (given by the gate, or the first distance
measured after the target arrived). Plain Python and numpy.
"""

from __future__ import annotations

from collections.abc import Hashable
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class RobotProgress:
    """One robot's standing against the distance recorded when its target was committed."""

    distance_at_commit: float
    distance_now: float | None
    no_farther: bool
    closer: bool


def judge(
    distance_at_commit: float,
    distance_now: float | None,
    noise_tolerance: float,
    progress_tolerance: float,
) -> RobotProgress:
    """The gate's two flags for one robot (both False before the robot has reported)."""
    known = distance_now is not None
    return RobotProgress(
        distance_at_commit=float(distance_at_commit),
        distance_now=None if distance_now is None else float(distance_now),
        no_farther=known and distance_now <= distance_at_commit + noise_tolerance,
        closer=known and distance_now <= distance_at_commit - progress_tolerance,
    )


class ProgressTracker:
    """One robot's committed target and its progress towards it."""

    def __init__(self, noise_tolerance: float, progress_tolerance: float) -> None:
        self.noise_tolerance = float(noise_tolerance)
        self.progress_tolerance = float(progress_tolerance)
        self.key: Hashable | None = None
        self.target: np.ndarray | None = None
        self.distance_at_commit: float | None = None

    def commit(
        self, key: Hashable, target: np.ndarray, distance_at_commit: float | None = None
    ) -> None:
        """A target arrives. A new key starts a new generation: its distance at commit is the
        one given, else the first distance observed. The same key again (a latched target
        delivered twice) keeps what was recorded."""
        if key != self.key:
            self.key = key
            self.distance_at_commit = (
                None if distance_at_commit is None else float(distance_at_commit)
            )
        self.target = np.asarray(target, float).copy()

    def observe(self, position: np.ndarray) -> RobotProgress | None:
        """Progress at `position` (None before the first target)."""
        if self.target is None:
            return None
        distance = float(np.linalg.norm(np.asarray(position, float) - self.target))
        if self.distance_at_commit is None:
            self.distance_at_commit = distance
        return judge(
            self.distance_at_commit, distance, self.noise_tolerance, self.progress_tolerance
        )
