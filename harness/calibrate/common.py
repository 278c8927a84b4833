"""What the calibrate commands share: options, the robot, the operator, the output files."""

from __future__ import annotations

import argparse
import json
import math
from collections.abc import Callable
from pathlib import Path
from typing import Any

from harness.errors import InputError, TrackproofError
from harness.profile import RobotProfile, load_profile
from harness.links import Link, LinkSpec
from harness.robot import RobotConnector, open_real_link
from harness.session import RunRecord, Session
from harness.sim import DEFAULT_COURSE, DEFAULT_PROFILE
from hub_side.actions import BUILTINS
from hub_side.motion import ParamError, check_params

Ask = Callable[[str], str]


class OperatorStopped(TrackproofError):
    """The operator chose to quit at a prompt; nothing is written."""

    exit_code = 130


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


def positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {value}")
    return value


def add_robot_options(p: argparse.ArgumentParser, repeat: int) -> None:
    p.add_argument("--robot", type=Path, help=f"robot profile (default {DEFAULT_PROFILE.name}); "
                                               "--write updates this file")
    p.add_argument("--course", type=Path, help=f"course for the simulated link (default {DEFAULT_COURSE.name})")
    p.add_argument("--link", default="sim", help="sim, sim:COURSE, serial:PORT[@BAUD], serial:auto or ble:NAME_OR_ADDRESS "
                                                 "(default sim)")
    p.add_argument("--seed", type=int, default=0, help="simulator seed (default 0)")
    p.add_argument("--repeat", type=positive_int, default=repeat, help=f"runs per combination (default {repeat})")
    p.add_argument("--write", action="store_true",
                   help="write the recommended values into the --robot profile (with a dated note)")
    p.add_argument("--json", type=Path, metavar="PATH", help="write the full result as JSON here")


def load_robot(args: argparse.Namespace,
               open_link: Callable[[LinkSpec, RobotProfile], Link] = open_real_link,
               ) -> tuple[RobotProfile, RobotConnector]:
    """The profile and a connector to the robot; --write without --robot is refused first, so
    the bundled example profile is never changed by accident."""
    if args.write and args.robot is None:
        raise InputError("needs --robot PATH: the profile to update (the bundled example is "
                         "never written)", key="--write")
    profile = load_profile(args.robot or DEFAULT_PROFILE)
    course = args.course
    if course is None and args.link == "sim":
        course = DEFAULT_COURSE
    return profile, RobotConnector(profile, args.link, course=course, seed=args.seed, open_link=open_link)


def check_action(action: str, params: dict[str, Any], profile: RobotProfile) -> dict[str, Any]:
    """Check on the host, before anything moves, what the hub would refuse."""
    try:
        check_params(BUILTINS[action][1], params, tuple(profile.sensors))
    except ParamError as exc:
        raise InputError(exc.text, key=f"{action}.{exc.key}") from None
    return params


def confirm_real(session: Session, plan: str, ask: Ask) -> None:
    """On real hardware, say what the robot is about to do and wait for a yes."""
    from harness.runner import SAFETY_NOTE

    hub = session.hub
    if hub is None or hub.board.get("simulated"):
        return
    answer = ask(f"{plan}\nThe robot will move by itself. Stop it at any time with Ctrl-C.\n{SAFETY_NOTE}\n"
                 "Type yes to start: ")
    if answer.strip().lower() not in ("y", "yes"):
        raise OperatorStopped("not started; nothing moved")


def run_checked(session: Session, action: str, params: dict[str, Any]) -> RunRecord:
    return session.run(action, params, telemetry_hz=0)


def write_json(path: Path, data: dict[str, Any]) -> None:
    try:
        path.write_text(json.dumps(_clean(data), indent=2, allow_nan=False) + "\n", encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot write: {exc}", file=str(path)) from None


def _clean(value: Any) -> Any:
    """Plain JSON values: numpy numbers and arrays as lists and floats, NaN and infinity as null
    (JSON has neither)."""
    if hasattr(value, "tolist"):
        value = value.tolist()
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def fmt_ci(ci: tuple[float, float] | None, digits: int) -> str:
    return "-" if ci is None else f"[{ci[0]:.{digits}f}, {ci[1]:.{digits}f}]"
