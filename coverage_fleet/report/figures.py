"""PNG figures of a trial (matplotlib, Agg backend: no display needed)."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt
import numpy as np
from matplotlib.colors import LinearSegmentedColormap
from matplotlib.path import Path as PolygonPath

from coverage_fleet.fleet.trial import RobotLog, TrialLog
from coverage_fleet.geometry.density import Density
from coverage_fleet.geometry.partition import compute_partition
from coverage_fleet.geometry.region import ConvexRegion

#: Robot colours: a hand-picked set of strong hues that stay apart on a pale background.
ROBOT_COLOURS = (
    "#c0392b",
    "#1f6fb2",
    "#e08e0b",
    "#2e8b57",
    "#8e44ad",
    "#d35c9e",
    "#4a4a4a",
    "#17a2b8",
    "#7d5a1e",
    "#6b8e23",
)
#: Density background: white to a muted amber, kept pale so robots and cells stay readable.
DENSITY_COLOURMAP = LinearSegmentedColormap.from_list(
    "coverage_fleet_density", ["#ffffff", "#fae3b8", "#eeb461", "#cf7f2a"]
)
DPI = 120


def robot_colour(index: int) -> str:
    return ROBOT_COLOURS[index % len(ROBOT_COLOURS)]


def _density_grid(region: ConvexRegion, density: Density, cells: int = 160):
    x0, y0, x1, y1 = region.bounds
    xs = np.linspace(x0, x1, cells)
    ys = np.linspace(y0, y1, cells)
    gx, gy = np.meshgrid(xs, ys)
    points = np.column_stack([gx.ravel(), gy.ravel()])
    values = np.asarray(density.evaluate(points), float)
    inside = PolygonPath(region.vertices).contains_points(points, radius=1e-9)
    values = np.where(inside, values, np.nan).reshape(gx.shape)
    return values, (x0, x1, y0, y1)


def plot_trajectories(path: Path, log: TrialLog, region: ConvexRegion, density: Density,
                      map_origin: str | None = None) -> None:
    """Trajectories over the final cells and the density; with `map_origin` (a geodetic
    mission) the axes say that x is east and y north of it."""
    names = list(log.robots)
    final = np.array([log.robots[n].positions()[-1] for n in names])
    partition = compute_partition(final, region, density)
    values, extent = _density_grid(region, density)
    width = extent[1] - extent[0]
    height = extent[3] - extent[2]
    aspect = height / width if width > 0 else 1.0
    fig, ax = plt.subplots(figsize=(8.5, max(4.5, 6.0 * aspect + 1.5)), dpi=DPI)
    peak = float(np.nanmax(values)) if np.isfinite(values).any() else 1.0
    low = float(np.nanmin(values)) if np.isfinite(values).any() else 0.0
    # A uniform density is drawn in a pale tone; otherwise the scale spans 0 to the peak.
    top = peak if peak > low * 1.05 else 2.0 * peak
    image = ax.imshow(values, origin="lower", extent=extent, cmap=DENSITY_COLOURMAP, vmin=0.0,
                      vmax=top if top > 0 else 1.0, alpha=0.9, aspect="equal")
    fig.colorbar(image, ax=ax, shrink=0.8, label="density (importance per m²)")
    outline = np.vstack([region.vertices, region.vertices[:1]])
    ax.plot(outline[:, 0], outline[:, 1], color="black", linewidth=1.8)
    for cell in partition.cells:
        ring = np.vstack([cell, cell[:1]])
        ax.plot(ring[:, 0], ring[:, 1], color="#555555", linewidth=1.1)
    for index, name in enumerate(names):
        robot = log.robots[name]
        track = robot.positions()
        colour = robot_colour(index)
        ax.plot(track[:, 0], track[:, 1], color=colour, linewidth=1.8,
                label=f"{name} ({robot.vehicle_kind})")
        ax.plot(*track[0], marker="o", markersize=8, markerfacecolor="white",
                markeredgecolor=colour, markeredgewidth=2)
        ax.plot(*track[-1], marker="D", markersize=7, color=colour, markeredgecolor="black")
        centroid = partition.centroids[index]
        ax.plot(*centroid, marker="+", markersize=12, color="black", markeredgewidth=1.6)
    if map_origin is None:
        ax.set_xlabel("x (m, map frame)")
        ax.set_ylabel("y (m, map frame)")
    else:
        ax.set_xlabel(f"x: metres east of the map origin {map_origin}")
        ax.set_ylabel("y: metres north of the map origin")
    ax.set_title(f"{log.mission_name}: paths over the final cells\n"
                 "open circle = start, diamond = end, + = centroid of the final cell",
                 fontsize=10)
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.12), ncol=3, fontsize=8,
              frameon=False)
    fig.tight_layout()
    fig.savefig(path, bbox_inches="tight")
    plt.close(fig)


def plot_cost(path: Path, log: TrialLog) -> None:
    """Coverage cost against time, gate openings marked."""
    fig, ax = plt.subplots(figsize=(8, 4), dpi=DPI)
    openings = [o for o in log.openings if o.reason == "progress"]
    if openings:
        ax.plot([o.time for o in openings], [o.cost for o in openings], linestyle="none",
                marker="o", markersize=3.5, color="#c0392b", alpha=0.6, zorder=2,
                label=f"gate opening ({len(openings)}): cost at the positions used")
    ax.plot(log.time, log.cost, color="#1f6fb2", linewidth=1.4, zorder=3,
            label="cost H at current positions")
    for k, change in enumerate(o for o in log.openings if o.reason == "density"):
        # A new density: the cost is measured with another phi from here on and may jump.
        ax.axvline(change.time, color="#8e44ad", linestyle="--", linewidth=1.2,
                   label="density update (new generation)" if k == 0 else None)
    if min(log.cost, default=0.0) > 0:
        ax.set_yscale("log")
    if log.settled_time is not None:
        ax.axvline(log.settled_time, color="#2e8b57", linestyle=":",
                   label="fleet settled within tolerance")
    ax.set_xlabel("simulated time (s)")
    ax.set_ylabel("coverage cost H (log scale)")
    ax.set_title(f"{log.mission_name}: coverage cost ({len(log.openings)} generations)",
                 fontsize=10)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


def plot_distances(path: Path, log: TrialLog, settle_distance: float) -> None:
    """Each robot's distance to its committed target over time."""
    fig, ax = plt.subplots(figsize=(8, 4), dpi=DPI)
    floor = settle_distance / 50.0
    for index, (name, robot) in enumerate(log.robots.items()):
        shown = np.maximum(np.asarray(robot.distance, float), floor)
        ax.plot(robot.time, shown, color=robot_colour(index), linewidth=1.3, label=name)
    ax.axhline(settle_distance, color="black", linestyle="--", linewidth=1,
               label=f"settle distance {settle_distance:g} m (to the current cell's centroid)")
    ax.set_yscale("log")
    ax.set_ylim(bottom=floor)
    ax.set_xlabel("simulated time (s)")
    ax.set_ylabel(f"distance to target (m, log scale, floor {floor:.2g} m)")
    ax.set_title(f"{log.mission_name}: distance to committed target", fontsize=10)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, ncol=2)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


def plot_solve_times(path: Path, log: TrialLog) -> None:
    """Distribution of each robot's MPC solve times."""
    names = list(log.robots)
    samples = [1e3 * log.robots[n].solve_times() for n in names]
    fig, ax = plt.subplots(figsize=(8, 4), dpi=DPI)
    # Matplotlib 3.10 renamed `vert=False` to `orientation="horizontal"`.
    version = tuple(int(v) for v in matplotlib.__version__.split(".")[:2])
    sideways = {"orientation": "horizontal"} if version >= (3, 10) else {"vert": False}
    parts = ax.boxplot(samples, patch_artist=True, showfliers=True, **sideways)
    ax.set_yticks(range(1, len(names) + 1), names)
    for index, box in enumerate(parts["boxes"]):
        box.set_facecolor(robot_colour(index))
        box.set_alpha(0.55)
    # A log without solve times (a robot whose controller never ran) cannot be log-scaled.
    positive = [v for sample in samples for v in sample if v > 0]
    if positive:
        ax.set_xscale("log")
    ax.set_xlabel("solve time (ms, log scale)" if positive else "solve time (ms)")
    ax.set_title(f"{log.mission_name}: MPC solve times per robot", fontsize=10)
    ax.grid(alpha=0.3, axis="x")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


@dataclass(frozen=True)
class MotionSeries:
    """One robot's planar motion over a run, from its logged positions (and yaw)."""

    time: np.ndarray
    #: speed along the robot's heading (m/s): negative while it drives backwards; robots
    #: without a yaw state (point-mass models) have no backwards: their planar speed
    speed: np.ndarray
    #: yaw (deg, -180..180) where the model has one, else the direction of travel (NaN at rest)
    heading_deg: np.ndarray
    has_yaw: bool


#: Below this planar speed (m/s) a robot without a yaw state has no direction of travel.
AT_REST_SPEED = 1e-3


def motion_series(robot: RobotLog) -> MotionSeries:
    """Velocity from the logged positions by finite differences (central inside, one-sided
    at the ends: numpy.gradient), so every vehicle model is treated alike and the figure
    shows what the robot did, not what it was told."""
    t = np.asarray(robot.time, float)
    p = robot.positions()
    if len(t) < 2:
        empty = np.full(len(t), np.nan)
        return MotionSeries(t, empty, empty, "yaw" in robot.state_names)
    velocity = np.gradient(p, t, axis=0)
    if "yaw" in robot.state_names:
        yaw = np.asarray(robot.state, float)[:, robot.state_names.index("yaw")]
        speed = velocity[:, 0] * np.cos(yaw) + velocity[:, 1] * np.sin(yaw)
        heading = np.degrees(np.arctan2(np.sin(yaw), np.cos(yaw)))
        return MotionSeries(t, speed, heading, True)
    speed = np.hypot(velocity[:, 0], velocity[:, 1])
    heading = np.degrees(np.arctan2(velocity[:, 1], velocity[:, 0]))
    return MotionSeries(t, speed, np.where(speed > AT_REST_SPEED, heading, np.nan), False)


def plot_motion(path: Path, log: TrialLog) -> dict[str, MotionSeries]:
    """Speed along the heading and heading against time, per robot; stretches driven
    backwards are shaded and counted in the legend. Returns the plotted series."""
    series = {name: motion_series(robot) for name, robot in log.robots.items()}
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(8, 6), dpi=DPI, sharex=True)
    for index, (name, motion) in enumerate(series.items()):
        colour = robot_colour(index)
        backwards = motion.speed < 0
        share = float(np.mean(backwards)) if len(backwards) else 0.0
        label = name if not motion.has_yaw else f"{name} (backwards {100 * share:.0f}% of samples)"
        top.plot(motion.time, motion.speed, color=colour, linewidth=1.2, label=label)
        top.fill_between(motion.time, motion.speed, 0.0, where=backwards, color=colour,
                         alpha=0.25, linewidth=0)
        bottom.plot(motion.time, motion.heading_deg, color=colour, linewidth=1.0,
                    marker=".", markersize=1.5, linestyle="none")
    top.axhline(0.0, color="black", linewidth=0.8)
    top.set_ylabel("speed along heading (m/s)\nbelow 0 = backwards")
    top.set_title(f"{log.mission_name}: speed and heading (from logged positions)",
                  fontsize=10)
    top.grid(alpha=0.3)
    top.legend(fontsize=8, ncol=2)
    bottom.set_ylim(-185, 185)
    bottom.set_yticks([-180, -90, 0, 90, 180])
    bottom.set_ylabel("heading (deg, yaw;\nno yaw: direction of travel)")
    bottom.set_xlabel("time (s)")
    bottom.grid(alpha=0.3)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return series


def plot_clearance(
    path: Path, log: TrialLog, footprints: dict[str, float] | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """The smallest clearance between any two robots against time (footprint discs; centre
    distance without footprints): at the logged states and, offline, at every plant
    substep; zero and below means footprints overlap, shaded red and named in the title.
    Returns the plotted (times, clearance) of the logged states."""
    from coverage_fleet.report.metrics import clearance_over_time, plant_clearance_over_time

    times, clearance = clearance_over_time(log, footprints)
    fine_times, fine = plant_clearance_over_time(log) if footprints is not None else (
        np.zeros(0), np.zeros(0))
    what = "clearance between footprints" if footprints is not None else "centre distance"
    fig, ax = plt.subplots(figsize=(8, 3.5), dpi=DPI)
    if len(fine):
        ax.plot(fine_times, fine, color="#8e44ad", linewidth=0.9, alpha=0.8,
                label="smallest over each plant step's substeps")
    ax.plot(times, clearance, color="#1f6fb2", linewidth=1.3,
            label=f"smallest {what} over all pairs (logged states)")
    ax.axhline(0.0, color="#c0392b", linestyle="--", linewidth=1, label="touching")
    every_time = np.concatenate([times, fine_times])
    every_value = np.concatenate([clearance, fine])
    overlap = footprints is not None and bool(np.any(every_value < 0))
    if np.isfinite(every_value).any():
        k = int(np.nanargmin(every_value))
        ax.plot(every_time[k], every_value[k], marker="v", color="#c0392b", linestyle="none",
                label=f"smallest {every_value[k]:.3f} m at {every_time[k]:.1f} s")
    if overlap:
        low = min(float(np.nanmin(every_value)), -0.01)
        ax.axhspan(low * 1.1, 0.0, color="#c0392b", alpha=0.15, linewidth=0)
        ax.set_title(f"{log.mission_name}: FOOTPRINTS OVERLAP (smallest clearance "
                     f"{np.nanmin(every_value):.3f} m)", fontsize=11, color="#c0392b",
                     fontweight="bold")
    else:
        ax.set_title(f"{log.mission_name}: how close the robots came to each other",
                     fontsize=10)
    ax.set_xlabel("time (s)")
    ax.set_ylabel(f"smallest {what} (m)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return times, clearance
