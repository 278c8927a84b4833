"""The mat: how much of a sensor's round footprint lies over the lines, and so what it reads.

A footprint of radius r centred at distance d from a straight strip of half-width h is covered by
the fraction G(d + h) - G(d - h), where G(s) is the share of a disc lying below a chord at offset s
from its centre (circular-segment area; plane geometry). Segments near each point come from a
coarse grid, so a reading costs a few segment distances whatever the size of the course.
"""

from __future__ import annotations

import math
from collections import defaultdict

from harness.sim.course import Line

_CELL_MM = 25.0


def disc_share_below(s: float, radius: float) -> float:
    """Share of a disc of the given radius lying at offset <= s from its centre."""
    if s <= -radius:
        return 0.0
    if s >= radius:
        return 1.0
    t = s / radius
    return 1.0 - (math.acos(t) - t * math.sqrt(1.0 - t * t)) / math.pi


class Mat:
    def __init__(self, lines: tuple[Line, ...], footprint_radius_mm: float) -> None:
        self.lines = lines
        self.radius = footprint_radius_mm
        # Each segment: (line index, ax, ay, dx, dy, length^2, half width).
        self.segments: list[tuple[int, float, float, float, float, float, float]] = []
        self._grid: dict[tuple[int, int], list[int]] = defaultdict(list)
        for line_index, line in enumerate(lines):
            half = line.width_mm / 2.0
            reach = half + footprint_radius_mm
            for (ax, ay), (bx, by) in zip(line.points, line.points[1:]):
                dx, dy = bx - ax, by - ay
                seg = len(self.segments)
                self.segments.append((line_index, ax, ay, dx, dy, dx * dx + dy * dy, half))
                for cell in self._cells_near(ax, ay, bx, by, reach):
                    self._grid[cell].append(seg)

    def _cells_near(self, ax: float, ay: float, bx: float, by: float, reach: float):
        # Every cell the segment's bounding box (grown by reach) touches: a few spare cells, no misses.
        x0, x1 = sorted((ax, bx))
        y0, y1 = sorted((ay, by))
        for i in range(math.floor((x0 - reach) / _CELL_MM), math.floor((x1 + reach) / _CELL_MM) + 1):
            for j in range(math.floor((y0 - reach) / _CELL_MM), math.floor((y1 + reach) / _CELL_MM) + 1):
                yield (i, j)

    def coverage(self, x: float, y: float) -> float:
        """Fraction (0..1) of the footprint centred at (x, y) that lies over a line."""
        candidates = self._grid.get((math.floor(x / _CELL_MM), math.floor(y / _CELL_MM)))
        if not candidates:
            return 0.0
        per_line: dict[int, float] = {}
        radius = self.radius
        for seg in candidates:
            line_index, ax, ay, dx, dy, len2, half = self.segments[seg]
            px, py = x - ax, y - ay
            t = (px * dx + py * dy) / len2 if len2 else 0.0
            t = 0.0 if t < 0.0 else 1.0 if t > 1.0 else t
            ex, ey = px - t * dx, py - t * dy
            d = math.sqrt(ex * ex + ey * ey)
            if d >= half + radius:
                continue
            c = disc_share_below(d + half, radius) - disc_share_below(d - half, radius)
            if c > per_line.get(line_index, 0.0):
                per_line[line_index] = c
        if not per_line:
            return 0.0
        # Separate lines overlap at crossings: combine as independent shares of the footprint.
        uncovered = 1.0
        for c in per_line.values():
            uncovered *= 1.0 - c
        return 1.0 - uncovered

    def nearest_line(self, x: float, y: float, exclude: int | None = None) -> tuple[int, float]:
        """(line index, distance to its centreline) of the nearest line, skipping `exclude`."""
        best = (-1, math.inf)
        for line_index, ax, ay, dx, dy, len2, _half in self.segments:
            if line_index == exclude:
                continue
            px, py = x - ax, y - ay
            t = (px * dx + py * dy) / len2 if len2 else 0.0
            t = min(1.0, max(0.0, t))
            d = math.hypot(px - t * dx, py - t * dy)
            if d < best[1]:
                best = (line_index, d)
        return best
