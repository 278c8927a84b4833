"""`trackproof calibrate odometry`: the UMBmark bidirectional square test (Borenstein & Feng, 1996).

The robot drives a square by its encoders alone (straight legs held by the encoders, not the
gyro; spin turns counted by the encoders), clockwise and counter-clockwise, several times each.
For every run the host integrates the encoder telemetry into the robot's own idea of where it
ended (its odometry) and takes where it really ended: from the truth on the simulator, from the
operator's tape measure on a real robot. The differences, actual minus odometry, give UMBmark's
centres of gravity and from them the wheel-diameter ratio E_d and the track-width factor E_b
(harness.analysis.umbmark).

What the profile takes: track_mm (times E_b; spin and pivot turns then come out right) and
wheel_ratio (D_right / D_left around wheel_diameter_mm; times E_d), which the hub uses for each
wheel's millimetres per degree: encoder-held straight moves then stop curving, and encoder turns
and the travelled distance count each wheel at its own size.
"""

from __future__ import annotations

import argparse
import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from harness.analysis.umbmark import UmbmarkResult, diameter_corrections, integrate_odometry, umbmark
from harness.calibrate.common import add_robot_options, check_action, load_robot
from harness.jsonout import write_json
from harness.operator import Ask, OperatorStopped, ask_operator, confirm_real
from harness.errors import InputError, TrackproofError
from harness.movelog import MoveLog
from harness.profile import RobotProfile
from harness.robot import RobotConnector
from harness.session import RunRecord, Session
from harness.sim import truth_snapshot
from harness.store import Store
from hub_side.motion import GEOMETRY_LIMITS

DIRECTIONS = ("cw", "ccw")
TELEMETRY_HZ = 100  # one sample per control period: the odometry integrates these
_BOOTSTRAP = 2000


class RunFailed(TrackproofError):
    """A move of the square did not finish (stalled, timed out, stopped); nothing is concluded."""


@dataclass(frozen=True)
class SquarePlan:
    side_mm: float
    speed_pct: float
    turn_speed_pct: float

    def steps(self, direction: str) -> list[tuple[str, dict[str, Any]]]:
        """Four legs, each followed by a spin turn of 90 degrees (clockwise = right, positive)."""
        angle = 90.0 if direction == "cw" else -90.0
        ramp = min(60.0, self.side_mm / 4.0)
        leg = {"distance_mm": self.side_mm, "speed_pct": self.speed_pct, "hold": "encoders",
               "ramp_up_mm": ramp, "ramp_down_mm": ramp}
        turn = {"angle_deg": angle, "mode": "spin", "using": "encoders", "speed_pct": self.turn_speed_pct}
        return [step for _ in range(4) for step in (("drive_straight", dict(leg)), ("turn", dict(turn)))]


@dataclass(frozen=True)
class OdometryModel:
    """What the hub believes: millimetres per motor degree and the track its turns assume.

    The hub's straight moves use wheel_diameter_mm / distance_scale for the average wheel, and
    each wheel that times its factor c_L or c_R from wheel_ratio (hub_side.motion.wheel_factors);
    its spin turns use track_mm * spin_scale / (c * wheel_diameter_mm) motor degrees per degree on
    each wheel. Expressed as a track between wheels of those effective diameters, the turns
    assume track * spin_scale / distance_scale whatever the ratio.
    """

    mm_per_deg: float  # the average wheel
    track_mm: float
    wheel_ratio: float = 1.0  # D_right / D_left, as the hub's geometry

    @classmethod
    def of(cls, profile: RobotProfile) -> OdometryModel:
        return cls(math.pi * profile.wheel_diameter_mm / (360.0 * profile.distance_scale),
                   profile.track_mm * profile.spin_scale / profile.distance_scale, profile.wheel_ratio)

    @property
    def wheel_mm_per_deg(self) -> tuple[float, float]:
        """(left, right) millimetres per motor degree (c_L, c_R of Borenstein & Feng 1996)."""
        c_l, c_r = diameter_corrections(self.wheel_ratio)
        return c_l * self.mm_per_deg, c_r * self.mm_per_deg


@dataclass(frozen=True)
class SquareRun:
    direction: str
    repetition: int
    actual_mm: tuple[float, float]  # where it ended, start frame: x forward, y left
    odometry_mm: tuple[float, float]
    odometry_heading_deg: float  # counter-clockwise, as the formulas' frame
    from_totals: bool  # odometry from per-move encoder totals (telemetry was incomplete)

    @property
    def error_mm(self) -> tuple[float, float]:
        return (self.actual_mm[0] - self.odometry_mm[0], self.actual_mm[1] - self.odometry_mm[1])

    def as_dict(self) -> dict[str, Any]:
        return {"direction": self.direction, "repetition": self.repetition,
                "actual_mm": list(self.actual_mm), "odometry_mm": list(self.odometry_mm),
                "error_mm": list(self.error_mm), "odometry_heading_deg": self.odometry_heading_deg,
                "odometry_from_totals": self.from_totals}


# ------------------------------------------------------------------ pure helpers


def move_odometry(record: RunRecord, model: OdometryModel,
                  pose: tuple[float, float, float]) -> tuple[tuple[float, float, float], bool]:
    """The pose after one move, integrated from its encoder telemetry; from the move's encoder
    totals (one step along the mid heading: exact for an arc) when samples are missing."""
    tel = record.telemetry
    mm_left, mm_right = model.wheel_mm_per_deg
    total = (record.result.get("enc_left_deg"), record.result.get("enc_right_deg"))
    have_totals = all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in total)
    if len(tel) and not tel.dropped:
        left = np.asarray(tel.enc_left_deg, dtype=float)
        right = np.asarray(tel.enc_right_deg, dtype=float)
        if have_totals and (left[-1], right[-1]) != total:
            left, right = np.append(left, total[0]), np.append(right, total[1])
        return integrate_odometry(left * mm_left, right * mm_right, model.track_mm, pose), False
    if not have_totals:
        raise RunFailed(f"{record.action} reported neither complete telemetry nor encoder totals: "
                        "no odometry for this run")
    return integrate_odometry(np.array([total[0] * mm_left]), np.array([total[1] * mm_right]),
                              model.track_mm, pose), True


def in_start_frame(start: dict[str, float], end: dict[str, float]) -> tuple[float, float]:
    """A truth end pose relative to the start pose: (forward, left) along the start heading.

    The mat's frame has y up and headings clockwise from +y, so forward is (sin h, cos h) and
    left is (-cos h, sin h) (harness.sim.robot)."""
    h = math.radians(start["heading_deg"])
    dx, dy = end["x_mm"] - start["x_mm"], end["y_mm"] - start["y_mm"]
    return (dx * math.sin(h) + dy * math.cos(h), -dx * math.cos(h) + dy * math.sin(h))


def bootstrap_interval(cw: np.ndarray, ccw: np.ndarray, side: float, track: float, seed: int = 0,
                       level: float = 0.95) -> dict[str, tuple[float, float]]:
    """Percentile bootstrap intervals of E_d and E_b, resampling each direction's runs (rough
    with five runs a direction; zero width when the runs agree exactly)."""
    rng = np.random.default_rng(seed)
    e_d, e_b = [], []
    for _ in range(_BOOTSTRAP):
        res = umbmark(cw[rng.integers(0, len(cw), len(cw))], ccw[rng.integers(0, len(ccw), len(ccw))],
                      side, track)
        e_d.append(res.combined.e_d)
        e_b.append(res.combined.e_b)
    tail = (1.0 - level) / 2.0 * 100.0
    return {name: (float(np.percentile(v, tail)), float(np.percentile(v, 100.0 - tail)))
            for name, v in (("e_d", e_d), ("e_b", e_b))}


def parse_position(text: str) -> tuple[float, float] | None:
    """'forward left' in mm, separated by a space or a comma; None if it is not two numbers."""
    parts = text.replace(",", " ").split()
    if len(parts) != 2:
        return None
    try:
        values = (float(parts[0]), float(parts[1]))
    except ValueError:
        return None
    return values if all(math.isfinite(v) for v in values) else None


def compose_wheel_ratio(old_ratio: float, e_d: float) -> float:
    """The profile's new wheel_ratio from the one the squares ran with and the E_d they measured.

    The hub's odometry already counts each wheel at its own size, c_L * D and c_R * D, with
    c_R / c_L = old_ratio. UMBmark measures the true wheels against that model: E_d is
    (D_R,true / (c_R D)) / (D_L,true / (c_L D)) = (D_R,true / D_L,true) / old_ratio. So the true
    ratio, and the one to write, is old_ratio * E_d (equal to E_d when the profile had 1.0). The
    average diameter stays the profile's, as UMBmark assumes (REFERENCES.md section 2, pitfall 5).
    """
    return old_ratio * e_d


# ------------------------------------------------------------------ driving the squares


class SquareTest:
    """Runs the squares on one robot and collects the return errors."""

    def __init__(self, connector: RobotConnector, plan: SquarePlan, ask: Ask = ask_operator,
                 log: MoveLog | None = None, label: str = "square") -> None:
        self.connector = connector
        self.plan = plan
        self.ask = ask
        self.log = log or MoveLog()
        self.label = label  # names the stored moves: "cw square, move 1: drive_straight"
        self.model = OdometryModel.of(connector.profile)

    def run(self, session: Session, runs: int) -> list[SquareRun]:
        out = []
        for direction in DIRECTIONS:
            for rep in range(1, runs + 1):
                out.append(self.one_square(session, direction, rep))
        return out

    def one_square(self, session: Session, direction: str, rep: int) -> SquareRun:
        sim = self.connector.sim
        self.connector.place_at_start(session, self.ask, f"{direction} square {rep}: put the robot on the start "
                                      "mark, its axle midpoint on the mark and facing along the first leg")
        if sim is not None:
            start = truth_snapshot(sim)["pose"]
        pose = (0.0, 0.0, 0.0)
        from_totals = False
        for step, (action, params) in enumerate(self.plan.steps(direction), 1):
            record = self.log.run(session, f"{direction} {self.label}, move {step}: {action}", action, params,
                                  telemetry_hz=TELEMETRY_HZ)
            if record.status != "done":
                raise RunFailed(f"{direction} square {rep}: {action} ended {record.status!r} "
                                f"({record.result}); nothing concluded")
            pose, by_totals = move_odometry(record, self.model, pose)
            from_totals = from_totals or by_totals
        if sim is not None:
            actual = in_start_frame(start, truth_snapshot(sim)["pose"])
        else:
            actual = self._ask_position(direction, rep)
        return SquareRun(direction, rep, actual, (pose[0], pose[1]), math.degrees(pose[2]), from_totals)

    def _ask_position(self, direction: str, rep: int) -> tuple[float, float]:
        while True:
            answer = self.ask(f"{direction} square {rep} done. Where is the axle midpoint now, from the start "
                              "mark: millimetres forward (along the first leg) and to the left, e.g. '-12 35' "
                              "(q to quit): ")
            if answer.strip().lower() == "q":
                raise OperatorStopped("stopped by the operator; nothing concluded or written")
            position = parse_position(answer)
            if position is not None:
                return position
            print("  expected two numbers: forward_mm left_mm")


def errors_of(runs: list[SquareRun], direction: str) -> np.ndarray:
    return np.array([r.error_mm for r in runs if r.direction == direction], dtype=float).reshape(-1, 2)


@dataclass(frozen=True)
class OdometryCalibration:
    profile: RobotProfile
    model: OdometryModel
    plan: SquarePlan
    runs: list[SquareRun]
    result: UmbmarkResult
    intervals: dict[str, tuple[float, float]]
    verify_runs: list[SquareRun] | None = None
    verify_result: UmbmarkResult | None = None

    @property
    def track_mm_new(self) -> float:
        return self.profile.track_mm * self.result.combined.e_b

    @property
    def wheel_ratio_new(self) -> float:
        return compose_wheel_ratio(self.profile.wheel_ratio, self.result.combined.e_d)

    def wheel_diameters_mm(self) -> tuple[float, float]:
        """(left, right) diameters with the new ratio around the profile's (average) diameter."""
        c_l, c_r = diameter_corrections(self.wheel_ratio_new)
        return c_l * self.profile.wheel_diameter_mm, c_r * self.profile.wheel_diameter_mm

    def as_dict(self) -> dict[str, Any]:
        left, right = self.wheel_diameters_mm()
        out: dict[str, Any] = {
            "robot": self.profile.id, "side_mm": self.plan.side_mm, "odometry_track_mm": self.model.track_mm,
            "runs": [r.as_dict() for r in self.runs], "umbmark": self.result.as_dict(),
            "ci95": {k: list(v) for k, v in self.intervals.items()},
            "recommend": {"track_mm": self.track_mm_new, "track_mm_was": self.profile.track_mm,
                          "wheel_ratio": self.wheel_ratio_new, "wheel_ratio_was": self.profile.wheel_ratio,
                          "wheel_left_diameter_mm": left, "wheel_right_diameter_mm": right},
        }
        if self.verify_result is not None and self.verify_runs is not None:
            out["verify"] = {"runs": [r.as_dict() for r in self.verify_runs],
                             "umbmark": self.verify_result.as_dict()}
        return out


def calibrate_odometry(connector: RobotConnector, plan: SquarePlan, runs: int, *, verify: bool = False,
                       ask: Ask = ask_operator, seed: int = 0, log: MoveLog | None = None) -> OdometryCalibration:
    """The whole test: squares both ways, UMBmark, and with verify the squares again with the
    corrected track and wheel ratio (on the simulator the robot is the same one, re-placed)."""
    profile = connector.profile
    test = SquareTest(connector, plan, ask, log)
    session = connector.connect()
    try:
        confirm_real(session, f"About to drive {runs} clockwise and {runs} counter-clockwise squares of "
                              f"{plan.side_mm:g} mm on robot {profile.id} over {connector.link_name}; "
                              "leave a clear area of that size plus 30 cm on every side.", ask)
        squares = test.run(session, runs)
    finally:
        session.close()
    cw, ccw = errors_of(squares, "cw"), errors_of(squares, "ccw")
    result = umbmark(cw, ccw, plan.side_mm, test.model.track_mm)
    calibration = OdometryCalibration(profile, test.model, plan, squares, result,
                                      bootstrap_interval(cw, ccw, plan.side_mm, test.model.track_mm, seed))
    if not verify:
        return calibration
    corrected = replace(profile, track_mm=calibration.track_mm_new, wheel_ratio=calibration.wheel_ratio_new)
    connector.profile = corrected
    check = SquareTest(connector, plan, ask, log, label="corrected square")
    session = connector.connect()
    try:
        again = check.run(session, runs)
    finally:
        session.close()
        connector.profile = profile
    after = umbmark(errors_of(again, "cw"), errors_of(again, "ccw"), plan.side_mm, check.model.track_mm)
    return replace(calibration, verify_runs=again, verify_result=after)


# ------------------------------------------------------------------ command line


def print_calibration(cal: OdometryCalibration) -> None:
    res, est = cal.result, cal.result.combined
    print(f"UMBmark on {cal.profile.id}: {len(cal.runs) // 2} squares of {cal.plan.side_mm:g} mm each way "
          f"(odometry: {cal.model.mm_per_deg:.5f} mm per motor degree, track {cal.model.track_mm:.2f} mm)")
    print("  return errors, actual minus odometry (mm, x forward, y left):")
    for run in cal.runs:
        note = "  (odometry from move totals: telemetry incomplete)" if run.from_totals else ""
        print(f"    {run.direction:3} {run.repetition:2}: x {run.error_mm[0]:8.1f}  y {run.error_mm[1]:8.1f}{note}")
    for name, cg in (("cw", res.cg_cw), ("ccw", res.cg_ccw)):
        spread = np.std(errors_of(cal.runs, name), axis=0, ddof=1) if len(cal.runs) > 2 else (math.nan,) * 2
        print(f"  centre of gravity {name:3}: x {cg[0]:8.1f}  y {cg[1]:8.1f} mm  "
              f"(run-to-run sd x {spread[0]:.1f}, y {spread[1]:.1f} mm)")
    print(f"  E_max,syst (before): {res.e_max_syst:.1f} mm")
    for label, e in (("from x", res.from_x), ("from y", res.from_y), ("combined", est)):
        print(f"  {label:9}: alpha {math.degrees(e.alpha_rad):+7.3f} deg/turn, beta {math.degrees(e.beta_rad):+7.3f} "
              f"deg/leg, E_d {e.e_d:.5f}, E_b {e.e_b:.5f}")
    ci = cal.intervals
    if min(sum(r.direction == d for r in cal.runs) for d in DIRECTIONS) >= 3:
        print(f"  run-to-run spread only (95 % bootstrap; not UMBmark's first-order model error, which is "
              f"larger): E_d [{ci['e_d'][0]:.5f}, {ci['e_d'][1]:.5f}], E_b [{ci['e_b'][0]:.5f}, {ci['e_b'][1]:.5f}]")
    print("  UMBmark is a first-order method: after writing, run it again (--verify) to see what is left.")
    left, right = cal.wheel_diameters_mm()
    print(f"Recommended: track_mm {cal.profile.track_mm:g} -> {cal.track_mm_new:.2f} (times E_b; spin and pivot "
          "turns then come out right)")
    print(f"  wheel_ratio {cal.profile.wheel_ratio:g} -> {cal.wheel_ratio_new:.5f} (times E_d = {est.e_d:.5f}; "
          f"D_right / D_left, i.e. left {left:.3f} mm and right {right:.3f} mm around the profile's "
          f"{cal.profile.wheel_diameter_mm:g} mm)")
    if abs(est.e_d - 1.0) > 0.001:
        side = "right" if est.e_d > 1 else "left"
        print(f"  The {side} wheel is effectively larger than the profile says: encoder-only straight moves curve "
              f"{abs(math.degrees(est.beta_rad)):.2f} deg to the {'left' if est.e_d > 1 else 'right'} per "
              f"{cal.plan.side_mm:g} mm until wheel_ratio is written.")
    else:
        print("  The wheels match the profile's ratio within 0.1 %.")
    lo, hi = GEOMETRY_LIMITS["wheel_ratio"]
    if not lo <= cal.wheel_ratio_new <= hi:
        print(f"  {cal.wheel_ratio_new:.5f} is outside the profile's {lo:g} to {hi:g}: check the tyres and how the "
              "wheels are seated before trusting it.")
    if cal.verify_result is not None:
        after = cal.verify_result
        print(f"Verified with track_mm {cal.track_mm_new:.2f} and wheel_ratio {cal.wheel_ratio_new:.5f}: "
              f"E_max,syst {res.e_max_syst:.1f} -> "
              f"{after.e_max_syst:.1f} mm; E_b now {after.combined.e_b:.5f}, E_d {after.combined.e_d:.5f}")


def cmd_odometry(args: argparse.Namespace, ask: Ask = ask_operator) -> int:
    if args.side_mm <= 0 or args.side_mm > 5000:
        raise InputError(f"must be in (0, 5000] mm, got {args.side_mm:g}", key="--side-mm")
    for key, value in (("--speed-pct", args.speed_pct), ("--turn-speed-pct", args.turn_speed_pct)):
        if not 5 <= value <= 100:
            raise InputError(f"must be between 5 and 100, got {value:g}", key=key)
    profile, connector = load_robot(args)
    plan = SquarePlan(args.side_mm, args.speed_pct, args.turn_speed_pct)
    for action, params in plan.steps("cw")[:2]:
        check_action(action, params, profile)
    options = {"side_mm": args.side_mm, "speed_pct": args.speed_pct, "turn_speed_pct": args.turn_speed_pct,
               "repeat": args.repeat, "verify": args.verify}
    with Store(args.db) as store, MoveLog(store, connector, "calibrate odometry", options) as log:
        cal = calibrate_odometry(connector, plan, args.repeat, verify=args.verify, ask=ask, seed=args.seed, log=log)
    print_calibration(cal)
    print(log.kept())
    if args.json:
        write_json(args.json, {**cal.as_dict(), "stored_session": log.uid})
    if args.write:
        from harness.calibrate.writeback import write_profile_values

        est = cal.result.combined
        lo, hi = GEOMETRY_LIMITS["wheel_ratio"]
        if not lo <= cal.wheel_ratio_new <= hi:
            raise InputError(f"the measured wheel ratio {cal.wheel_ratio_new:.5f} is outside {lo:g} to {hi:g}; "
                             "nothing written (check the tyres and wheels, then run again)", key="wheel_ratio")
        ratio = round(cal.wheel_ratio_new, 6)
        write_profile_values(args.robot, {"track_mm": round(cal.track_mm_new, 2), "wheel_ratio": ratio},
                             f"UMBmark, {args.repeat} x {args.side_mm:g} mm squares each way: "
                             f"E_b {est.e_b:.5f}, E_d {est.e_d:.5f} (wheel_ratio = old x E_d)")
        print(f"Wrote track_mm = {cal.track_mm_new:.2f} and wheel_ratio = {ratio:.6f} to {args.robot}")
    return 0


def add_parser(calibrate_sub: argparse._SubParsersAction) -> None:
    p = calibrate_sub.add_parser(
        "odometry", help="UMBmark square test: wheel-diameter ratio and track width from return errors",
        description="Drive squares clockwise and counter-clockwise by the encoders alone and compare "
                    "where the robot really ends with where its odometry says it ends (UMBmark, "
                    "Borenstein & Feng 1996). Recommends track_mm and wheel_ratio (both written with "
                    "--write). On the simulator the end point comes from the truth; on a real "
                    "robot you measure it from a start mark after each square.")
    add_robot_options(p, repeat=5, repeat_means="squares each way")
    p.add_argument("--side-mm", type=float, default=600.0, help="side of the square (default 600 mm)")
    p.add_argument("--speed-pct", type=float, default=30.0, help="speed on the legs (default 30)")
    p.add_argument("--turn-speed-pct", type=float, default=25.0, help="speed of the spin turns (default 25)")
    p.add_argument("--verify", action="store_true",
                   help="drive the squares again with the corrected track and wheel ratio and show "
                        "E_max,syst after")
    p.set_defaults(func=cmd_odometry)
