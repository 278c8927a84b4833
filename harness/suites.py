"""Suite files (TOML): what to run, how often, and what counts as good enough.

    name = "pre-match check"
    robot = "practice_robot.toml"      # robot profile, relative to the suite file
    course = "practice_course.toml"    # course for the simulated robot
    repeat = 20                        # default for every case
    reset = "sim"                      # sim | operator | routine:NAME
    line_width_mm = 19                 # tape width, to turn a probed edge into a stop position
    telemetry_hz = 100

    [[cases]]
    name = "stop past the crossroads"
    judge_by = "robot"                 # or "truth" (simulator only)
    steps = [
      { action = "follow_line", params = { junctions = 3, overrun_mm = 80 } },
      { action = "probe_edge", params = { sensor = "outer_left" } },
    ]
    [cases.expect]
    stop_mm.mean_within = [75, 85]
    stop_spread_mm.max = 6

A case with one step may say `action = ...` and `params = {...}` directly; `routine = "name"`
runs a routine registered on the hub instead of a built-in action.
"""

from __future__ import annotations

import hashlib
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from collections.abc import Sequence
from typing import Any

from harness.analysis import validate_expectations
from harness.analysis.verdicts import MEASURED_METRICS, metric_base
from harness.errors import InputError
from harness.profile import RobotProfile, load_profile
from harness.tomlfile import Table, parse_toml, read_text
from hub_side.actions import BUILTINS
from hub_side.motion import ParamError, check_params


@dataclass(frozen=True)
class Step:
    name: str  # the action or routine
    params: dict[str, Any]
    routine: bool = False


@dataclass(frozen=True)
class Case:
    name: str
    steps: tuple[Step, ...]
    repeat: int
    reset: str
    judge_by: str
    expect: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Suite:
    name: str
    path: Path
    text: str
    profile: RobotProfile
    profile_text: str
    course_path: Path | None
    cases: tuple[Case, ...]
    line_width_mm: float
    telemetry_hz: int
    seed: int | None

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.text.encode()).hexdigest()


def load_suite(path: str | Path) -> Suite:
    path = Path(path)
    text = read_text(path)
    t = parse_toml(text, str(path))
    name = t.str("name", path.stem)
    robot_path = _relative(path, t.str("robot"))
    profile = load_profile(robot_path)
    course = t.str("course", "")
    course_path = _relative(path, course) if course else None
    if course_path is not None and not course_path.is_file():
        raise t.error("course", f"file not found: {course_path}")
    repeat = t.int("repeat", 20, low=1, high=10000)
    reset = _reset(t, "reset", "sim")
    line_width = t.num("line_width_mm", 19.0, positive=True, high=200)
    telemetry_hz = t.int("telemetry_hz", 100, low=0, high=500)
    seed = t.int("seed", 0) if t.has("seed") else None
    cases = tuple(_case(c, profile, repeat, reset) for c in t.tables("cases"))
    if not cases:
        raise t.error("cases", "a suite needs at least one [[cases]]")
    names = [c.name for c in cases]
    for i, case_name in enumerate(names):
        if case_name in names[:i]:
            raise InputError(f"case name {case_name!r} is used twice", file=str(path), key=f"cases[{i}].name")
    t.done()
    return Suite(name, path, text, profile,
                 Path(profile.source).read_text(encoding="utf-8"), course_path, cases, line_width,
                 telemetry_hz, seed)


def _relative(suite_path: Path, ref: str) -> Path:
    candidate = Path(ref)
    return candidate if candidate.is_absolute() else suite_path.parent / candidate


def _reset(t: Table, key: str, default: str) -> str:
    value = t.str(key, default)
    if value in ("sim", "operator") or (value.startswith("routine:") and len(value) > len("routine:")):
        return value
    raise t.error(key, f"expected sim, operator or routine:NAME, got {value!r}")


def _case(t: Table, profile: RobotProfile, repeat: int, reset: str) -> Case:
    name = t.str("name")
    if not name.strip():
        raise t.error("name", "must not be empty")
    if t.has("steps"):
        if t.has("action") or t.has("routine") or t.has("params"):
            raise t.error("steps", "give either steps or action/routine with params, not both")
        steps = tuple(_step(s, profile) for s in t.tables("steps"))
        if not steps:
            raise t.error("steps", "expected at least one step")
    else:
        steps = (_step(t, profile, own_table=False),)
    case_repeat = t.int("repeat", repeat, low=1, high=10000)
    case_reset = _reset(t, "reset", reset)
    judge_by = t.str("judge_by", "robot", choices=("robot", "truth"))
    expect: dict[str, Any] = {}
    if t.has("expect"):
        expect_t = t.table("expect")
        expect = expect_t.take_all()
        problems = validate_expectations(expect)
        if problems:
            raise InputError(problems[0], file=t.file, key=expect_t.path)
        if not any(step.routine for step in steps):  # a routine may report metrics of its own
            for metric in expect:
                if metric_base(metric) not in MEASURED_METRICS:
                    raise expect_t.error(metric, f"no run measures {metric!r} (measured: "
                                                 f"{', '.join(MEASURED_METRICS[:-1])}, and a spread such "
                                                 "as stop_spread_mm or turn_spread_deg)")
    t.done()
    return Case(name, steps, case_repeat, case_reset, judge_by, expect)


def _step(t: Table, profile: RobotProfile, own_table: bool = True) -> Step:
    """One step; own_table is False when the step's keys sit in the case's own table."""
    if t.has("routine") and t.has("action"):
        raise t.error("action", "give action or routine, not both")
    params_t = t.table("params", {})
    params = params_t.take_all()
    if t.has("routine"):
        routine = t.str("routine")
        if own_table:
            t.done()
        return Step(routine, params, routine=True)
    action = t.str("action", choices=tuple(sorted(BUILTINS)))
    full = profile.action_defaults(action, params)
    try:
        check_params(BUILTINS[action][1], full, tuple(profile.sensors))
    except ParamError as exc:
        raise InputError(exc.text, file=t.file, key=params_t.key_path(exc.key)) from None
    if own_table:
        t.done()
    return Step(action, full)


def stored_cases(text: str, run_cases: Sequence[str] = (), link: str = "") -> list[tuple[str, str, dict[str, Any]]]:
    """(name, judge_by, expectations) of each case in a suite's stored text, in order; the suite
    was validated when it ran, so this reads it without its profile or course files. A session
    that ran no suite (the moves of a calibration command) lists no cases: its cases are then
    the case names of its runs (run_cases, in the order they ran), with no expectations, judged
    by truth when its link was the simulator (a drive's own encoder distance cannot show a wrong
    distance_scale) and by the robot otherwise."""
    data = tomllib.loads(text)
    if "cases" not in data:
        judge_by = "truth" if link.split(":")[0] == "sim" else "robot"
        return [(name, judge_by, {}) for name in dict.fromkeys(run_cases)]
    return [(c["name"], c.get("judge_by", "robot"), c.get("expect", {})) for c in data["cases"]]
