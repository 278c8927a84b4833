"""The `trackproof` command line."""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections import Counter
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from harness.calibrate import add_calibrate_parser
from harness.calibrate.common import whole_number
from harness.compare import add_parser as add_compare_parser
from harness.errors import InputError, TrackproofError
from harness.jsonout import check_writable, write_text
from harness.links import SimLink, parse_faults
from harness.profile import load_profile
from harness.report import print_report, why_runs_failed, write_junit, write_summary_json
from harness.operator import SAFETY_NOTE, OperatorStopped
from harness.runner import Runner, judge_case, stored_outcomes
from harness.session import Session
from harness.sim import DEFAULT_COURSE, DEFAULT_PROFILE, SUITES_DIR, Simulation, truth_report, truth_snapshot
from harness.sim.course import load_course
from harness.store import DEFAULT_DB, Store
from harness.tuning import add_parser as add_tune_parser
from harness.suites import Suite, load_suite, stored_cases
from hub_side.actions import BUILTINS
from hub_side.motion import ParamError, check_params

DEMO_SUITE = SUITES_DIR / "demo.toml"


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
    if args.action == "serve":
        from harness.sim.serve import serve_on_pty

        ignored = [name for name, given in (("key=value parameters", args.params), ("--json", args.json),
                                            ("--telemetry-csv", args.telemetry_csv),
                                            ("--telemetry-hz", args.telemetry_hz is not None)) if given]
        if ignored:
            raise InputError(f"takes no {', '.join(ignored)}: the host that connects asks for the moves",
                             key="sim serve")
        return serve_on_pty(args)
    for option, value in (("--baud", args.baud), ("--secret", args.secret)):
        if value is not None:
            raise InputError("is for sim serve only (a one-off move has no serial link)", key=option)
    if args.telemetry_hz is None:
        args.telemetry_hz = 100
    elif not 0 <= args.telemetry_hz <= 500:
        raise InputError(f"must be 0 (off) to 500, got {args.telemetry_hz}", key="--telemetry-hz")
    profile = load_profile(args.robot or DEFAULT_PROFILE)
    course = load_course(args.course or DEFAULT_COURSE)
    params = profile.action_defaults(args.action, parse_assignments(args.params))
    checked_action_params(args.action, params, tuple(profile.sensors))
    if args.telemetry_csv:
        check_writable(args.telemetry_csv)
    sim = Simulation(course, profile, seed=args.seed)
    session = Session(SimLink(sim), watchdog_ms=profile.watchdog_ms, session_id=f"sim-{args.seed}")
    session.hello(geometry=profile.geometry(), expect_robot_id=profile.id)
    before = truth_snapshot(sim)
    record = session.run(args.action, params, telemetry_hz=args.telemetry_hz)
    truth = truth_report(before, truth_snapshot(sim))
    summary = record.telemetry.summary()
    if args.telemetry_csv:
        write_text(args.telemetry_csv, record.telemetry.to_dataframe().to_csv(index=False))
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
    return 0 if record.status == "done" else 1


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


def cmd_run(args: argparse.Namespace) -> int:
    suite = load_suite(args.suite)
    # Refuse unwritable outputs now, not after the robot has run the whole suite.
    for path in (args.json, args.junit):
        if path:
            check_writable(path)
    console = Console(stderr=False, highlight=False)
    with Store(args.db) as store:
        resume = store.resolve_session(args.resume) if args.resume else None
        seed = args.seed
        if resume is not None:
            seed = check_resumable(store.session(resume), suite, args.seed)
        faults = parse_faults(args.link_faults) if args.link_faults else None
        runner = Runner(suite, store, link=args.link, faults=faults, repeat=args.repeat, seed=seed,
                        confirm=not args.yes)
        with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                      TextColumn("{task.fields[counts]}"), TimeRemainingColumn(),
                      console=Console(stderr=True), transient=True) as progress:
            task = progress.add_task("starting", total=None, counts="")

            def show(case: str, rep: int, index: int, total: int, fails: int) -> None:
                progress.update(task, description=f"{case} run {rep}", completed=index, total=total,
                                counts=f"{index - fails} pass {fails} fail")

            runner.on_progress = show
            try:
                report = runner.run(resume=resume)
            except OperatorStopped:
                print("trackproof: not started; nothing moved", file=sys.stderr)
                return 130
    # Files first: a reader that leaves early (| head) must not cost them.
    if args.json:
        write_summary_json(report, args.json)
    if args.junit:
        write_junit(report, args.junit)
    print_report(report, console)
    again = "".join(f" {flag} {value}" for flag, value in (
        ("--repeat", args.repeat), ("--link-faults", args.link_faults)) if value is not None)
    resume_hint = (f"  trackproof run {args.suite} --db {args.db} --link {args.link}{again} "
                   f"--resume {report.uid}")
    if report.status == "aborted":
        print(f"trackproof: {report.note or 'interrupted'}; finished runs are kept in {args.db}. Resume with:\n"
              f"{resume_hint}", file=sys.stderr)
        return 130
    if report.status == "link_lost":
        print(f"trackproof: error: {report.note}\nFinished runs are kept in {args.db}. Resume with:\n"
              f"{resume_hint}", file=sys.stderr)
        return 3
    return 0 if report.passed else 1


def check_resumable(info: dict[str, Any], suite: Suite, seed: int | None) -> int | None:
    """A session is resumed only with the suite it ran, unchanged; the seed is the session's
    unless another is given. Returns the seed to run with."""
    if info["suite_sha256"] != suite.sha256:
        what = (f"suite {info['suite_name']!r} ({info['suite_path']})" if info["suite_path"]
                else f"`trackproof {info['suite_name']}`")
        raise InputError(f"session {info['uid']} recorded {what}, not this suite as it is now; resume it "
                         "with the same, unchanged suite file", file=str(suite.path), key="--resume")
    if seed is not None and info["seed"] is not None and seed != info["seed"]:
        raise InputError(f"session {info['uid']} ran with seed {info['seed']}; resume it with that seed (or "
                         "leave --seed out)", key="--seed")
    return seed if seed is not None else info["seed"]


def cmd_demo(args: argparse.Namespace) -> int:
    print("trackproof demo: the invented robot kestrel-7 runs the bundled pre-match suite on the "
          "simulated harbour run mat,\n20 runs per case, and every run is stored in "
          f"{args.db}. No hardware needed.\n{SAFETY_NOTE}\n")
    args.suite, args.link, args.repeat, args.seed, args.resume = DEMO_SUITE, "sim", None, None, None
    args.link_faults, args.yes = None, True
    return cmd_run(args)


def cmd_sessions(args: argparse.Namespace) -> int:
    if not args.db.exists():
        print(f"no sessions yet: {args.db} does not exist")
        return 0
    with Store(args.db, readonly=True) as store:
        frame = store.sessions()
    if frame.empty:
        print(f"no sessions in {args.db}")
        return 0
    for row in frame.itertuples(index=False):
        counts = ", ".join(f"{getattr(row, 'n_' + s)} {s}" for s in ("pass", "fail", "aborted", "link_lost")
                           if getattr(row, "n_" + s))
        print(f"{row.uid}  {row.started_at:%Y-%m-%d %H:%M}  {row.status:9} {row.suite_name}  "
              f"(robot {row.robot_id}, link {row.link}; {row.n_runs} runs: {counts or 'none'})")
    return 0


def cmd_show(args: argparse.Namespace) -> int:
    with Store(args.db, readonly=True) as store:
        uid = store.resolve_session(args.session)
        info = store.session(uid)
        runs = store.runs(uid)
        measurements = store.measurements(uid)
    console = Console(highlight=False)
    what = f"suite {info['suite_name']} ({info['suite_path']})" if info["suite_path"] else info["suite_name"]
    console.print(f"session {uid}: {what}, robot {info['robot_id']}, "
                  f"link {info['link']}, seed {info['seed']}, {info['status']}, started {info['started_at']}")
    # A resumed session may hold an aborted try of a repetition and its redo: the last one counts.
    latest = {(o.case, o.repetition): o for o in stored_outcomes(runs, measurements)}
    for case, judge_by, expect in stored_cases(info["suite_text"], list(runs["case_name"]), info["link"]):
        outcomes = [o for (name, _), o in sorted(latest.items()) if name == case]
        stats, checks, case_verdict = judge_case(outcomes, judge_by, expect, len(outcomes))
        counts = Counter(o.status for o in outcomes)
        console.print(f"\n{case}: {case_verdict.upper()} ({len(outcomes)} runs: "
                      + ", ".join(f"{n} {status}" for status, n in counts.items()) + ")")
        for source, block in stats.items():
            for name, s in block.items():
                if "mean" in s:
                    console.print(f"  {source:5} {name:20} n={s['n']:3} mean={s['mean']:9.3f} sd={_num(s['sd'])} "
                                  f"range={_num(s['range'])} rp={_num(s.get('rp'))}")
                else:
                    console.print(f"  {source:5} {name:20} n={s['n']:3} rp={_num(s['rp'])}")
        for check in checks:
            console.print(f"  {'ok  ' if check.passed else 'FAIL'} {check.text}")
        for line in why_runs_failed(outcomes):
            console.print(f"  {line}", markup=False)
    return 0


def cmd_links(args: argparse.Namespace) -> int:
    from harness.links.serial_port import pick_port, serial_ports

    ports = serial_ports()
    if not ports:
        print("no USB serial ports found (is the hub plugged in, with a data cable?)")
    for port in ports:
        mark = "likely hub" if port.likely_hub else ""
        print(f"{port.device:24} {port.usb_id:9} {port.serial_number or '-':20} {port.description}  {mark}")
    if ports:
        chosen = pick_port(ports)
        print(f"would pick: --link serial:{chosen.device}" if chosen else
              "would pick: none (not exactly one likely hub); name the port with --link serial:PORT")
    if args.ble:
        from harness.links.ble import scan_hubs

        hubs = scan_hubs(args.timeout)
        if not hubs:
            print(f"no Bluetooth LE hub advertising the trackproof service within {args.timeout:g} s")
        for hub in hubs:
            print(f"{hub.address:20} {hub.rssi if hub.rssi is not None else '-':>5} dBm  {hub.name or '-'}")
        if hubs:
            best = hubs[0]
            print(f"would pick: --link ble:{best.name or best.address}" if len(hubs) == 1 else
                  "would pick: none (more than one hub in range); name one with --link ble:NAME_OR_ADDRESS")
    return 0


def cmd_hub_install(args: argparse.Namespace) -> int:
    from harness.hub_install import install_hub

    install_hub(args.port, main_example=args.main_example, replace_main=args.replace_main)
    return 0


def _num(value: Any) -> str:
    return "-" if value is None else f"{value:.3f}"


def _version() -> str:
    try:
        return version("trackproof")
    except PackageNotFoundError:  # run from a source tree that was never installed
        return "(not installed)"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="trackproof",
        description="Repeatability harness for line-following robots.",
        epilog=SAFETY_NOTE,
    )
    parser.add_argument("--version", action="version", version=f"trackproof {_version()}")
    sub = parser.add_subparsers(dest="command", required=True)
    sim = sub.add_parser("sim", help="run one action on the simulated robot",
                         description="Run one action on the simulated robot and print its result, "
                                     "the truth, and a telemetry summary.")
    sim.add_argument("action", metavar="ACTION",
                     help=f"one of: {', '.join(sorted(BUILTINS))}; or serve: run the simulated robot "
                          "behind a new pseudo-terminal until stopped, for any suite to use over "
                          "--link serial:PORT")
    sim.add_argument("params", metavar="key=value", nargs="*", help="action parameters")
    sim.add_argument("--course", type=Path, help=f"course file (default {DEFAULT_COURSE.name})")
    sim.add_argument("--robot", type=Path, help=f"robot profile (default {DEFAULT_PROFILE.name})")
    sim.add_argument("--seed", type=int, default=0, help="random seed (same seed, same run)")
    sim.add_argument("--telemetry-hz", type=int, help="telemetry rate, 0..500 (default 100)")
    sim.add_argument("--telemetry-csv", type=Path, metavar="PATH", help="write the telemetry as CSV")
    sim.add_argument("--json", action="store_true", help="print one JSON object")
    sim.add_argument("--baud", type=int, help="serve: pace the hub's output like a UART at this baud rate")
    sim.add_argument("--secret", help="serve: the hub refuses hosts that cannot prove this shared secret")
    sim.set_defaults(func=cmd_sim)

    def add_outputs(p: argparse.ArgumentParser) -> None:
        p.add_argument("--db", type=Path, default=Path(DEFAULT_DB), help=f"results database (default {DEFAULT_DB})")
        p.add_argument("--json", type=Path, metavar="PATH", help="write the JSON summary here")
        p.add_argument("--junit", type=Path, metavar="PATH", help="write JUnit XML here")

    run = sub.add_parser("run", help="run a suite and give verdicts",
                         description="Run every case of a suite, store every run, print verdicts. "
                                     "Exit codes: 0 all cases pass, 1 a case failed, 2 bad input, "
                                     "3 link failure.")
    run.add_argument("suite", type=Path, metavar="SUITE")
    run.add_argument("--link", default="sim", help="sim, sim:COURSE, serial:PORT[@BAUD], serial:auto, ble:NAME_OR_ADDRESS or ble:auto")
    run.add_argument("--link-faults", metavar="SPEC",
                     help="damage the link on purpose, e.g. corrupt=0.05,drop=0.02 (see docs/links.md)")
    run.add_argument("--yes", action="store_true",
                     help="start on real hardware without asking (unattended runs; the robot still moves)")
    run.add_argument("--repeat", type=whole_number(1), help="runs per case (overrides the suite)")
    run.add_argument("--seed", type=int, help="simulator seed (overrides the suite)")
    run.add_argument("--resume", metavar="SESSION", help="continue an interrupted session")
    add_outputs(run)
    run.set_defaults(func=cmd_run)
    demo = sub.add_parser("demo", help="run the bundled demo suite on the simulated robot")
    add_outputs(demo)
    demo.set_defaults(func=cmd_demo)
    sessions = sub.add_parser("sessions", help="list stored sessions, newest first")
    sessions.add_argument("--db", type=Path, default=Path(DEFAULT_DB))
    sessions.set_defaults(func=cmd_sessions)
    show = sub.add_parser("show", help="one session: cases, runs, statistics, verdicts")
    show.add_argument("session", metavar="SESSION", help="session id, a unique prefix, or latest")
    show.add_argument("--db", type=Path, default=Path(DEFAULT_DB))
    show.set_defaults(func=cmd_show)
    add_calibrate_parser(sub)
    add_tune_parser(sub)
    add_compare_parser(sub)
    links = sub.add_parser("links", help="list USB serial ports (and Bluetooth LE hubs) a hub may be on")
    links.add_argument("--ble", action="store_true", help="also scan for Bluetooth LE hubs")
    links.add_argument("--timeout", type=float, default=5.0, help="Bluetooth LE scan time in seconds (default 5)")
    links.set_defaults(func=cmd_links)
    hub = sub.add_parser("hub", help="work on the hub itself")
    hub_sub = hub.add_subparsers(dest="hub_command", required=True)
    install = hub_sub.add_parser("install", help="copy hub_side to a MicroPython board over USB")
    install.add_argument("port", metavar="PORT", help="the board's serial port, e.g. /dev/ttyACM0 or COM3")
    install.add_argument("--main-example", action="store_true",
                         help="also write the example as /main.py (an existing one only with --replace-main)")
    install.add_argument("--replace-main", action="store_true", help="let --main-example replace /main.py")
    install.set_defaults(func=cmd_hub_install)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        code = args.func(args)
        sys.stdout.flush()  # a closed pipe shows here, inside the handlers, not at exit
        return code
    except TrackproofError as exc:
        print(f"trackproof: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("trackproof: interrupted; the robot was told to stop", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader went away (`| head`); what was stored or written stays. Point stdout at
        # nothing so the interpreter's last flush does not fail again (Python's signal docs).
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1


if __name__ == "__main__":
    sys.exit(main())
