"""From what one run's steps reported (and, in the simulator, the truth) to named measurements.

Names carry their unit. Each measurement has a source: `robot` (what the hub measured) or
`truth` (what the simulator knows happened). A run's stop position is where the robot stopped
past the junction line: by the robot, the probed edge distance plus half the tape width; by the
truth, the probing sensor's distance from that line's centre.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from harness.analysis import rms, unit_of, wrap_deg
from harness.session import RunRecord
from harness.suites import Step


@dataclass(frozen=True)
class Measurement:
    name: str
    value: float
    unit: str
    source: str  # "robot" or "truth"

    def as_tuple(self) -> tuple[str, float, str, str]:
        return (self.name, self.value, self.unit, self.source)


def measure_run(steps: tuple[Step, ...], records: list[RunRecord], truths: list[dict[str, Any] | None],
                line_width_mm: float) -> list[Measurement]:
    """Measurements for one run; later steps override earlier ones of the same name."""
    found: dict[tuple[str, str], float] = {}

    def put(name: str, value: Any, source: str) -> None:
        if value is not None and np.isfinite(value):
            found[(name, source)] = float(value)

    for step, record, truth in zip(steps, records, truths):
        result = record.result
        put("duration_s", result.get("duration_s"), "robot")
        if step.routine:
            for key, value in result.items():
                if isinstance(value, (int, float)) and not isinstance(value, bool) and unit_of(key):
                    put(key, value, "robot")
            continue
        p = step.params
        if step.name in ("follow_line", "drive_straight"):
            put("distance_mm", abs(result.get("distance_mm", np.nan)), "robot")
            if truth is not None:
                put("distance_mm", abs(truth["travel_mm"]), "truth")
                put("stop_x_mm", truth["end"]["x_mm"], "truth")
                put("stop_y_mm", truth["end"]["y_mm"], "truth")
        if step.name == "follow_line":
            if len(record.telemetry):
                put("error_rms_pct", rms(record.telemetry.error_pct), "robot")
            if "overrun_measured_mm" in result:
                put("overrun_mm", result["overrun_measured_mm"], "robot")
                # The truth is taken at the sensor on the side where the last junction was seen.
                junctions = [e for e in record.events if e.get("kind") == "junction"]
                seen = str(junctions[-1].get("sides", "")) if junctions else ""
                sensor = p.get("junction_left") if "left" in seen.split("+") else p.get("junction_right")
                crossing = truth["cross_line_end"].get(sensor) if truth is not None and sensor else None
                if crossing is not None:
                    put("overrun_mm", crossing["distance_mm"], "truth")
        elif step.name == "probe_edge":
            edge = result.get("edge_mm")
            if edge is not None:
                put("edge_mm", edge, "robot")
                put("stop_mm", edge + line_width_mm / 2.0, "robot")
            crossing = truth["cross_line_start"].get(p["sensor"]) if truth is not None else None
            if crossing is not None:
                put("edge_mm", crossing["distance_mm"] - crossing["half_width_mm"], "truth")
                put("stop_mm", crossing["distance_mm"], "truth")
        elif step.name == "turn":
            for source, turned in (("robot", result.get("heading_change_deg")),
                                   ("truth", truth["heading_change_deg"] if truth is not None else None)):
                if turned is None:
                    continue
                error = float(wrap_deg(turned - p["angle_deg"]))
                put("turn_deg", turned, source)
                put("angle_error_deg", error, source)
                put("angle_error_abs_deg", abs(error), source)
        elif step.name == "drive_straight":
            put("heading_drift_deg", result.get("heading_change_deg"), "robot")
            if truth is not None:
                put("heading_drift_deg", truth["heading_change_deg"], "truth")
    return [Measurement(name, value, unit_of(name), source) for (name, source), value in found.items()]


def metrics_by_name(runs: list[list[Measurement]], source: str) -> dict[str, np.ndarray]:
    """Per-metric arrays over runs (one value per run that measured it), for the verdicts."""
    values: dict[str, list[float]] = {}
    xy: list[tuple[float, float]] = []
    for measurements in runs:
        mine = {m.name: m.value for m in measurements if m.source == source}
        for name, value in mine.items():
            values.setdefault(name, []).append(value)
        if "stop_x_mm" in mine and "stop_y_mm" in mine:
            xy.append((mine["stop_x_mm"], mine["stop_y_mm"]))
    out = {name: np.asarray(v, dtype=float) for name, v in values.items()}
    if xy:
        out["stop_xy_mm"] = np.asarray(xy, dtype=float)
    return out
