"""The inner loop of the bounded Voronoi partition, compiled (numba): each agent's cell is
the region clipped by the bisector of every agent that can still cut it.

Which agents can cut a cell: the bisector of p and p + n lies at distance |n| / 2 from p,
so it misses a cell whose vertices q all have |q| < |n| / 2 (n . q <= |n| |q| < |n|^2 / 2).
Agents are put in a uniform grid of square buckets (about two per bucket) and each cell
visits the buckets ring by ring around its own, nearest agents of a ring first, until
the next ring is farther than twice the cell's farthest vertex (bucketing: common
practice). No triangulation is needed, so collinear agents take the same path as any
other.

Why compiled: as batched numpy (one clipping pass per neighbour rank over all cells,
candidates from a Delaunay triangulation) a thousand agents cost ~25 ms, most of it
temporaries; one loop per cell costs well under a millisecond in all.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

#: A candidate is skipped only when the cell's farthest vertex is below this fraction of
#: half its distance, so rounding cannot hide a real cut.
PRUNE_MARGIN = 1.0 - 1e-9
#: Agents per bucket, on average over the agents' bounding box.
AGENTS_PER_BUCKET = 2.0


@njit(cache=True)
def _clip(current, count, following, nx, ny, offset):  # pragma: no cover
    """Sutherland-Hodgman against n . q <= offset: `current[:count]` clipped into
    `following` (a vertex stays when its signed distance is <= 0). Returns the new count,
    0 when fewer than three vertices remain."""
    produced = 0
    for s in range(count):
        t_next = s + 1 if s + 1 < count else 0
        start = current[s, 0] * nx + current[s, 1] * ny - offset
        finish = current[t_next, 0] * nx + current[t_next, 1] * ny - offset
        start_in = start <= 0.0
        if start_in:
            following[produced, 0] = current[s, 0]
            following[produced, 1] = current[s, 1]
            produced += 1
        if start_in != (finish <= 0.0):
            t = start / (start - finish)
            following[produced, 0] = current[s, 0] + t * (current[t_next, 0] - current[s, 0])
            following[produced, 1] = current[s, 1] + t * (current[t_next, 1] - current[s, 1])
            produced += 1
    return produced if produced >= 3 else 0


@njit(cache=True)
def _sort_by_distance(candidates, squared, found):  # pragma: no cover
    """Insertion sort of the first `found` candidates by squared distance, in place (a
    ring holds a few dozen agents; a library sort costs more to compile than to run)."""
    for a in range(1, found):
        key, who = squared[a], candidates[a]
        b = a - 1
        while b >= 0 and squared[b] > key:
            squared[b + 1], candidates[b + 1] = squared[b], candidates[b]
            b -= 1
        squared[b + 1], candidates[b + 1] = key, who


@njit(cache=True)
def _reach(current, count):  # pragma: no cover
    """Squared distance of the farthest vertex (the cell is held about its agent)."""
    reach = 0.0
    for v in range(count):
        reach = max(reach, current[v, 0] ** 2 + current[v, 1] ** 2)
    return reach


@njit(cache=True)
def clip_cells(kept, region_vertices, repeat_tolerance):  # pragma: no cover
    """Cells of the agents `kept` (m, 2; distinct, inside the region). Returns vertices
    (total, 2) in map coordinates, cell after cell, and counts (m,), 0 for an empty cell.
    Each cell is built about its own agent (precision far from the map origin); at the
    end, vertices within `repeat_tolerance` of their predecessor are dropped (a bisector
    through an existing vertex leaves a copy a rounding error away; consumers want simple
    polygons)."""
    m, k = len(kept), len(region_vertices)
    low_x, low_y = kept[:, 0].min(), kept[:, 1].min()
    span = max(kept[:, 0].max() - low_x, kept[:, 1].max() - low_y)
    per_axis = max(1, int(math.sqrt(m / AGENTS_PER_BUCKET)))
    size = span / per_axis if span > 0.0 else 1.0
    columns = int((kept[:, 0].max() - low_x) / size) + 1
    rows = int((kept[:, 1].max() - low_y) / size) + 1
    bucket_x = np.empty(m, dtype=np.int64)
    bucket_y = np.empty(m, dtype=np.int64)
    first = np.zeros(rows * columns + 1, dtype=np.int64)
    for i in range(m):
        bucket_x[i] = min(int((kept[i, 0] - low_x) / size), columns - 1)
        bucket_y[i] = min(int((kept[i, 1] - low_y) / size), rows - 1)
        first[bucket_y[i] * columns + bucket_x[i] + 1] += 1
    for b in range(rows * columns):
        first[b + 1] += first[b]
    members = np.empty(m, dtype=np.int64)
    fill = first[:-1].copy()
    for i in range(m):
        b = bucket_y[i] * columns + bucket_x[i]
        members[fill[b]] = i
        fill[b] += 1

    width = k + m + 2  # a convex polygon cut by c lines has at most k + c vertices
    current = np.empty((width, 2))
    following = np.empty((width, 2))
    candidates = np.empty(m, dtype=np.int64)
    squared = np.empty(m)
    vertices = np.empty((max(8 * m, 64), 2))
    counts = np.zeros(m, dtype=np.int64)
    total = 0
    for i in range(m):
        px, py = kept[i, 0], kept[i, 1]
        for v in range(k):
            current[v, 0] = region_vertices[v, 0] - px
            current[v, 1] = region_vertices[v, 1] - py
        count = k
        reach = _reach(current, count)
        bx, by = bucket_x[i], bucket_y[i]
        widest = max(bx, columns - 1 - bx, by, rows - 1 - by)
        ring = 0
        while ring <= widest and count > 0:
            # Agents of rings >= `ring` are at least (ring - 1) buckets away.
            if ring > 1 and 4.0 * reach < ((ring - 1) * size) ** 2 * PRUNE_MARGIN:
                break
            found = 0
            for y in range(max(by - ring, 0), min(by + ring, rows - 1) + 1):
                on_edge = y == by - ring or y == by + ring
                step = 1 if on_edge else 2 * ring
                x = bx - ring
                while x <= bx + ring:
                    if 0 <= x < columns:
                        b = y * columns + x
                        for slot in range(first[b], first[b + 1]):
                            j = members[slot]
                            if j != i:
                                candidates[found] = j
                                squared[found] = (kept[j, 0] - px) ** 2 + (kept[j, 1] - py) ** 2
                                found += 1
                    x += step
            _sort_by_distance(candidates, squared, found)
            for slot in range(found):
                if 4.0 * reach < squared[slot] * PRUNE_MARGIN:
                    break  # this bisector and the rest of the ring's miss the cell
                j = candidates[slot]
                count = _clip(current, count, following, kept[j, 0] - px, kept[j, 1] - py,
                              0.5 * squared[slot])
                current, following = following, current
                if count == 0:
                    break
                reach = _reach(current, count)
            ring += 1
        if total + count > len(vertices):
            grown = np.empty((2 * (total + count), 2))
            for v in range(total):  # element loops: slice assignment is slow to compile
                grown[v, 0], grown[v, 1] = vertices[v, 0], vertices[v, 1]
            vertices = grown
        kept_count = 0
        for v in range(count):
            before = v - 1 if v > 0 else count - 1
            gap = math.hypot(current[v, 0] - current[before, 0],
                             current[v, 1] - current[before, 1])
            if gap > repeat_tolerance:
                vertices[total + kept_count, 0] = current[v, 0] + px
                vertices[total + kept_count, 1] = current[v, 1] + py
                kept_count += 1
        if kept_count >= 3:
            counts[i] = kept_count
            total += kept_count
    return vertices[:total].copy(), counts
