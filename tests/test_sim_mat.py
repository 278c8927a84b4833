"""The simulated mat's reflectance model, checked against brute-force area counting."""

from __future__ import annotations

import numpy as np
import pytest

from harness.sim.course import Line
from harness.sim.mat import Mat, disc_share_below


def grid_share(d_mm: float, half_width_mm: float, radius_mm: float, n: int = 801) -> float:
    """Share of a disc centred d_mm from a strip's centreline lying on the strip, by counting
    points of a fine grid (an independent check of the circular-segment formula)."""
    u = np.linspace(-radius_mm, radius_mm, n)
    x, y = np.meshgrid(u, u)
    inside = x**2 + y**2 <= radius_mm**2
    on_strip = np.abs(y + d_mm) <= half_width_mm
    return float((inside & on_strip).sum() / inside.sum())


@pytest.mark.parametrize("d_mm", [0.0, 3.0, 7.5, 9.5, 11.0, 13.4, 20.0])
def test_footprint_coverage_matches_area_counting(d_mm):
    mat = Mat((Line("tape", ((0.0, 0.0), (1000.0, 0.0)), 19.0),), footprint_radius_mm=4.0)
    assert mat.coverage(500.0, d_mm) == pytest.approx(grid_share(d_mm, 9.5, 4.0), abs=0.003)


def test_disc_share_is_a_proper_distribution():
    assert disc_share_below(-5.0, 4.0) == 0.0 and disc_share_below(5.0, 4.0) == 1.0
    assert disc_share_below(0.0, 4.0) == pytest.approx(0.5)
    values = [disc_share_below(s, 4.0) for s in np.linspace(-4, 4, 50)]
    assert all(b >= a for a, b in zip(values, values[1:]))


def test_crossing_lines_combine_and_nearest_line_skips_the_followed_one():
    mat = Mat((Line("main", ((0.0, 0.0), (400.0, 0.0)), 19.0), Line("cross", ((200.0, -100.0), (200.0, 100.0)), 19.0)),
              footprint_radius_mm=4.0)
    assert mat.coverage(200.0, 0.0) == pytest.approx(1.0)
    assert mat.coverage(100.0, 50.0) == 0.0
    assert mat.nearest_line(260.0, 0.0) == (0, 0.0)
    index, distance = mat.nearest_line(260.0, 0.0, exclude=0)
    assert index == 1 and distance == pytest.approx(60.0)
