"""The moves of calibration and tuning commands are kept in the results store like suite runs."""

from __future__ import annotations

import dataclasses
import json
import tomllib
from pathlib import Path
from typing import Any

import pytest

from harness import cli
from harness.errors import HubRefused, LinkError, ProtocolError
from harness.movelog import MoveLog
from harness.profile import load_profile
from harness.robot import RobotConnector
from harness.session import RunRecord, Session
from harness.sim import DEFAULT_COURSE, DEFAULT_PROFILE
from harness.store import Store, StoreError
from harness.suites import stored_cases

SPIN = {"angle_deg": 90.0, "mode": "spin", "using": "encoders", "speed_pct": 40.0}


class BreaksAfter:
    """A session whose link fails (or whose operator presses Ctrl-C) on the n-th move."""

    def __init__(self, session: Session, n: int, error: BaseException) -> None:
        self.session, self.n, self.error, self.moves = session, n, error, 0

    def run(self, action: str, params: dict[str, Any], **options: Any) -> RunRecord:
        self.moves += 1
        if self.moves == self.n:
            raise self.error
        return self.session.run(action, params, **options)


def connector() -> RobotConnector:
    return RobotConnector(load_profile(DEFAULT_PROFILE), "sim", course=DEFAULT_COURSE, seed=3)


@pytest.mark.parametrize(("error", "status"), [(LinkError("no answer from the hub within 2 s"), "link_lost"),
                                               (ProtocolError("hub sent garbage"), "link_lost"),
                                               (HubRefused("bad_param", "angle_deg: too large"), "fail"),
                                               (KeyboardInterrupt(), "aborted")])
def test_moves_made_before_a_failure_are_kept(tmp_path: Path, error: BaseException, status: str) -> None:
    robot = connector()
    session = robot.connect()
    flaky = BreaksAfter(session, 3, error)
    with Store(tmp_path / "r.sqlite") as store:
        with pytest.raises(type(error)):
            with MoveLog(store, robot, "calibrate turns", {"angles": [90.0]}) as log:
                for _ in range(5):
                    log.run(flaky, "spin +90 deg", "turn", SPIN, telemetry_hz=0)  # type: ignore[arg-type]
        sessions = store.sessions()
        assert len(sessions) == 1 and sessions.iloc[0]["status"] == "aborted"
        uid = sessions.iloc[0]["uid"]
        runs = store.runs(uid)
        measurements = store.measurements(uid)
    assert list(runs["status"]) == ["pass", "pass", status]
    assert list(runs["repetition"]) == [1, 2, 3]
    assert type(error).__name__ in runs.iloc[2]["note"]
    # The finished turns carry their measurements, by the gyro and (simulator) by truth.
    turned = measurements[measurements["name"] == "turn_deg"]
    assert set(turned["source"]) == {"robot", "truth"} and len(turned) == 4
    assert turned["value"].between(85.0, 95.0).all()


def test_a_store_failing_during_a_failure_does_not_hide_it(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                           capsys: pytest.CaptureFixture[str]) -> None:
    robot = connector()
    flaky = BreaksAfter(robot.connect(), 2, LinkError("no answer from the hub within 2 s"))
    with Store(tmp_path / "r.sqlite") as store:
        finish = store.finish_run

        def broken_disk(run_id: int, status: str, *args: Any, **kwargs: Any) -> None:
            if status == "link_lost":
                raise StoreError("could not record the run: disk I/O error")
            finish(run_id, status, *args, **kwargs)

        monkeypatch.setattr(store, "finish_run", broken_disk)
        with pytest.raises(LinkError, match="no answer"):  # the lost link, not the store's error
            with MoveLog(store, robot, "calibrate turns", {}) as log:
                for _ in range(3):
                    log.run(flaky, "spin +90 deg", "turn", SPIN, telemetry_hz=0)  # type: ignore[arg-type]
        assert store.sessions().iloc[0]["status"] == "aborted"
    assert "also failed to record this in the results store: could not record the run" in capsys.readouterr().err


def test_incomplete_telemetry_is_a_lost_link_and_notes_are_kept(tmp_path: Path) -> None:
    robot = connector()
    session = robot.connect()
    params = robot.profile.action_defaults("follow_line", {"time_s": 0.5})

    class LosesSamples:
        def run(self, action: str, params: dict[str, Any], **options: Any) -> RunRecord:
            record = session.run(action, params, **options)
            return dataclasses.replace(record, telemetry=dataclasses.replace(record.telemetry, dropped=7))

    with Store(tmp_path / "r.sqlite") as store:
        with MoveLog(store, robot, "tune", {}) as log:
            log.run(LosesSamples(), "kp 0.6000 kd 0.00000", "follow_line", params,  # type: ignore[arg-type]
                    explain=lambda record: "stopped by the guard: amplitude", telemetry_hz=100)
            log.run(session, "kp 0.6000 kd 0.00000", "follow_line", params, telemetry_hz=100)
        runs = store.runs(store.sessions().iloc[0]["uid"])
    assert list(runs["status"]) == ["link_lost", "pass"]
    assert runs.iloc[0]["note"] == ("telemetry incomplete: 7 samples lost on the link; "
                                    "stopped by the guard: amplitude")


def test_telemetry_and_the_command_are_stored(tmp_path: Path) -> None:
    robot = connector()
    session = robot.connect()
    params = robot.profile.action_defaults("follow_line", {"time_s": 1.0})
    with Store(tmp_path / "r.sqlite") as store:
        with MoveLog(store, robot, "tune", {"speed_pct": 40.0, "limit": None}) as log:
            record = log.run(session, "kp 0.6000 kd 0.00000", "follow_line", params, telemetry_hz=100)
        uid = store.sessions().iloc[0]["uid"]
        info = store.session(uid)
        run = store.runs(uid).iloc[0]
        telemetry = store.load_telemetry(int(run["run_id"]))
    assert info["status"] == "finished" and info["suite_name"] == "tune" and info["link"] == "sim"
    # The stored text names the command and its options (None left out); it is not a suite.
    assert tomllib.loads(info["suite_text"]) == {"command": "tune", "options": {"speed_pct": 40.0}}
    assert stored_cases(info["suite_text"]) == []
    assert 'id = "kestrel-7"' in info["profile_text"]
    assert telemetry is not None and len(telemetry) == len(record.telemetry) == record.result["samples"]
    assert run["params"] == {"steps": [params]} and run["result"] == {"steps": [record.result]}


def test_without_a_store_nothing_is_kept_and_nothing_is_begun(tmp_path: Path) -> None:
    robot = connector()
    session = robot.connect()
    assert MoveLog().run(session, "x", "turn", SPIN, telemetry_hz=0).status == "done"
    with Store(tmp_path / "r.sqlite") as store:
        with MoveLog(store, robot, "calibrate turns", {}):
            pass  # refused before the robot moved: no empty session left behind
        assert store.sessions().empty
    with pytest.raises(ValueError, match="connector"):
        MoveLog(Store(tmp_path / "other.sqlite"), None, "tune", {})


def test_stored_cases_of_a_session_without_a_suite_come_from_its_runs() -> None:
    text = 'command = "calibrate turns"\n[options]\nrepeat = 2\n'
    assert stored_cases(text, ["spin +45 deg", "spin -45 deg", "spin +45 deg"]) == [
        ("spin +45 deg", "robot", {}), ("spin -45 deg", "robot", {})]
    suite = '[[cases]]\nname = "a"\naction = "stop"\n'
    assert stored_cases(suite, ["b"]) == [("a", "robot", {})]  # a suite's own cases win


def test_a_calibration_is_listed_shown_and_compared(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    db = str(tmp_path / "r.sqlite")
    for seed in ("1", "2"):
        report = tmp_path / f"turns-{seed}.json"
        args = ["calibrate", "turns", "--db", db, "--repeat", "1", "--modes", "spin", "--seed", seed,
                "--json", str(report)]
        assert cli.main(args) == 0
        uid = json.loads(report.read_text())["stored_session"]
        assert f"6 moves kept in {db} as session {uid}" in capsys.readouterr().out
    assert cli.main(["sessions", "--db", db]) == 0
    listed = capsys.readouterr().out.splitlines()
    assert len(listed) == 2 and all("calibrate turns" in line and "6 runs: 6 pass" in line for line in listed)
    assert cli.main(["show", "latest", "--db", db]) == 0
    shown = capsys.readouterr().out
    assert "calibrate turns, robot kestrel-7" in shown
    for case in ("spin +45 deg", "spin -45 deg", "spin +90 deg", "spin -180 deg"):
        assert f"{case}: PASS (1 runs: 1 pass)" in shown
    assert "turn_deg" in shown
    # Two calibrations of the same robot: the turns before and after, case by case.
    assert cli.main(["compare", "--latest", "--db", db]) == 0
    compared = capsys.readouterr().out
    assert "spin +90 deg" in compared and "angle_error_deg" in compared


@pytest.mark.parametrize("command", [["calibrate", "turns"], ["calibrate", "distance"],
                                     ["calibrate", "odometry"], ["tune"]])
def test_a_busy_store_is_refused_before_the_robot_moves(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                        capsys: pytest.CaptureFixture[str], command: list[str]) -> None:
    db = tmp_path / "r.sqlite"
    moved: list[int] = []
    monkeypatch.setattr(RobotConnector, "connect", lambda self: moved.append(1))
    with Store(db):  # another process recording into the same file
        assert cli.main([*command, "--db", str(db)]) == 2
    assert not moved
    assert "another trackproof process" in capsys.readouterr().err


def test_every_command_keeps_its_own_moves(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    db = str(tmp_path / "r.sqlite")
    commands = [
        ["calibrate", "distance", "--repeat", "1", "--speeds", "40", "--distances", "150,200", "--measure", "probe",
         "--line-mm", "270.5", "--probe-sensor", "outer_left"],
        ["calibrate", "odometry", "--repeat", "1", "--verify"],
        ["tune", "--verify-runs", "1", "--bisections", "1"],
    ]
    for command in commands:
        assert cli.main([*command, "--db", db]) == 0, capsys.readouterr().err
    with Store(db, readonly=True) as store:
        sessions = store.sessions()
        cases = {row.suite_name: list(store.runs(row.uid)["case_name"]) for row in sessions.itertuples()}
        kinds = {row.suite_name: row.n_runs for row in sessions.itertuples()}
    assert cases["calibrate distance"] == ["follow_line 150 mm at 40 %", "probe_edge after 150 mm at 40 %",
                                           "follow_line 200 mm at 40 %", "probe_edge after 200 mm at 40 %"]
    # Odometry: a square is eight moves each way, then the same squares with the corrected values.
    odometry = cases["calibrate odometry"]
    assert len(odometry) == 32 and odometry[0] == "cw square, move 1: drive_straight"
    assert odometry[16] == "cw corrected square, move 1: drive_straight"
    assert all(name.startswith("kp ") and " kd " in name for name in cases["tune"])
    assert kinds["tune"] == len(cases["tune"]) >= 5
