"""Runs a suite: cases x repeats on one robot, each run stored the moment it ends.

Between runs the robot is reset as the case says: `sim` re-places the simulated robot (with its
placement error), `operator` asks the person at the mat, `routine:NAME` has the robot drive itself
back. Ctrl-C stops the robot first (the session does that), marks the run `aborted`, keeps every
finished run, and the session can be resumed with --resume.

When the link is lost, the run is stored as `link_lost` (with whatever the hub reported), the
runner opens a new link and carries on with the next run; after `reconnects` failed tries it
stops with status `link_lost`. A run whose telemetry stays incomplete after asking the hub to
send it again is `link_lost` too, so no stored run silently misses data. Before the first run
on real hardware, the runner says what the robot is about to do and waits for a yes.
"""

from __future__ import annotations

import re
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from importlib.metadata import version
from typing import Any

import pandas as pd

from harness.analysis import Check, evaluate, iso9283_rp, orientation_rp, summarize, verdict
from harness.errors import HubRefused, InputError, LinkError, ProtocolError
from harness.links import Faults, Link, LinkSpec
from harness.operator import Ask, OperatorStopped, ask_operator, confirm_real
from harness.profile import RobotProfile
from harness.robot import RobotConnector, open_real_link
from harness.measure import Measurement, measure_run, metrics_by_name
from harness.session import RunRecord, Session
from harness.sim import truth_report, truth_snapshot
from harness.store import Store, record_while_failing
from harness.suites import Case, Suite


def redact_secret(profile_text: str) -> str:
    """The profile as stored with each session: a shared secret does not belong in a database."""
    return re.sub(r'(?m)^(\s*secret\s*=\s*)(".*?"|\'.*?\')', r'\1"(not stored)"', profile_text)


@dataclass
class RunOutcome:
    case: str
    repetition: int
    status: str
    measurements: list[Measurement]
    note: str = ""


@dataclass
class CaseReport:
    case: Case
    expected_runs: int
    runs: list[RunOutcome] = field(default_factory=list)
    stats: dict[str, dict[str, Any]] = field(default_factory=dict)
    checks: list[Check] = field(default_factory=list)
    verdict: str = "fail"


@dataclass
class SessionReport:
    uid: str
    suite: Suite
    link: str
    seed: int
    cases: list[CaseReport]
    status: str  # finished, aborted (Ctrl-C or the operator) or link_lost (reconnects failed)
    note: str = ""
    link_seconds: float = 0.0  # on the link's clock: virtual time on the simulated link
    wall_seconds: float = 0.0

    @property
    def passed(self) -> bool:
        return all(c.verdict == "pass" for c in self.cases)


def case_statistics(runs: list[RunOutcome], judge_by: str) -> tuple[dict[str, dict[str, Any]], dict[str, Any]]:
    """Per source and metric: summary statistics, plus ISO 9283-style RP for stop positions."""
    finished = [r.measurements for r in runs if r.status in ("pass", "fail")]
    stats: dict[str, dict[str, Any]] = {}
    judged: dict[str, Any] = {}
    for source in ("robot", "truth"):
        metrics = metrics_by_name(finished, source)
        if source == judge_by:
            judged = metrics
        block: dict[str, Any] = {}
        for name, values in metrics.items():
            if name == "stop_xy_mm":
                block["stop_spread_2d_mm"] = {"rp": _finite(iso9283_rp(values)), "n": int(len(values))}
                continue
            entry = summarize(values).as_dict()
            if len(values) >= 2 and name.endswith("_mm"):
                entry["rp"] = _finite(iso9283_rp(values))
            elif len(values) >= 2 and name.endswith("_deg"):
                entry["rp"] = _finite(orientation_rp(values))  # ISO 9283 orientation: 3 x sd
            block[name] = entry
        if block:
            stats[source] = block
    return stats, judged


def judge_case(runs: list[RunOutcome], judge_by: str, expect: dict[str, Any],
               expected_runs: int) -> tuple[dict[str, dict[str, Any]], list[Check], str]:
    """Statistics, checks and verdict of a case: it passes when every expected run finished and
    passed and every expectation holds."""
    stats, judged = case_statistics(runs, judge_by)
    checks = evaluate(expect, judged)
    complete = len(runs) == expected_runs
    every_run_passed = bool(runs) and all(r.status == "pass" for r in runs)
    return stats, checks, "pass" if complete and every_run_passed and verdict(checks) == "pass" else "fail"


def stored_outcomes(runs: pd.DataFrame, measurements: pd.DataFrame) -> list[RunOutcome]:
    """The runs of a stored session with their measurements, in the order they were recorded."""
    by_run = {run_id: rows for run_id, rows in measurements.groupby("run_id")}
    outcomes = []
    for row in runs.itertuples():
        rows = by_run.get(row.run_id)
        found = [] if rows is None else [Measurement(m.name, float(m.value), m.unit, m.source)
                                         for m in rows.itertuples()]
        outcomes.append(RunOutcome(row.case_name, int(row.repetition), row.status, found, row.note))
    return outcomes


def _finite(x: float) -> float | None:
    return None if x != x else round(float(x), 6)


class Runner:
    def __init__(self, suite: Suite, store: Store, *, link: str = "sim", faults: Faults | None = None,
                 repeat: int | None = None, seed: int | None = None, ask: Ask = ask_operator,
                 confirm: bool = True,
                 on_progress: Callable[[str, int, int, int, int], None] | None = None,
                 open_link: Callable[[LinkSpec, RobotProfile], Link] = open_real_link) -> None:
        self.suite = suite
        self.store = store
        self.link_name = link
        self.stored_link_name = f"{link} with faults {faults}" if faults else link
        self.repeat = repeat
        self.seed = seed if seed is not None else (suite.seed if suite.seed is not None else 0)
        self.ask = ask
        self.confirm = confirm
        self.on_progress = on_progress
        self.robot = RobotConnector(suite.profile, link, course=suite.course_path, seed=self.seed,
                                    faults=faults, source=str(suite.path), open_link=open_link)
        self.sim = self.robot.sim
        if self.sim is None:
            for case in suite.cases:
                if case.judge_by == "truth":
                    raise InputError(f"case {case.name!r} is judged by truth, which only the simulated link "
                                     "knows; use judge_by = \"robot\" or --link sim", file=str(suite.path),
                                     key="judge_by")
        self.session: Session | None = None

    # ------------------------------------------------------------ connecting

    def _check_hub(self, session: Session) -> None:
        """What the suite needs from this hub: its resets, and a yes from the operator on real hardware."""
        hub = session.hub
        assert hub is not None
        for case in self.suite.cases:
            if case.reset == "sim" and self.sim is None and "sim_reset" not in hub.routines:
                raise InputError(f"case {case.name!r} resets with 'sim', but {hub.robot_id} is not a simulated "
                                 "hub; use reset = \"operator\" or \"routine:NAME\"",
                                 file=str(self.suite.path), key="reset")
            if case.reset.startswith("routine:") and case.reset[8:] not in hub.routines:
                raise InputError(f"case {case.name!r} resets with routine {case.reset[8:]!r}, which hub "
                                 f"{hub.robot_id} does not have (it has: {', '.join(hub.routines) or 'none'})",
                                 file=str(self.suite.path), key="reset")
        if self.confirm:
            confirm_real(session, self.plan(hub.robot_id), self.ask)

    def plan(self, robot_id: str) -> str:
        """What the robot is about to do, in words, for the operator's confirmation."""
        lines = [f"About to run suite {self.suite.name!r} on robot {robot_id} over {self.link_name}:"]
        for case in self.suite.cases:
            steps = "; then ".join(f"{s.name} " + " ".join(f"{k}={v}" for k, v in s.params.items())
                                   for s in case.steps)
            lines.append(f"  {case.name}: {self.repeats(case)} x {steps} (reset: {case.reset})")
        return "\n".join(lines)

    def repeats(self, case: Case) -> int:
        return self.repeat if self.repeat is not None else case.repeat

    def run(self, resume: str | None = None) -> SessionReport:
        suite = self.suite
        self.session = self.robot.connect()
        try:
            self._check_hub(self.session)
        except BaseException:
            self.session.close()
            raise
        done: dict[tuple[str, int], RunOutcome] = {}
        if resume is not None:
            uid = resume
            done = self._finished_runs(uid)
            self.store.reopen_session(uid)
        else:
            uid = self.store.begin_session(
                suite_name=suite.name, suite_path=str(suite.path), suite_text=suite.text,
                profile_text=redact_secret(suite.profile_text), robot_id=suite.profile.id, link=self.stored_link_name,
                seed=self.seed, tool_version=version("trackproof"))
        reports = [CaseReport(case, self.repeats(case)) for case in suite.cases]
        total = sum(self.repeats(c) for c in suite.cases)
        counts = {"pass": 0, "fail": 0}
        started_wall, started_link = time.perf_counter(), self.session.link.now()
        status, note = "finished", ""
        try:
            index = 0
            for report in reports:
                case = report.case
                for rep in range(1, self.repeats(case) + 1):
                    index += 1
                    outcome = done.get((case.name, rep))
                    if outcome is None:
                        try:
                            outcome = self._one_run(uid, case, rep)
                        except LinkError as lost:
                            outcome = RunOutcome(case.name, rep, "link_lost", [], str(lost))
                            report.runs.append(outcome)
                            lost_session, self.session = self.session, None
                            self.session = self.robot.reconnect(lost_session, lost)
                            continue
                        except (KeyboardInterrupt, OperatorStopped) as stop:
                            # Stored as aborted by _one_run; the report shows it the same way.
                            report.runs.append(RunOutcome(case.name, rep, "aborted", [],
                                                          f"{type(stop).__name__}: {stop}".rstrip(": ")))
                            raise
                    report.runs.append(outcome)
                    if outcome.status in counts:
                        counts[outcome.status] += 1
                    if self.on_progress:
                        self.on_progress(case.name, rep, index, total, counts["fail"])
        except KeyboardInterrupt:
            status = "aborted"
        except OperatorStopped as stop:
            status, note = "aborted", str(stop)
        except (LinkError, ProtocolError) as exc:
            status, note = "link_lost", str(exc)
        link_seconds = self.session.link.now() - started_link if self.session is not None else 0.0
        if self.session is not None:
            self.session.close()
        for report in reports:
            report.stats, report.checks, report.verdict = judge_case(
                report.runs, report.case.judge_by, report.case.expect, report.expected_runs)
        self.store.end_session(uid, "finished" if status == "finished" else "aborted")
        return SessionReport(uid, suite, self.link_name, self.seed, reports, status, note,
                             link_seconds, time.perf_counter() - started_wall)

    def _finished_runs(self, uid: str) -> dict[tuple[str, int], RunOutcome]:
        outcomes = stored_outcomes(self.store.runs(uid), self.store.measurements(uid))
        return {(o.case, o.repetition): o for o in outcomes if o.status in ("pass", "fail")}

    def _reset(self, case: Case, rep: int) -> None:
        if case.reset == "sim" and self.sim is not None:
            self.sim.reset()
        elif case.reset == "sim":
            self._reset_routine("sim_reset")
        elif case.reset == "operator":
            answer = self.ask(f"[{case.name} run {rep}] put the robot at the start; Enter to go, s to skip, q to quit: ")
            if answer.strip().lower() == "q":
                raise OperatorStopped("stopped at a reset prompt")
            if answer.strip().lower() == "s":
                raise _Skip()
        else:
            self._reset_routine(case.reset.split(":", 1)[1])

    def _reset_routine(self, name: str) -> None:
        assert self.session is not None
        record = self.session.run(name, {})
        if record.status != "done":
            raise _Skip(f"reset routine ended {record.status}")

    def _one_run(self, uid: str, case: Case, rep: int) -> RunOutcome:
        run_id = self.store.begin_run(uid, case.name, rep, {"steps": [s.params for s in case.steps]})
        records: list[RunRecord] = []
        truths: list[dict[str, Any] | None] = []
        try:
            try:
                self._reset(case, rep)
            except _Skip as skip:
                self.store.finish_run(run_id, "aborted", {}, [], [], None, note=f"skipped at reset {skip}".strip())
                return RunOutcome(case.name, rep, "aborted", [], "skipped")
            status, note = "pass", ""
            session = self.session
            assert session is not None
            for step in case.steps:
                before = truth_snapshot(self.sim) if self.sim is not None else None
                try:
                    record = session.run(step.name, step.params, telemetry_hz=self.suite.telemetry_hz)
                except HubRefused as exc:
                    status, note = "fail", str(exc)
                    break
                records.append(record)
                truths.append(truth_report(before, truth_snapshot(self.sim)) if before is not None else None)
                if record.status != "done":
                    status, note = "fail", f"{step.name} ended {record.status}"
                    break
            missing = sum(r.telemetry.dropped for r in records)
            if missing:
                status, note = "link_lost", f"telemetry incomplete: {missing} samples lost on the link"
        except BaseException as exc:
            status = "link_lost" if isinstance(exc, (LinkError, ProtocolError)) else "aborted"
            note = f"{type(exc).__name__}: {exc}"
            record_while_failing(lambda: self.store.finish_run(run_id, status, {}, [], [], None, note=note))
            raise
        measurements = measure_run(case.steps[: len(records)], records, truths, self.suite.line_width_mm)
        result = {"steps": [r.result for r in records]}
        events = [e for r in records for e in r.events]
        telemetry = records[0].telemetry if records else None
        self.store.finish_run(run_id, status, result, events, [m.as_tuple() for m in measurements], telemetry,
                              note=note)
        return RunOutcome(case.name, rep, status, measurements, note)


class _Skip(Exception):
    pass
