"""The simulated robot: the real hub listener on a simulated board, in virtual time.

Simulation ties a course, the team's profile and a seed together; SimLink (harness.links) carries
real frames between the host session and the listener running here.
"""

from __future__ import annotations

import random
from pathlib import Path

from harness.profile import RobotProfile, load_profile
from harness.sim.course import Course, load_course
from harness.sim.robot import SimBoard, SimRobot
from hub_side.listener import Listener

SUITES_DIR = Path(__file__).resolve().parents[2] / "suites"
DEFAULT_COURSE = SUITES_DIR / "practice_course.toml"
DEFAULT_PROFILE = SUITES_DIR / "practice_robot.toml"

_MAX_STEP_US = 10000  # physics never takes a longer step than this


class Simulation:
    def __init__(self, course: Course, profile: RobotProfile, seed: int = 0,
                 control_period_us: int = 10000) -> None:
        self.course = course
        self.profile = profile
        self.seed = seed
        self.rng = random.Random(seed)
        self.robot = SimRobot(course, profile, self.rng)
        self.robot.place(course.start)
        self.board = SimBoard(self.robot, tuple(profile.sensors))
        self.listener = Listener(self.board, robot_id=profile.id, control_period_us=control_period_us,
                                 geometry=profile.geometry())

    @classmethod
    def from_files(cls, course: str | Path | None = None, profile: str | Path | None = None,
                   seed: int = 0) -> Simulation:
        return cls(load_course(course or DEFAULT_COURSE), load_profile(profile or DEFAULT_PROFILE), seed)

    @property
    def t_us(self) -> int:
        return self.robot.t_us

    def reset(self) -> None:
        """Put the robot back at the start, with the course's placement error."""
        self.robot.place(self.course.start)

    def step(self, max_us: int) -> None:
        """One pass of the hub loop, then physics up to the next moment the hub has work."""
        wait_us = self.listener.tick()
        self.robot.advance(max(1, min(wait_us, max_us, _MAX_STEP_US)))

    def run_for(self, duration_us: int) -> None:
        end = self.robot.t_us + duration_us
        while self.robot.t_us < end:
            self.step(end - self.robot.t_us)


def truth_snapshot(sim: Simulation) -> dict:
    """The robot's exact state now: pose, path travelled, and each sensor's distance to the
    nearest line other than the one under the robot (the junction or crossing it stops by)."""
    robot = sim.robot
    followed = robot.followed_line()
    lines = sim.course.lines
    cross = {}
    for name in robot.sensor_places:
        x, y = robot.sensor_xy(name)
        index, distance = robot.mat.nearest_line(x, y, exclude=followed)
        if index >= 0:
            cross[name] = {"line": lines[index].name, "distance_mm": round(distance, 3),
                           "half_width_mm": lines[index].width_mm / 2.0}
    return {"t_s": robot.t_us / 1e6, "pose": robot.pose.as_dict(), "travel_mm": robot.travel_mm,
            "followed_line": lines[followed].name if followed >= 0 else None, "cross_line": cross}


def truth_report(before: dict, after: dict) -> dict:
    """What really happened between two snapshots, for comparison with what the hub measured."""
    return {
        "start": before["pose"],
        "end": after["pose"],
        "travel_mm": round(after["travel_mm"] - before["travel_mm"], 3),
        "heading_change_deg": round(after["pose"]["heading_deg"] - before["pose"]["heading_deg"], 3),
        "followed_line": after["followed_line"],
        "cross_line_start": before["cross_line"],
        "cross_line_end": after["cross_line"],
    }
