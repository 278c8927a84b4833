"""The course file (TOML): the mat's lines, the start pose, and the simulated robot's true,
imperfect parameters, which differ from the team's profile on purpose.

    name = "..."
    [start] x_mm, y_mm, heading_deg           # heading clockwise from +y (the mat's "up")
    [[lines]] name, width_mm, points = [[x, y], ...], closed = false
    [truth] wheel_left_diameter_mm, wheel_right_diameter_mm, track_mm, ... (see TRUTH_DEFAULTS)
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from harness.tomlfile import Table, load_toml

# The simulated robot's true parameters, with defaults for a small robot in good order.
# Reflectance: black tape about 30 %, white mat about 90 % (a fact of the trade, common practice).
TRUTH_DEFAULTS: dict[str, float] = {
    "wheel_left_diameter_mm": 56.0,
    "wheel_right_diameter_mm": 56.0,
    "track_mm": 112.0,
    "motor_lag_s": 0.06,          # first-order time constant of a motor reaching its speed
    "brake_lag_s": 0.025,         # after power 0: coasting distance = speed x this, grows with speed
    "top_speed_dps": 900.0,       # motor degrees per second at full power on a full battery
    "battery_full_mv": 8300.0,
    "battery_start_mv": 8000.0,
    "battery_drain_mv_per_s": 0.8,
    "turn_slip": 0.0,             # fraction of differential wheel motion lost to slip in turns
    "gyro_bias_dps": 0.0,
    "gyro_drift_dps_per_sqrt_s": 0.0,
    "gyro_noise_deg": 0.0,
    "black_pct": 30.0,
    "white_pct": 90.0,
    "sensor_noise_pct": 0.0,
    "sensor_radius_mm": 4.0,
    "placement_sd_mm": 0.0,
    "placement_sd_deg": 0.0,
}


@dataclass(frozen=True)
class Line:
    name: str
    points: tuple[tuple[float, float], ...]
    width_mm: float


@dataclass(frozen=True)
class Pose:
    x_mm: float
    y_mm: float
    heading_deg: float


@dataclass(frozen=True)
class Course:
    name: str
    lines: tuple[Line, ...]
    start: Pose
    truth: dict[str, float]
    source: str = ""


def load_course(path: str | Path) -> Course:
    return course_from_table(load_toml(path))


def course_from_table(t: Table) -> Course:
    name = t.str("name", "course")
    default_width = t.num("line_width_mm", 19.0, positive=True, high=200)
    start_t = t.table("start")
    start = Pose(start_t.num("x_mm"), start_t.num("y_mm"), start_t.num("heading_deg", 0.0))
    start_t.done()
    lines: list[Line] = []
    for line_t in t.tables("lines"):
        line_name = line_t.str("name", f"line{len(lines) + 1}")
        width = line_t.num("width_mm", default_width, positive=True, high=200)
        raw = line_t.raw("points")
        if not isinstance(raw, list) or len(raw) < 2:
            raise line_t.error("points", "expected at least two [x, y] points")
        points = []
        for i, point in enumerate(raw):
            ok = isinstance(point, list) and len(point) == 2 and all(
                isinstance(v, (int, float)) and not isinstance(v, bool) for v in point)
            if not ok:
                raise line_t.error(f"points[{i}]", f"expected [x_mm, y_mm], got {point!r}")
            points.append((float(point[0]), float(point[1])))
        if line_t.bool("closed", False):
            points.append(points[0])
        lines.append(Line(line_name, tuple(points), width))
        line_t.done()
    if not lines:
        raise t.error("lines", "a course needs at least one line")
    truth = dict(TRUTH_DEFAULTS)
    if t.has("truth"):
        truth_t = t.table("truth")
        for key in TRUTH_DEFAULTS:
            if truth_t.has(key):
                positive = key.endswith(("diameter_mm", "track_mm", "_lag_s", "top_speed_dps", "radius_mm"))
                truth[key] = truth_t.num(key, positive=positive, low=None if positive else 0.0)
        truth_t.done()
    if not truth["black_pct"] < truth["white_pct"] <= 100:
        raise t.error("truth.white_pct", "expected black_pct < white_pct <= 100")
    t.done()
    return Course(name, tuple(lines), start, truth, t.file)
