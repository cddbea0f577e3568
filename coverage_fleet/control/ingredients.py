"""The terminal ingredients as plain data (computed by terminal.py, used by mpc.py)."""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from coverage_fleet.vehicles.settings import TerminalKind


@dataclass(frozen=True)
class TerminalIngredients:
    """Terminal cost V_f(e) = e' P e and set {e : e' P e <= alpha} (e: error to the steady
    state in the steady frame, see frames.steady_frame_error), or the equality x_N = x_s.

    For `equality` the matrices are None and `reason` says why the ellipsoid is not used."""

    kind: TerminalKind
    P: np.ndarray | None = None
    alpha: float = 0.0
    K: np.ndarray | None = None
    #: The DARE solution for the stage cost; P = (1 + terminal_decrease_slack) * P_lqr.
    P_lqr: np.ndarray | None = None
    #: Largest [V_f(f(x, k(x))) - V_f(x) + l(x, k(x))] / V_f(x) found over the set by
    #: sampling (<= 0: the decrease condition holds; the check also maximises it locally).
    decrease_margin: float = 0.0
    #: Level allowed by each limit under u = u_s + K e, and by the decrease condition.
    limit_levels: dict[str, float] = field(default_factory=dict)
    #: Name of the entry of limit_levels that set alpha.
    active_limit: str = ""
    #: Largest distance of a terminal-set position from the steady position (metres).
    position_extent: float = 0.0
    reason: str = ""
    content_hash: str = ""

    def within_extent(self, extent: float) -> TerminalIngredients:
        """The same ellipsoid at a lower level, so that its positions stay within `extent`
        metres of the steady position (the extent scales with sqrt(alpha)). A sublevel set
        of a valid terminal set is valid too: it lies inside the limits, and V_f decreases
        under K along the whole set, so no trajectory leaves a smaller level (Chen &
        Allgower, Automatica 34(10), 1998, the argument of section 3 holds for every level
        up to alpha). Unchanged when already small enough, or for `equality`."""
        if self.kind != "ellipsoid" or self.position_extent <= extent:
            return self
        scale = (extent / self.position_extent) ** 2
        return replace(
            self,
            alpha=self.alpha * scale,
            position_extent=extent,
            active_limit=f"{self.active_limit}; level lowered to a {extent:g} m extent",
        )

    @staticmethod
    def equality(reason: str, content_hash: str = "") -> TerminalIngredients:
        return TerminalIngredients(kind="equality", reason=reason, content_hash=content_hash)

    def to_json(self) -> dict[str, Any]:
        def matrix(m: np.ndarray | None) -> list[list[float]] | None:
            return None if m is None else np.asarray(m, dtype=float).tolist()

        return {
            "kind": self.kind,
            "P": matrix(self.P),
            "alpha": self.alpha,
            "K": matrix(self.K),
            "P_lqr": matrix(self.P_lqr),
            "decrease_margin": self.decrease_margin,
            "limit_levels": dict(self.limit_levels),
            "active_limit": self.active_limit,
            "position_extent": self.position_extent,
            "reason": self.reason,
            "content_hash": self.content_hash,
        }

    @staticmethod
    def from_json(data: dict[str, Any]) -> TerminalIngredients:
        def matrix(m: Any) -> np.ndarray | None:
            return None if m is None else np.array(m, dtype=float)

        return TerminalIngredients(
            kind=data["kind"],
            P=matrix(data["P"]),
            alpha=float(data["alpha"]),
            K=matrix(data["K"]),
            P_lqr=matrix(data["P_lqr"]),
            decrease_margin=float(data["decrease_margin"]),
            limit_levels={str(k): float(v) for k, v in data["limit_levels"].items()},
            active_limit=str(data["active_limit"]),
            position_extent=float(data["position_extent"]),
            reason=str(data["reason"]),
            content_hash=str(data["content_hash"]),
        )
