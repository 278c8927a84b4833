"""`trackproof calibrate turns`: spin and pivot turns of several angles both ways, heading change
by the gyro, and spin_scale and pivot_scale fitted from them.

The hub turns a commanded angle A into motor degrees with the profile's scale s0
(hub_side/motion.py: A * track / D * spin_scale for a spin, twice that on the moving wheel for a
pivot; REFERENCES.md §9), so a robot whose true geometry differs turns A * s0 / s_true. Measured
against commanded, by least squares with t-based 95 % intervals:

    measured_deg = a + b * commanded_deg    per mode, over |A|, both directions pooled (measured
                                             signed along the commanded direction)

The intercept a is kept when its t-test says it is significant (p < 0.05): a fixed number of
degrees every turn adds whatever its size, typically the coast after the motors stop. Otherwise
the line goes through the origin. The recommended scale is s0 / b (its interval is s0 over the
ends of b's), and with it a turn of A ends near A + a. The profile's <group>_offset_deg o0 makes
the hub aim short by o0, so the turns measured here were aimed at A - o0 and a = c - b * o0 for a
coast of c degrees: the recommended offset is c = a + b * o0, with which a turn of A lands on A.

Pivots about the left and about the right wheel are fitted apart (wheels of unequal size make
them differ) and share the profile's one pivot_scale: s0 over the mean of their two slopes, with
the standard error of that mean and Welch-Satterthwaite degrees of freedom.
"""

from __future__ import annotations

import argparse
import math
from collections.abc import Callable
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from harness.calibrate.common import add_robot_options, check_action, fmt_ci, load_robot, number_list
from harness.jsonout import write_json
from harness.operator import Ask, ask_operator, confirm_real
from harness.calibrate.fit import LineFit, fit_with_offset_if_needed
from harness.calibrate.writeback import format_value, write_profile_values
from harness.errors import InputError, TrackproofError
from harness.links import Link, LinkSpec
from harness.movelog import MoveLog
from harness.profile import RobotProfile
from harness.robot import RobotConnector, open_real_link
from harness.session import Session
from harness.store import Store
from hub_side.motion import GEOMETRY_LIMITS
from harness.sim import truth_report, truth_snapshot

MODES = ("spin", "pivot_left", "pivot_right")
GROUPS = {"spin": ("spin",), "pivot": ("pivot_left", "pivot_right")}  # profile key: <group>_scale
DEFAULT_ANGLES = (45.0, 90.0, 180.0)


@dataclass
class TurnRun:
    mode: str
    commanded_deg: float  # signed: positive clockwise seen from above
    gyro_deg: float | None = None
    truth_deg: float | None = None
    note: str = ""

    @property
    def usable(self) -> bool:
        return not self.note and self.gyro_deg is not None


@dataclass
class ModeFit:
    """The turns of one mode: measured against commanded, with an intercept only if they ask."""

    mode: str
    fit: LineFit
    with_intercept: LineFit
    runs: list[TurnRun]  # in the order of fit.residuals

    def as_dict(self) -> dict[str, Any]:
        return {"mode": self.mode, "offset_significant": not self.fit.through_origin,
                "fit": self.fit.as_dict(), "with_intercept": self.with_intercept.as_dict()}


@dataclass
class ScaleFit:
    """One profile scale (spin_scale or pivot_scale), or one mode of it, from its turns. Modes
    are fitted apart and their slopes averaged: pooling pivots about unequal wheels in one line
    would inflate the residuals and hide an offset that each pivot shows on its own."""

    name: str  # spin, pivot, pivot_left, pivot_right
    profile_scale: float
    parts: list[ModeFit]
    slope: float  # measured degrees per commanded degree, at the profile's scale
    slope_se: float
    dof: float
    slope_ci: tuple[float, float]
    offset_deg: float  # mean of the parts' intercepts (0 for a part without one)
    scale: float
    scale_ci: tuple[float, float] | None  # None if the slope's interval reaches 0
    profile_offset_deg: float = 0.0  # what the hub aimed short by while these turns ran

    @property
    def recommended_offset_deg(self) -> float:
        """The coast a profile offset should hold: the intercept plus what the hub already took off."""
        return self.offset_deg + self.slope * self.profile_offset_deg

    @property
    def writes_offset(self) -> bool:
        """An offset goes into the profile when the data ask for one or the profile has one."""
        return self.offset_significant or self.profile_offset_deg != 0.0

    @property
    def modes(self) -> tuple[str, ...]:
        return tuple(p.mode for p in self.parts)

    @property
    def offset_significant(self) -> bool:
        return any(not p.fit.through_origin for p in self.parts)

    @property
    def n(self) -> int:
        return sum(p.fit.n for p in self.parts)

    def as_dict(self) -> dict[str, Any]:
        return {"name": self.name, "modes": list(self.modes), "profile_scale": self.profile_scale,
                "scale": self.scale, "scale_ci": list(self.scale_ci) if self.scale_ci else None,
                "slope": self.slope, "slope_se": self.slope_se, "slope_ci": list(self.slope_ci),
                "dof": self.dof, "offset_deg": self.offset_deg, "offset_significant": self.offset_significant,
                "profile_offset_deg": self.profile_offset_deg,
                "recommended_offset_deg": self.recommended_offset_deg,
                "parts": [p.as_dict() for p in self.parts]}


@dataclass
class TurnCalibration:
    scales: dict[str, ScaleFit]  # "spin" and/or "pivot": what the profile holds
    per_mode: dict[str, ScaleFit]  # pivot_left and pivot_right alone, when both were turned
    runs: list[TurnRun]

    def residual_rows(self) -> list[dict[str, Any]]:
        """Per mode, angle and direction: n, mean measured angle, mean residual from its mode's
        fit, and (simulator) mean gyro - truth."""
        rows = []
        for sf in self.scales.values():
            for part in sf.parts:
                residuals = dict(zip(map(id, part.runs), part.fit.residuals))
                keys = sorted({(abs(r.commanded_deg), r.commanded_deg > 0) for r in part.runs},
                              key=lambda k: (k[0], not k[1]))
                for angle, cw in keys:
                    these = [r for r in part.runs if abs(r.commanded_deg) == angle and (r.commanded_deg > 0) == cw]
                    truths = [r.gyro_deg - r.truth_deg for r in these if r.truth_deg is not None]
                    rows.append({"mode": part.mode, "angle_deg": angle, "direction": "cw" if cw else "ccw",
                                 "n": len(these),
                                 "measured_deg": float(np.mean([abs(r.gyro_deg) for r in these])),
                                 "residual_deg": float(np.mean([residuals[id(r)] for r in these])),
                                 "gyro_minus_truth_deg": float(np.mean(truths)) if truths else None})
        return rows

    def as_dict(self) -> dict[str, Any]:
        return {"scales": {k: v.as_dict() for k, v in self.scales.items()},
                "per_mode": {k: v.as_dict() for k, v in self.per_mode.items()},
                "residuals": self.residual_rows(), "runs": [asdict(r) for r in self.runs]}


# ------------------------------------------------------------------ analysis (pure)

def fit_mode(mode: str, runs: list[TurnRun], alpha: float = 0.05) -> ModeFit:
    used = [r for r in runs if r.usable and r.mode == mode]
    x = np.array([abs(r.commanded_deg) for r in used], dtype=np.float64)
    # Measured along the commanded direction, so both ways pool into one line.
    y = np.array([math.copysign(1.0, r.commanded_deg) * r.gyro_deg for r in used], dtype=np.float64)
    if len(used) < 3 or np.ptp(x) == 0:
        raise TrackproofError(f"{mode}: {len(used)} usable turns over {len(set(x.tolist()))} angle(s); "
                              "a fit needs at least 3 turns of at least 2 different angles")
    chosen, with_intercept = fit_with_offset_if_needed(x, y, alpha)
    return ModeFit(mode, chosen, with_intercept, used)


def combine(name: str, parts: list[ModeFit], profile_scale: float, profile_offset: float = 0.0) -> ScaleFit:
    """The mean of the parts' slopes, its standard error from theirs (independent turns), and
    Welch-Satterthwaite degrees of freedom for its t interval."""
    from scipy.stats import t

    k = len(parts)
    slope = sum(p.fit.slope for p in parts) / k
    variances = [p.fit.slope_se ** 2 for p in parts]
    se = math.sqrt(sum(variances)) / k
    if k == 1:
        dof = float(parts[0].fit.dof)
    else:
        spread = sum(v * v / p.fit.dof for v, p in zip(variances, parts))
        dof = sum(variances) ** 2 / spread if spread > 0 else float(sum(p.fit.dof for p in parts))
    half = float(t.ppf(0.975, dof)) * se
    low, high = slope - half, slope + half
    if slope <= 0:
        raise TrackproofError(f"{name}: the robot turned the wrong way or not at all (slope {slope:.3f}); "
                              "check the gyro's sign and the motor wiring")
    offset = sum(p.fit.intercept for p in parts) / k
    ci = (profile_scale / high, profile_scale / low) if low > 0 else None
    return ScaleFit(name, profile_scale, parts, slope, se, dof, (low, high), offset, profile_scale / slope, ci,
                    profile_offset)


def analyse_turns(runs: list[TurnRun], spin_scale: float, pivot_scale: float,
                  spin_offset_deg: float = 0.0, pivot_offset_deg: float = 0.0) -> TurnCalibration:
    """Fits per profile scale; the scales and offsets are the profile's while the turns ran."""
    present = {r.mode for r in runs if r.usable}
    profile = {"spin": (spin_scale, spin_offset_deg), "pivot": (pivot_scale, pivot_offset_deg)}
    fits = {mode: fit_mode(mode, runs) for mode in MODES if mode in present}
    scales = {group: combine(group, [fits[m] for m in modes if m in fits], *profile[group])
              for group, modes in GROUPS.items() if present & set(modes)}
    per_mode = {}
    if {"pivot_left", "pivot_right"} <= present:
        per_mode = {mode: combine(mode, [fits[mode]], *profile["pivot"]) for mode in ("pivot_left", "pivot_right")}
    return TurnCalibration(scales, per_mode, runs)


# ------------------------------------------------------------------ turning

def turn_plan(modes: list[str], angles: list[float], repeat: int) -> list[tuple[str, float]]:
    """Each angle clockwise then back counter-clockwise, so a pivoting robot returns to where it
    was and needs no reset."""
    return [(mode, sign * angle) for _ in range(repeat) for mode in modes for angle in angles for sign in (1, -1)]


def collect_turns(connector: RobotConnector, session: Session, plan: list[tuple[str, float]], *,
                  speed_pct: float, echo: Callable[[str], None] = lambda s: None,
                  log: MoveLog | None = None) -> list[TurnRun]:
    sim = connector.sim
    log = log or MoveLog()
    runs: list[TurnRun] = []
    for index, (mode, angle) in enumerate(plan, 1):
        run = TurnRun(mode, angle)
        runs.append(run)
        before = truth_snapshot(sim) if sim is not None else None
        record = log.run(session, f"{mode} {angle:+g} deg", "turn", turn_params(mode, angle, speed_pct),
                         telemetry_hz=0)
        if record.status != "done":
            run.note = f"turn ended {record.status}: {record.result.get('text', '')}".rstrip(": ")
        else:
            run.gyro_deg = float(record.result["heading_change_deg"])
        if before is not None and sim is not None:
            run.truth_deg = float(truth_report(before, truth_snapshot(sim))["heading_change_deg"])
        echo(f"turn {index}/{len(plan)}: {mode} {angle:+g} deg: "
             + (f"gyro {run.gyro_deg:+.2f} deg" if run.usable else f"not usable ({run.note})"))
    return runs


def turn_params(mode: str, angle_deg: float, speed_pct: float) -> dict[str, Any]:
    # By the encoders: the scales are what turns degrees of heading into motor degrees.
    return {"angle_deg": angle_deg, "mode": mode, "using": "encoders", "speed_pct": speed_pct}


# ------------------------------------------------------------------ output

def print_turns(cal: TurnCalibration, head: str) -> None:
    print(head)
    for group, sf in cal.scales.items():
        print(f"  {group} ({sf.n} turns): {group}_scale = {sf.scale:.5f} {fmt_ci(sf.scale_ci, 5)} (95 %); "
              f"the profile has {format_value(sf.profile_scale)}")
        for part in sf.parts:
            f, w = part.fit, part.with_intercept
            line = (f"{f.intercept:+.2f} {fmt_ci(f.intercept_ci, 2)} deg + " if not f.through_origin else "") + \
                f"{f.slope:.5f} {fmt_ci(f.slope_ci, 5)} x commanded"
            kept = "significant, kept" if not f.through_origin else "not significant, line through 0"
            print(f"    {part.mode}: measured = {line}; residual sd {f.residual_sd:.2f} deg")
            print(f"      intercept test: {w.intercept:+.2f} {fmt_ci(w.intercept_ci, 2)} deg, p = {w.intercept_p:.3g} "
                  f"({kept})")
        if len(sf.parts) > 1:
            print(f"    pooled: mean slope {sf.slope:.5f} {fmt_ci(sf.slope_ci, 5)}, {sf.dof:.1f} dof")
        if sf.writes_offset:
            print(f"    {group}_offset_deg = {sf.recommended_offset_deg:+.2f}; the profile has "
                  f"{format_value(sf.profile_offset_deg)}: turns by the encoders go on this far past their target "
                  "(the coast after the motors stop), so the hub aims that much short")
    if cal.per_mode:
        left, right = cal.per_mode["pivot_left"], cal.per_mode["pivot_right"]
        print(f"  alone: pivot_left {left.scale:.5f} {fmt_ci(left.scale_ci, 5)}, "
              f"pivot_right {right.scale:.5f} {fmt_ci(right.scale_ci, 5)}")
        if left.scale_ci and right.scale_ci and (left.scale_ci[0] > right.scale_ci[1]
                                                 or right.scale_ci[0] > left.scale_ci[1]):
            print("    they differ (their intervals do not overlap): the wheels are likely of unequal size; "
                  "the profile's one pivot_scale suits their mean")
    rows = cal.residual_rows()
    truth = any(r["gyro_minus_truth_deg"] is not None for r in rows)
    print(f"\n  {'mode':12} {'angle':>6} {'dir':>4} {'n':>3} {'measured':>9} {'residual':>9}"
          + (f" {'gyro-truth':>10}" if truth else ""))
    for r in rows:
        gt = r["gyro_minus_truth_deg"]
        print(f"  {r['mode']:12} {r['angle_deg']:>6g} {r['direction']:>4} {r['n']:>3} {r['measured_deg']:>9.2f} "
              f"{r['residual_deg']:>+9.2f}" + (f" {gt:>+10.2f}" if truth and gt is not None else ""))
    for r in cal.runs:
        if not r.usable:
            print(f"  not used: {r.mode} {r.commanded_deg:+g} deg: {r.note}")


# ------------------------------------------------------------------ command

def offset_key(mode: str) -> str:
    return "spin_offset_deg" if mode == "spin" else "pivot_offset_deg"


def profile_offset(profile: RobotProfile, mode: str) -> float:
    return float(getattr(profile, offset_key(mode)))


def offset_not_writable(key: str, value: float, hub_geometry: dict[str, float]) -> str:
    """Why a recommended offset should not go into the profile ("" if it may): the hub that was
    calibrated would refuse it in the next hello, or it is outside what any hub takes."""
    if key not in hub_geometry:
        return "this hub does not know the key and would refuse it; update it (trackproof hub install) first"
    low, high = GEOMETRY_LIMITS[key]
    if not low <= value <= high:
        return (f"outside {low:g} to {high:g} deg; a coast that large points at the turn itself "
                "(speed, slow_deg, brakes), not at an offset")
    return ""


def _modes(text: str) -> list[str]:
    modes = [m.strip() for m in text.split(",") if m.strip()]
    for mode in modes:
        if mode not in MODES:
            raise argparse.ArgumentTypeError(f"unknown mode {mode!r} (known: {', '.join(MODES)})")
    if not modes:
        raise argparse.ArgumentTypeError("expected at least one mode")
    return modes


def add_parser(calibrate_sub: argparse._SubParsersAction) -> None:
    p = calibrate_sub.add_parser(
        "turns", help="fit spin_scale and pivot_scale from gyro-measured turns",
        description="Turn by the encoders through several angles both ways, measure each heading change "
                    "with the gyro, and fit spin_scale and pivot_scale (with spin_offset_deg and "
                    "pivot_offset_deg, the coast, when the data ask for one) with 95 % intervals and "
                    "residuals. The coast grows with the speed a turn ends at, so calibrate at the speed "
                    "you turn at. Exit codes: 0 done, 1 too few usable turns, 2 bad input, 3 link "
                    "failure, 130 stopped.")
    add_robot_options(p, repeat=2)
    p.add_argument("--angles", type=number_list(0, 1080), default=list(DEFAULT_ANGLES),
                   help="angles in degrees, comma-separated, each turned both ways (default 45,90,180)")
    p.add_argument("--modes", type=_modes, default=list(MODES),
                   help="spin, pivot_left, pivot_right, comma-separated (default all three)")
    p.add_argument("--speed-pct", type=float, default=40.0, help="turn speed in percent (default 40)")
    p.set_defaults(func=cmd_turns)


def cmd_turns(args: argparse.Namespace, ask: Ask = ask_operator,
              open_link: Callable[[LinkSpec, RobotProfile], Link] = open_real_link) -> int:
    angles = sorted(set(args.angles))
    if len(angles) < 2:
        raise InputError("at least two different angles are needed to fit a line", key="--angles")
    modes = list(dict.fromkeys(args.modes))
    profile, connector = load_robot(args, open_link)
    for mode in modes:
        check_action("turn", turn_params(mode, max(angles), args.speed_pct), profile)
        offset = profile_offset(profile, mode)
        if angles[0] <= offset:
            raise InputError(f"{angles[0]:g} deg is within the profile's {offset_key(mode)} of {offset:g} deg: "
                             "the hub would not turn at all; use larger angles", key="--angles")
    plan = turn_plan(modes, angles, args.repeat)
    options = {"angles": angles, "modes": modes, "speed_pct": args.speed_pct, "repeat": args.repeat}
    with Store(args.db) as store, MoveLog(store, connector, "calibrate turns", options) as log:
        session = connector.connect()
        echo = (lambda s: None) if connector.sim is not None else (lambda s: print(s, flush=True))
        hub = session.hub
        try:
            if hub is not None and hub.board.get("gyro") is False:
                raise InputError(f"hub {hub.robot_id} reports no gyro: turns are measured with one", key="--link")
            confirm_real(session, f"About to turn {len(plan)} times in place ({', '.join(modes)}; "
                                  f"{', '.join(f'{a:g}' for a in angles)} deg each way at {args.speed_pct:g} %). "
                                  "Pivots sweep a circle of the track's radius around a wheel: leave room.", ask)
            runs = collect_turns(connector, session, plan, speed_pct=args.speed_pct, echo=echo, log=log)
        finally:
            session.close()
    cal = analyse_turns(runs, profile.spin_scale, profile.pivot_scale, profile.spin_offset_deg,
                        profile.pivot_offset_deg)
    usable = sum(r.usable for r in runs)
    print_turns(cal, f"turn calibration of {profile.id} over {args.link}: {usable} usable turns of {len(runs)} "
                     f"at {args.speed_pct:g} % by the encoders, heading by the gyro")
    print(log.kept())
    report = {"command": "calibrate turns", "robot": profile.id, "link": args.link, "seed": args.seed,
              "speed_pct": args.speed_pct, **cal.as_dict(), "written": None, "stored_session": log.uid}
    if args.write:
        values: dict[str, float] = {}
        for group, sf in cal.scales.items():
            values[f"{group}_scale"] = round(sf.scale, 5)
            if sf.writes_offset:
                key, offset = f"{group}_offset_deg", round(sf.recommended_offset_deg, 2)
                skip = offset_not_writable(key, offset, hub.geometry if hub is not None else {})
                if skip:
                    print(f"not written: {key} = {offset:+.2f}: {skip}")
                    report.setdefault("not_written", {})[key] = skip
                else:
                    values[key] = offset
        why = f"trackproof calibrate turns, {usable} turns over {args.link} at {args.speed_pct:g} %"
        write_profile_values(args.robot, values, why)
        report["written"] = {"file": str(args.robot), **values}
        print("wrote " + ", ".join(f"{k} = {format_value(v)}" for k, v in values.items()) + f" to {args.robot}")
    if args.json:
        write_json(args.json, report)
    return 0
