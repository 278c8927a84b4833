"""The `trackproof` command line."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from harness.errors import InputError, TrackproofError
from harness.links import SimLink
from harness.profile import load_profile
from harness.session import Session
from harness.sim import DEFAULT_COURSE, DEFAULT_PROFILE, Simulation, truth_report, truth_snapshot
from harness.sim.course import load_course
from hub_side.actions import BUILTINS
from hub_side.motion import ParamError, check_params

SAFETY_NOTE = ("Safety: a real robot moves on its own. Keep fingers and loose cables clear, run it "
               "on the floor or a mat with edges, never leave lithium batteries charging or running "
               "unattended, and follow your venue's and the manufacturer's rules.")


def parse_value(text: str) -> Any:
    """A key=value value: number, true/false, a comma list (sensors), or a plain string."""
    if "," in text:
        return [parse_value(part) for part in text.split(",") if part]
    if text in ("true", "false"):
        return text == "true"
    for kind in (int, float):
        try:
            return kind(text)
        except ValueError:
            pass
    return text


def parse_assignments(items: list[str]) -> dict[str, Any]:
    params: dict[str, Any] = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key:
            raise InputError(f"expected key=value, got {item!r}", key="parameters")
        if key in params:
            raise InputError(f"{key} given twice", key="parameters")
        params[key] = parse_value(value)
    return params


def checked_action_params(action: str, params: dict[str, Any], sensor_names: tuple[str, ...]) -> dict[str, Any]:
    """Check on the host, before anything moves, what the hub would refuse."""
    if action not in BUILTINS:
        raise InputError(f"unknown action {action!r} (known: {', '.join(sorted(BUILTINS))})", key="ACTION")
    try:
        check_params(BUILTINS[action][1], params, sensor_names)
    except ParamError as exc:
        raise InputError(exc.text, key=f"{action}.{exc.key}") from None
    return params


def cmd_sim(args: argparse.Namespace) -> int:
    profile = load_profile(args.robot or DEFAULT_PROFILE)
    course = load_course(args.course or DEFAULT_COURSE)
    params = profile.action_defaults(args.action, parse_assignments(args.params))
    checked_action_params(args.action, params, tuple(profile.sensors))
    sim = Simulation(course, profile, seed=args.seed)
    session = Session(SimLink(sim), watchdog_ms=profile.watchdog_ms, session_id=f"sim-{args.seed}")
    session.hello(geometry=profile.geometry(), expect_robot_id=profile.id)
    before = truth_snapshot(sim)
    record = session.run(args.action, params, telemetry_hz=args.telemetry_hz)
    truth = truth_report(before, truth_snapshot(sim))
    summary = record.telemetry.summary()
    if args.telemetry_csv:
        record.telemetry.to_dataframe().to_csv(args.telemetry_csv, index=False)
    report = {
        "action": args.action,
        "params": params,
        "seed": args.seed,
        "robot": profile.id,
        "course": course.name,
        "result": record.result,
        "events": record.events,
        "faults": record.faults,
        "truth": truth,
        "telemetry": summary,
    }
    if args.json:
        print(json.dumps(report, indent=2))
    else:
        print_sim_report(report)
    return 0 if record.status in ("done",) else 1


def print_sim_report(report: dict[str, Any]) -> None:
    result = dict(report["result"])
    print(f"{report['action']} on simulated {report['robot']} ({report['course']}, seed {report['seed']}): "
          f"{result.pop('status')}")
    result.pop("action", None)
    print("  measured by the hub: " + ", ".join(f"{k}={v}" for k, v in result.items()))
    for event in report["events"]:
        fields = ", ".join(f"{k}={v}" for k, v in event.items() if k not in ("kind", "t_s"))
        print(f"  event at {event['t_s']:.2f} s: {event['kind']} {fields}")
    for fault in report["faults"]:
        print(f"  fault: {fault.get('code')}: {fault.get('text')}")
    truth = report["truth"]
    end = truth["end"]
    print(f"  truth: travelled {truth['travel_mm']:.1f} mm, turned {truth['heading_change_deg']:.2f} deg, "
          f"ended at x={end['x_mm']:.1f} y={end['y_mm']:.1f} mm heading {end['heading_deg']:.2f} deg")
    crossings = truth["cross_line_end"]
    if crossings:
        print("  truth, sensor to nearest crossing line: " + ", ".join(
            f"{name} {c['distance_mm']:.1f} mm ({c['line']})" for name, c in crossings.items()))
    tel = report["telemetry"]
    print(f"  telemetry: {tel['samples']} samples over {tel['duration_s']:.2f} s, {tel['dropped']} dropped, "
          f"channels: {', '.join(tel['channels'])}")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="trackproof",
        description="Repeatability harness for line-following robots.",
        epilog=SAFETY_NOTE,
    )
    sub = parser.add_subparsers(dest="command", required=True)
    sim = sub.add_parser("sim", help="run one action on the simulated robot",
                         description="Run one action on the simulated robot and print its result, "
                                     "the truth, and a telemetry summary.")
    sim.add_argument("action", metavar="ACTION", help=f"one of: {', '.join(sorted(BUILTINS))}")
    sim.add_argument("params", metavar="key=value", nargs="*", help="action parameters")
    sim.add_argument("--course", type=Path, help=f"course file (default {DEFAULT_COURSE.name})")
    sim.add_argument("--robot", type=Path, help=f"robot profile (default {DEFAULT_PROFILE.name})")
    sim.add_argument("--seed", type=int, default=0, help="random seed (same seed, same run)")
    sim.add_argument("--telemetry-hz", type=int, default=100, help="telemetry rate, 0..500 (default 100)")
    sim.add_argument("--telemetry-csv", type=Path, metavar="PATH", help="write the telemetry as CSV")
    sim.add_argument("--json", action="store_true", help="print one JSON object")
    sim.set_defaults(func=cmd_sim)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except TrackproofError as exc:
        print(f"trackproof: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("trackproof: interrupted; the robot was told to stop", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
