"""What the calibrate commands share: options, the robot, the operator, the output files."""

from __future__ import annotations

import argparse
import math
from collections.abc import Callable
from pathlib import Path
from typing import Any

from harness.calibrate.writeback import check_profile_writable
from harness.errors import InputError
from harness.jsonout import check_writable
from harness.profile import RobotProfile, load_profile
from harness.links import Link, LinkSpec
from harness.robot import RobotConnector, open_real_link
from harness.sim import DEFAULT_COURSE, DEFAULT_PROFILE
from harness.store import DEFAULT_DB
from hub_side.actions import BUILTINS
from hub_side.motion import ParamError, check_params


def number_list(low: float, high: float) -> Callable[[str], list[float]]:
    """An argparse type: comma-separated numbers, each within [low, high] (low excluded if 0)."""

    def parse(text: str) -> list[float]:
        values = []
        for part in text.split(","):
            part = part.strip()
            try:
                value = float(part)
            except ValueError:
                raise argparse.ArgumentTypeError(f"expected comma-separated numbers, got {part!r}") from None
            if not math.isfinite(value) or value > high or value < low or (low == 0 and value == 0):
                raise argparse.ArgumentTypeError(f"{part} is outside {low:g}..{high:g}")
            values.append(value)
        if not values:
            raise argparse.ArgumentTypeError("expected at least one number")
        return values

    return parse


def whole_number(low: int) -> Callable[[str], int]:
    """An argparse type: a whole number of at least low."""

    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
        if value < low:
            raise argparse.ArgumentTypeError(f"must be at least {low}, got {value}")
        return value

    return parse


positive_int = whole_number(1)


def add_robot_options(p: argparse.ArgumentParser, repeat: int, repeat_means: str = "runs per combination") -> None:
    p.add_argument("--robot", type=Path, help=f"robot profile (default {DEFAULT_PROFILE.name}); "
                                               "--write updates this file")
    p.add_argument("--course", type=Path, help=f"course for the simulated link (default {DEFAULT_COURSE.name})")
    p.add_argument("--link", default="sim", help="sim, sim:COURSE, serial:PORT[@BAUD], serial:auto or ble:NAME_OR_ADDRESS "
                                                 "(default sim)")
    p.add_argument("--seed", type=int, default=0, help="simulator seed (default 0)")
    p.add_argument("--repeat", type=positive_int, default=repeat, help=f"{repeat_means} (default {repeat})")
    p.add_argument("--write", action="store_true",
                   help="write the recommended values into the --robot profile (with a dated note)")
    p.add_argument("--json", type=Path, metavar="PATH", help="write the full result as JSON here")
    p.add_argument("--db", type=Path, default=Path(DEFAULT_DB),
                   help=f"results database that keeps every move made (default {DEFAULT_DB})")
    p.add_argument("--reset", metavar="ROUTINE",
                   help="a routine on the hub that drives the robot back to the start between runs "
                        "(default: the simulator re-places it; on a real robot the operator is asked)")


def load_robot(args: argparse.Namespace,
               open_link: Callable[[LinkSpec, RobotProfile], Link] = open_real_link,
               ) -> tuple[RobotProfile, RobotConnector]:
    """The profile and a connector to the robot; --write without --robot is refused first, so
    the bundled example profile is never changed by accident."""
    if args.write and args.robot is None:
        raise InputError("needs --robot PATH: the profile to update (the bundled example is "
                         "never written)", key="--write")
    profile = load_profile(args.robot or DEFAULT_PROFILE)
    # Refuse now what would fail after the robot has driven: the outputs must be writable.
    if args.write:
        check_profile_writable(Path(args.robot).resolve())
    if args.json:
        check_writable(args.json)
    course = args.course
    if course is None and args.link == "sim":
        course = DEFAULT_COURSE
    return profile, RobotConnector(profile, args.link, course=course, seed=args.seed,
                                   reset_routine=getattr(args, "reset", None), open_link=open_link)


def check_action(action: str, params: dict[str, Any], profile: RobotProfile) -> dict[str, Any]:
    """Check on the host, before anything moves, what the hub would refuse."""
    try:
        check_params(BUILTINS[action][1], params, tuple(profile.sensors))
    except ParamError as exc:
        raise InputError(exc.text, key=f"{action}.{exc.key}") from None
    return params


def fmt_ci(ci: tuple[float, float] | None, digits: int) -> str:
    return "-" if ci is None else f"[{ci[0]:.{digits}f}, {ci[1]:.{digits}f}]"
