"""`trackproof calibrate distance`: drive known distances, fit the distance correction factor, and
show how the stop overrun grows with speed.

Each run drives `distance_mm` (along the line with follow_line, or drive_straight) at one speed.
The hub reports the motor degrees it turned (mean of the two encoders, coasting included); the
distance really travelled comes from the simulator's truth, from the operator's ruler, or from
probe_edge to a line a known distance ahead. Then

    motor_deg = k * travelled_mm            (least squares through the origin, t-based 95 % CI)
    distance_scale = k / (360 / (pi * wheel_diameter_mm))

because the hub turns millimetres into motor degrees as 360 / (pi D) * distance_scale
(hub_side/motion.py deg_per_mm; Borenstein, Everett & Feng 1996, eq. 1.2, see REFERENCES.md §9).

The stop overrun is how far the robot goes on after the encoders said stop: the hub's own final
distance minus the commanded one, in true millimetres (times profile scale / fitted scale). It
grows with speed (the robot coasts at the speed it had); a line overrun = a + b * speed_pct is
fitted over all runs. The factor above is the same at every speed; a factor per speed band that
also absorbs that band's overrun, for drives of about --for-mm, is

    distance_scale_band = distance_scale * (1 - overrun_mm / for_mm)

since the robot then cuts power after distance_scale_band / distance_scale of the distance and
coasts the rest. It is exact only near that distance: the overrun is a length, not a proportion.
"""

from __future__ import annotations

import argparse
import math
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from harness.analysis import Summary, summarize
from harness.calibrate.common import add_robot_options, check_action, fmt_ci, load_robot, number_list
from harness.jsonout import write_json
from harness.operator import Ask, OperatorStopped, ask_operator, confirm_real
from harness.calibrate.fit import LineFit, fit_line, fit_through_origin
from harness.calibrate.writeback import format_value, write_profile_values
from harness.errors import InputError, TrackproofError
from harness.links import Link, LinkSpec
from harness.movelog import MoveLog
from harness.profile import RobotProfile
from harness.robot import RobotConnector, open_real_link
from harness.session import Session
from harness.sim import truth_report, truth_snapshot
from harness.store import Store

ACTIONS = ("follow_line", "drive_straight")
MEASURES = ("truth", "ruler", "probe")
DEFAULT_SPEEDS = (20.0, 40.0, 60.0)
DEFAULT_DISTANCES = (200.0, 400.0, 600.0)


def nominal_deg_per_mm(wheel_diameter_mm: float) -> float:
    """Motor degrees per millimetre for a wheel of this diameter: 360 / (pi D)."""
    return 360.0 / (math.pi * wheel_diameter_mm)


@dataclass
class DriveRun:
    speed_pct: float
    commanded_mm: float
    motor_deg: float | None = None  # mean of the two encoders' change, coasting included
    hub_mm: float | None = None  # the hub's own final distance, with the profile's distance_scale
    reference_mm: float | None = None  # really travelled, by truth or ruler
    edge_mm: float | None = None  # probe: the hub's distance from the stop on to the line's edge
    truth_mm: float | None = None  # the simulator's truth, whatever the reference
    note: str = ""  # why the run is not usable, if it is not

    @property
    def usable(self) -> bool:
        return (not self.note and self.motor_deg is not None and self.hub_mm is not None
                and (self.reference_mm is not None or self.edge_mm is not None))


@dataclass
class SpeedBand:
    speed_pct: float
    low_pct: float
    high_pct: float
    n: int
    factor: float
    factor_ci: tuple[float, float] | None  # None when too few runs at this speed for a fit
    overrun: Summary
    band_factor: float  # distance_scale that lands drives of about for_mm at this speed


@dataclass
class DistanceCalibration:
    wheel_diameter_mm: float
    profile_scale: float
    nominal_deg_per_mm: float
    fit: LineFit  # motor degrees against travelled millimetres, through the origin
    intercept_check: LineFit | None  # the same with an intercept: is a line through 0 right?
    factor: float
    factor_ci: tuple[float, float]
    bands: list[SpeedBand]
    overrun_fit: LineFit | None  # overrun_mm against speed_pct
    for_mm: float
    runs: list[DriveRun]
    travelled_mm: list[float] = field(default_factory=list)  # the reference used, per usable run

    def band_for(self, speed_pct: float) -> SpeedBand:
        for band in self.bands:
            if band.low_pct <= speed_pct < band.high_pct or (speed_pct == band.high_pct == 100.0):
                return band
        raise InputError(f"no speed band holds {speed_pct:g} %", key="--band")

    def as_dict(self) -> dict[str, Any]:
        return {
            "wheel_diameter_mm": self.wheel_diameter_mm,
            "profile_distance_scale": self.profile_scale,
            "nominal_deg_per_mm": self.nominal_deg_per_mm,
            "deg_per_mm": self.fit.slope,
            "deg_per_mm_ci": list(self.fit.slope_ci),
            "distance_scale": self.factor,
            "distance_scale_ci": list(self.factor_ci),
            "fit": self.fit.as_dict(),
            "intercept_check": self.intercept_check.as_dict() if self.intercept_check else None,
            "overrun_fit": self.overrun_fit.as_dict() if self.overrun_fit else None,
            "for_mm": self.for_mm,
            "bands": [{"speed_pct": b.speed_pct, "low_pct": b.low_pct, "high_pct": b.high_pct, "n": b.n,
                       "distance_scale": b.factor,
                       "distance_scale_ci": list(b.factor_ci) if b.factor_ci else None,
                       "overrun_mm": b.overrun.as_dict(), "band_distance_scale": b.band_factor}
                      for b in self.bands],
            "travelled_mm": self.travelled_mm,
            "runs": [asdict(r) for r in self.runs],
        }


# ------------------------------------------------------------------ analysis (pure)

def analyse_distance(runs: list[DriveRun], *, wheel_diameter_mm: float, profile_scale: float,
                     for_mm: float = 500.0, line_mm: float | None = None) -> DistanceCalibration:
    """Fits from the runs. Probe runs (edge_mm set) are travelled = line_mm - edge, where the edge
    distance, measured by the hub with the profile's factor, is corrected by the fitted one
    (one refinement pass: the edge is short, so the correction is small)."""
    usable = [r for r in runs if r.usable]
    if len(usable) < 2:
        raise TrackproofError(f"only {len(usable)} usable run(s) of {len(runs)}: a fit needs at least 2")
    k_nom = nominal_deg_per_mm(wheel_diameter_mm)
    motor = np.array([r.motor_deg for r in usable], dtype=np.float64)
    probing = any(r.edge_mm is not None for r in usable)
    if probing and line_mm is None:
        raise InputError("probe runs need the distance to the line (--line-mm)", key="--line-mm")

    def travelled(correction: float) -> np.ndarray:
        return np.array([r.reference_mm if r.edge_mm is None else line_mm - r.edge_mm * correction
                         for r in usable], dtype=np.float64)

    x = travelled(1.0)
    fit = fit_through_origin(x, motor)
    if probing:
        x = travelled(profile_scale / (fit.slope / k_nom))
        fit = fit_through_origin(x, motor)
    factor = fit.slope / k_nom
    factor_ci = (fit.slope_ci[0] / k_nom, fit.slope_ci[1] / k_nom)
    intercept_check = None
    if len(usable) >= 3 and np.ptp(x) > 0:
        intercept_check = fit_line(x, motor)

    speeds = sorted({r.speed_pct for r in usable})
    bands: list[SpeedBand] = []
    overrun_x: list[float] = []
    overrun_y: list[float] = []
    for i, speed in enumerate(speeds):
        at = [j for j, r in enumerate(usable) if r.speed_pct == speed]
        band_fit = fit_through_origin(x[at], motor[at]) if len(at) >= 2 else None
        band_scale = band_fit.slope / k_nom if band_fit else factor
        ci = (band_fit.slope_ci[0] / k_nom, band_fit.slope_ci[1] / k_nom) if band_fit else None
        # The hub's millimetres are true ones times band_scale / profile_scale.
        overruns = [(usable[j].hub_mm - usable[j].commanded_mm) * profile_scale / band_scale for j in at]
        overrun_x += [speed] * len(at)
        overrun_y += overruns
        stats = summarize(overruns)
        low = 0.0 if i == 0 else (speeds[i - 1] + speed) / 2.0
        high = 100.0 if i == len(speeds) - 1 else (speed + speeds[i + 1]) / 2.0
        bands.append(SpeedBand(speed, low, high, len(at), band_scale, ci, stats,
                               band_scale * (1.0 - stats.mean / for_mm)))
    overrun_fit = None
    if len(speeds) >= 2 and len(overrun_y) >= 3:
        overrun_fit = fit_line(overrun_x, overrun_y)
    return DistanceCalibration(wheel_diameter_mm, profile_scale, k_nom, fit, intercept_check, factor,
                               factor_ci, bands, overrun_fit, for_mm, runs, [float(v) for v in x])


# ------------------------------------------------------------------ driving

def drive_params(action: str, profile: RobotProfile, distance_mm: float, speed_pct: float) -> dict[str, Any]:
    # Generous: about 4 mm/s per percent of speed on a small robot, three times over.
    timeout_s = min(3600.0, max(30.0, 0.75 * distance_mm / speed_pct))
    params = {"distance_mm": distance_mm, "speed_pct": speed_pct, "timeout_s": round(timeout_s, 1)}
    return profile.action_defaults(action, params)


def collect_drives(connector: RobotConnector, session: Session, plan: list[tuple[float, float]], *,
                   action: str, measure: str, ask: Ask, line_mm: float | None = None,
                   probe_sensor: str | None = None, echo: Callable[[str], None] = lambda s: None,
                   log: MoveLog | None = None) -> list[DriveRun]:
    """Drive each (speed_pct, distance_mm) of the plan from the start mark and measure it."""
    profile = connector.profile
    sim = connector.sim
    log = log or MoveLog()
    runs: list[DriveRun] = []
    for index, (speed, distance) in enumerate(plan, 1):
        run = DriveRun(speed, distance)
        runs.append(run)
        label = f"run {index}/{len(plan)}: {distance:g} mm at {speed:g} %"
        if not connector.place_at_start(session, ask, f"[{label}] put the robot on the start mark", can_skip=True):
            run.note = "skipped by the operator"
            continue
        before = truth_snapshot(sim) if sim is not None else None
        record = log.run(session, f"{action} {distance:g} mm at {speed:g} %", action,
                         drive_params(action, profile, distance, speed), telemetry_hz=0)
        truth = truth_report(before, truth_snapshot(sim)) if before is not None and sim is not None else None
        result = record.result
        if record.status != "done":
            run.note = f"{action} ended {record.status}: {result.get('text', '')}".rstrip(": ")
            echo(f"{label}: not usable ({run.note})")
            continue
        run.motor_deg = (float(result["enc_left_deg"]) + float(result["enc_right_deg"])) / 2.0
        run.hub_mm = float(result["distance_mm"])
        if truth is not None:
            run.truth_mm = float(truth["travel_mm"])
        if measure == "truth":
            run.reference_mm = run.truth_mm
        elif measure == "ruler":
            run.reference_mm = _ask_ruler(ask, label, run)
        else:
            _probe(log, session, profile, run, line_mm, probe_sensor)
        echo(f"{label}: motor {run.motor_deg:.1f} deg, hub {run.hub_mm:.1f} mm"
             + (f", reference {run.reference_mm:.1f} mm" if run.reference_mm is not None else "")
             + (f", edge {run.edge_mm:.1f} mm" if run.edge_mm is not None else "")
             + (f" ({run.note})" if run.note else ""))
    return runs


def _ask_ruler(ask: Ask, label: str, run: DriveRun) -> float | None:
    while True:
        answer = ask(f"[{label}] distance travelled by the ruler, in mm (s to skip, q to quit): ").strip().lower()
        if answer == "q":
            raise OperatorStopped("stopped by the operator; nothing written")
        if answer == "s":
            run.note = "no ruler reading"
            return None
        try:
            value = float(answer)
        except ValueError:
            continue
        if math.isfinite(value) and value > 0:
            return value


def _probe(log: MoveLog, session: Session, profile: RobotProfile, run: DriveRun, line_mm: float | None,
           sensor: str | None) -> None:
    """Creep on until the probe sensor crosses the near edge of the line ahead."""
    if line_mm is None or sensor is None:
        raise InputError("--measure probe needs --line-mm and --probe-sensor", key="--measure")
    params = profile.action_defaults("probe_edge", {
        "sensor": sensor, "direction": "forward",
        "max_mm": min(10000.0, max(1.0, line_mm - run.commanded_mm + 60.0))})
    record = log.run(session, f"probe_edge after {run.commanded_mm:g} mm at {run.speed_pct:g} %", "probe_edge",
                     params, telemetry_hz=0)
    result = record.result
    if record.status != "done" or result.get("edge_mm") is None:
        run.note = "probe found no line edge ahead"
    elif result.get("from") == "dark":
        run.note = "stopped on the line already: use shorter distances or a farther line"
    else:
        run.edge_mm = float(result["edge_mm"])


# ------------------------------------------------------------------ output

def print_distance(cal: DistanceCalibration, head: str) -> None:
    fit = cal.fit
    print(head)
    print(f"  nominal: {cal.nominal_deg_per_mm:.5f} motor deg/mm for a {cal.wheel_diameter_mm:g} mm wheel; "
          f"the profile has distance_scale {format_value(cal.profile_scale)}")
    print(f"  fitted:  {fit.slope:.5f} motor deg/mm {fmt_ci(fit.slope_ci, 5)} (95 %), n = {fit.n}, "
          f"residual sd {fit.residual_sd:.2f} motor deg")
    print(f"  distance_scale = {cal.factor:.5f} {fmt_ci(cal.factor_ci, 5)} (95 %)")
    check = cal.intercept_check
    if check is not None and check.intercept_p is not None:
        verdict = ("significant: something besides the wheel size adds or loses distance, e.g. slip at the start"
                   if check.intercept_p < 0.05 else "not significant: a line through 0 fits")
        print(f"  intercept test: {check.intercept:+.2f} motor deg, p = {check.intercept_p:.3f} ({verdict})")
    print(f"\n  {'speed':>6} {'band':>9} {'n':>3}  {'distance_scale [95 % CI]':28} "
          f"{'overrun mm [95 % CI]':23} {'sd':>5}  factor for {cal.for_mm:g} mm")
    for b in cal.bands:
        o = b.overrun
        overrun = f"{o.mean:.2f} [{o.ci95_low:.2f}, {o.ci95_high:.2f}]" if o.n >= 2 else f"{o.mean:.2f}"
        print(f"  {b.speed_pct:>5g}% {f'{b.low_pct:g}-{b.high_pct:g}%':>9} {b.n:>3}  "
              f"{f'{b.factor:.5f} {fmt_ci(b.factor_ci, 5)}':28} {overrun:23} "
              f"{'-' if math.isnan(o.sd) else f'{o.sd:.2f}':>5}  {b.band_factor:.5f}")
    of = cal.overrun_fit
    if of is not None:
        print(f"\n  overrun_mm = {of.intercept:.2f} {fmt_ci(of.intercept_ci, 2)} + {of.slope:.4f} "
              f"{fmt_ci(of.slope_ci, 4)} x speed_pct (95 %), residual sd {of.residual_sd:.2f} mm")
    print(f"  recommended: distance_scale = {cal.factor:.5f} at every speed, asking for each distance minus "
          "its band's overrun;\n  or, for moves at one speed, that band's factor (exact near "
          f"{cal.for_mm:g} mm only).")
    for r in cal.runs:
        if not r.usable:
            print(f"  not used: {r.commanded_mm:g} mm at {r.speed_pct:g} %: {r.note}")


# ------------------------------------------------------------------ command

def add_parser(calibrate_sub: argparse._SubParsersAction) -> None:
    p = calibrate_sub.add_parser(
        "distance", help="fit the distance correction factor and the stop overrun by speed",
        description="Drive known distances at several speeds, fit distance_scale (motor degrees per mm "
                    "against the nominal wheel) with a 95 % confidence interval, and show how the stop "
                    "overrun grows with speed. Exit codes: 0 done, 1 too few usable runs, 2 bad input, "
                    "3 link failure, 130 stopped.")
    add_robot_options(p, repeat=3)
    p.add_argument("--speeds", type=number_list(0, 100), default=list(DEFAULT_SPEEDS),
                   help="speeds in percent, comma-separated (default 20,40,60)")
    p.add_argument("--distances", type=number_list(0, 100000), default=list(DEFAULT_DISTANCES),
                   help="distances in mm, comma-separated (default 200,400,600)")
    p.add_argument("--action", choices=ACTIONS, default="follow_line",
                   help="follow_line (along the line, default) or drive_straight")
    p.add_argument("--measure", choices=MEASURES,
                   help="how the travelled distance is known: truth (simulator, its default), ruler "
                        "(the operator types it in, default on a real robot), or probe (probe_edge to a "
                        "line --line-mm ahead of --probe-sensor at the start; rough: the sensor sees "
                        "an edge a millimetre or two early, about 1 %% on a 300 mm drive)")
    p.add_argument("--line-mm", type=float, help="probe: from the probe sensor at the start mark to the near "
                                                 "edge of the line ahead, in mm")
    p.add_argument("--probe-sensor", help="probe: the sensor that finds that line")
    p.add_argument("--for-mm", type=float, default=500.0,
                   help="the drive length the per-band factors are for (default 500)")
    p.add_argument("--band", type=float, metavar="SPEED_PCT",
                   help="with --write: write the factor of the band holding this speed, not the all-speed one")
    p.set_defaults(func=cmd_distance)


def cmd_distance(args: argparse.Namespace, ask: Ask = ask_operator,
                 open_link: Callable[[LinkSpec, RobotProfile], Link] = open_real_link) -> int:
    measure = args.measure or ("truth" if args.link.startswith("sim") else "ruler")
    if measure == "truth" and not args.link.startswith("sim"):
        raise InputError("only the simulator knows the truth: use --measure ruler or probe", key="--measure")
    if not (args.for_mm > 0 and math.isfinite(args.for_mm)):
        raise InputError(f"must be a distance above 0 mm, got {args.for_mm:g}", key="--for-mm")
    if args.band is not None and not 0 < args.band <= 100:
        raise InputError(f"must be a speed in 0..100 %, got {args.band:g}", key="--band")
    distances = sorted(set(args.distances))
    speeds = sorted(set(args.speeds))
    profile, connector = load_robot(args, open_link)
    if measure == "probe":
        if args.line_mm is None or args.probe_sensor is None:
            raise InputError("--measure probe needs --line-mm and --probe-sensor", key="--measure")
        if args.probe_sensor not in profile.sensors:
            raise InputError(f"unknown sensor {args.probe_sensor!r} (profile has: {', '.join(profile.sensors)})",
                             key="--probe-sensor")
        if max(distances) >= args.line_mm:
            raise InputError(f"the longest distance ({max(distances):g} mm) must stop short of the line "
                             f"({args.line_mm:g} mm)", key="--distances")
    if args.action == "follow_line" and "forward" not in profile.follow:
        raise InputError("follow_line needs [follow.forward] in the robot profile (or use --action drive_straight)",
                         file=profile.source, key="follow.forward")
    for speed in speeds:
        check_action(args.action, drive_params(args.action, profile, max(distances), speed), profile)
    plan = [(speed, distance) for _ in range(args.repeat) for speed in speeds for distance in distances]
    options = {"action": args.action, "distances": distances, "speeds": speeds, "measure": measure,
               "line_mm": args.line_mm, "probe_sensor": args.probe_sensor, "repeat": args.repeat}
    with Store(args.db) as store, MoveLog(store, connector, "calibrate distance", options) as log:
        session = connector.connect()
        echo = (lambda s: None) if connector.sim is not None else (lambda s: print(s, flush=True))
        try:
            confirm_real(session, f"About to drive {len(plan)} times ({args.action}: "
                                  f"{', '.join(f'{d:g}' for d in distances)} mm at "
                                  f"{', '.join(f'{s:g}' for s in speeds)} %), measured by {measure}.", ask)
            runs = collect_drives(connector, session, plan, action=args.action, measure=measure, ask=ask,
                                  line_mm=args.line_mm, probe_sensor=args.probe_sensor, echo=echo, log=log)
        finally:
            session.close()
    cal = analyse_distance(runs, wheel_diameter_mm=profile.wheel_diameter_mm, profile_scale=profile.distance_scale,
                           for_mm=args.for_mm, line_mm=args.line_mm)
    usable = sum(r.usable for r in runs)
    print_distance(cal, f"distance calibration of {profile.id} over {args.link}: {args.action}, "
                        f"{usable} usable runs of {len(runs)}, travelled distance by {measure}")
    print(log.kept())
    report = {"command": "calibrate distance", "robot": profile.id, "link": args.link, "seed": args.seed,
              "action": args.action, "measure": measure, **cal.as_dict(), "written": None,
              "stored_session": log.uid}
    if args.write:
        if args.band is not None:
            band = cal.band_for(args.band)
            value = round(band.band_factor, 5)
            why = (f"trackproof calibrate distance, band {band.low_pct:g}-{band.high_pct:g} % for drives of about "
                   f"{cal.for_mm:g} mm (overrun {band.overrun.mean:.1f} mm), {usable} runs over {args.link}")
        else:
            value = round(cal.factor, 5)
            why = (f"trackproof calibrate distance, {usable} runs over {args.link}, 95 % CI "
                   f"{fmt_ci(cal.factor_ci, 5)}")
        write_profile_values(args.robot, {"distance_scale": value}, why)
        report["written"] = {"file": str(args.robot), "distance_scale": value}
        print(f"wrote distance_scale = {format_value(value)} to {args.robot}")
    if args.json:
        write_json(args.json, report)
    return 0
