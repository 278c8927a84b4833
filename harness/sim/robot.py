"""The simulated robot: a differential drive whose true parameters differ from the team's profile,
and the board adapter through which the unchanged hub listener drives it.

Frames: the mat has x to the right and y up, in mm. Headings are clockwise from +y, in degrees,
so "forward" is (sin h, cos h) and "left" is (-cos h, sin h). The robot's reference point is the
midpoint of its axle. Time is virtual, in integer microseconds.
"""

from __future__ import annotations

import math
import random
from dataclasses import dataclass

from harness.profile import RobotProfile
from harness.sim.course import Course, Pose
from harness.sim.mat import Mat
from hub_side.board import Board


@dataclass
class TruePose:
    x_mm: float
    y_mm: float
    heading_deg: float

    def as_dict(self) -> dict[str, float]:
        return {"x_mm": round(self.x_mm, 3), "y_mm": round(self.y_mm, 3),
                "heading_deg": round(self.heading_deg, 3)}


class SimRobot:
    """Physics of the robot on the mat. Everything random comes from one seeded generator."""

    def __init__(self, course: Course, profile: RobotProfile, rng: random.Random) -> None:
        self.course = course
        self.truth = course.truth
        self.rng = rng
        self.mat = Mat(course.lines, self.truth["sensor_radius_mm"])
        self.sensor_places = {name: (s.forward_mm, s.left_mm) for name, s in profile.sensors.items()}
        self.t_us = 0
        self.battery_mv = self.truth["battery_start_mv"]
        self.power = (0.0, 0.0)
        self.wheel_dps = [0.0, 0.0]
        self.wheel_deg = [0.0, 0.0]
        self.gyro_bias_dps = self.truth["gyro_bias_dps"]
        self.gyro_deg = 0.0
        self.travel_mm = 0.0
        self.pose = TruePose(course.start.x_mm, course.start.y_mm, course.start.heading_deg)
        self._cache_t = -1
        self._cache: dict[str, int] = {}
        self._gyro_reading = 0.0

    def place(self, pose: Pose, exact: bool = False) -> None:
        """Put the robot down at a pose, with the course's placement error unless exact."""
        sd_mm = 0.0 if exact else self.truth["placement_sd_mm"]
        sd_deg = 0.0 if exact else self.truth["placement_sd_deg"]
        self.pose = TruePose(pose.x_mm + self.rng.gauss(0.0, sd_mm),
                             pose.y_mm + self.rng.gauss(0.0, sd_mm),
                             pose.heading_deg + self.rng.gauss(0.0, sd_deg))
        self.wheel_dps = [0.0, 0.0]
        self._cache_t = -1

    def advance(self, dt_us: int) -> None:
        """Integrate the motors, the body and the gyro over dt_us of virtual time."""
        if dt_us <= 0:
            return
        truth = self.truth
        dt = dt_us / 1e6
        top_dps = truth["top_speed_dps"] * self.battery_mv / truth["battery_full_mv"]
        moved = [0.0, 0.0]
        for side in (0, 1):
            target = self.power[side] / 100.0 * top_dps
            tau = truth["motor_lag_s"] if self.power[side] else truth["brake_lag_s"]
            start = self.wheel_dps[side]
            k = math.exp(-dt / tau)
            end = target + (start - target) * k
            # Exact integral of the first-order response over the step.
            moved[side] = target * dt + (start - target) * tau * (1.0 - k)
            self.wheel_dps[side] = end
            self.wheel_deg[side] += moved[side]
        left_mm = moved[0] * math.pi * truth["wheel_left_diameter_mm"] / 360.0
        right_mm = moved[1] * math.pi * truth["wheel_right_diameter_mm"] / 360.0
        forward_mm = (left_mm + right_mm) / 2.0
        # Clockwise rotation: the left wheel running ahead of the right; slip eats part of it.
        turn_rad = (left_mm - right_mm) / truth["track_mm"] * (1.0 - truth["turn_slip"])
        pose = self.pose
        mid = math.radians(pose.heading_deg) + turn_rad / 2.0
        pose.x_mm += forward_mm * math.sin(mid)
        pose.y_mm += forward_mm * math.cos(mid)
        pose.heading_deg += math.degrees(turn_rad)
        self.travel_mm += forward_mm
        drift = truth["gyro_drift_dps_per_sqrt_s"]
        if drift:
            self.gyro_bias_dps += self.rng.gauss(0.0, drift * math.sqrt(dt))
        self.gyro_deg += math.degrees(turn_rad) + self.gyro_bias_dps * dt
        busy = abs(self.power[0]) + abs(self.power[1])
        self.battery_mv -= truth["battery_drain_mv_per_s"] * dt * (0.3 + busy / 200.0)
        self.t_us += dt_us

    # ------------------------------------------------------------ what sensors see

    def sensor_xy(self, name: str) -> tuple[float, float]:
        forward, left = self.sensor_places[name]
        h = math.radians(self.pose.heading_deg)
        sin_h, cos_h = math.sin(h), math.cos(h)
        return (self.pose.x_mm + forward * sin_h - left * cos_h,
                self.pose.y_mm + forward * cos_h + left * sin_h)

    def _refresh(self) -> None:
        # Readings are taken once per instant, so re-reading within a control step is consistent.
        self._cache_t = self.t_us
        self._cache.clear()
        noise = self.truth["gyro_noise_deg"]
        self._gyro_reading = self.gyro_deg + (self.rng.gauss(0.0, noise) if noise else 0.0)

    def reflectance_pct(self, name: str) -> int:
        if self._cache_t != self.t_us:
            self._refresh()
        value = self._cache.get(name)
        if value is None:
            truth = self.truth
            x, y = self.sensor_xy(name)
            share = self.mat.coverage(x, y)
            raw = truth["white_pct"] - (truth["white_pct"] - truth["black_pct"]) * share
            noise = truth["sensor_noise_pct"]
            if noise:
                raw += self.rng.gauss(0.0, noise)
            value = min(100, max(0, round(raw)))  # 1 % quantisation
            self._cache[name] = value
        return value

    def gyro_heading_deg(self) -> float:
        if self._cache_t != self.t_us:
            self._refresh()
        return self._gyro_reading

    def encoders_deg(self) -> tuple[int, int]:
        # Encoders count whole degrees.
        return (math.floor(self.wheel_deg[0]), math.floor(self.wheel_deg[1]))

    # ------------------------------------------------------------ truth helpers

    def followed_line(self) -> int:
        """Index of the line under the robot's axle midpoint (the one it follows)."""
        return self.mat.nearest_line(self.pose.x_mm, self.pose.y_mm)[0]


class SimBoard(Board):
    """The hub's board interface over the simulated robot and an in-memory byte link."""

    capabilities = {"gyro": True, "battery": True, "simulated": True}

    def __init__(self, robot: SimRobot, sensor_names: tuple[str, ...]) -> None:
        self.robot = robot
        self.sensor_names = sensor_names
        self.rx = bytearray()  # host -> hub
        self.tx = bytearray()  # hub -> host
        self.tx_capacity_bytes: int | None = None  # unbounded in virtual time; set by a real-time link

    def ticks_us(self) -> int:
        return self.robot.t_us

    def idle_us(self, us: int) -> None:
        raise RuntimeError("the simulation advances time itself")

    def set_power(self, left_pct: float, right_pct: float) -> None:
        self.robot.power = (max(-100.0, min(100.0, left_pct)), max(-100.0, min(100.0, right_pct)))

    def encoders_deg(self) -> tuple[int, int]:
        return self.robot.encoders_deg()

    def reflectance_pct(self, name: str) -> int:
        return self.robot.reflectance_pct(name)

    def heading_deg(self) -> float:
        return self.robot.gyro_heading_deg()

    def battery_mv(self) -> int:
        return int(self.robot.battery_mv)

    def link_read(self) -> bytes:
        if not self.rx:
            return b""
        data = bytes(self.rx)
        self.rx.clear()
        return data

    def link_write(self, data: bytes) -> None:
        self.tx.extend(data)

    def link_room(self) -> int:
        return Board.link_room(self) if self.tx_capacity_bytes is None else self.tx_capacity_bytes - len(self.tx)
