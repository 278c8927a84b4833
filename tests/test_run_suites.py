"""`trackproof run` / `demo` / `sessions` / `show` end to end on the simulator, and suite validation."""

from __future__ import annotations

import dataclasses
import json
import xml.etree.ElementTree as ET

import pytest

from harness.cli import main
from harness.profile import load_profile
from harness.store import Store
from conftest import SUITES_DIR, write_suite



LOOSE_AND_TIGHT = '''
name = "loose and tight"
repeat = 5
seed = 9

[[cases]]
name = "loose turn"
action = "turn"
params = { angle_deg = 90, using = "gyro" }
expect = { angle_error_deg = { mean_abs_max = 5.0, sd_max = 2.0 } }

[[cases]]
name = "tight turn"
action = "turn"
params = { angle_deg = 90, using = "gyro" }
expect = { angle_error_deg = { sd_max = 0.001 } }
'''


def test_loose_expectation_passes_tight_one_fails(tmp_path, capsys):
    suite = write_suite(tmp_path, LOOSE_AND_TIGHT)
    db, summary, junit = tmp_path / "r.sqlite", tmp_path / "s.json", tmp_path / "j.xml"
    code = main(["run", str(suite), "--link", "sim", "--db", str(db), "--json", str(summary), "--junit", str(junit)])
    assert code == 1  # a case failed
    data = json.loads(summary.read_text())
    verdicts = {c["name"]: c["verdict"] for c in data["cases"]}
    assert verdicts == {"loose turn": "pass", "tight turn": "fail"}
    tight = next(c for c in data["cases"] if c["name"] == "tight turn")
    assert len(tight["runs"]) == 5 and all(r["status"] == "pass" for r in tight["runs"])
    assert tight["stats"]["robot"]["angle_error_deg"]["n"] == 5
    root = ET.parse(junit).getroot()
    cases = {tc.get("name"): tc for tc in root.iter("testcase")}
    assert cases["loose turn"].find("failure") is None
    failure = cases["tight turn"].find("failure")
    assert failure is not None and "angle_error_deg.sd_max 0.001: sd" in failure.text and "exceeds" in failure.text
    with Store(db) as store:
        runs = store.runs(data["session"])
    assert len(runs) == 10 and set(runs["status"]) == {"pass"}


def test_demo_runs_end_to_end_and_sessions_show_it(tmp_path, capsys):
    db = tmp_path / "demo.sqlite"
    assert main(["demo", "--db", str(db), "--json", str(tmp_path / "demo.json")]) == 0
    out = capsys.readouterr().out
    assert "4 of 4 cases passed" in out
    data = json.loads((tmp_path / "demo.json").read_text())
    assert [len(c["runs"]) for c in data["cases"]] == [20, 20, 20, 20]
    stop_case = data["cases"][0]
    # The robot's own stop measurement (probe) agrees with the truth to about a millimetre.
    robot, truth = stop_case["stats"]["robot"]["stop_mm"], stop_case["stats"]["truth"]["stop_mm"]
    assert robot["mean"] == pytest.approx(truth["mean"], abs=1.0)
    assert main(["sessions", "--db", str(db)]) == 0
    assert data["session"] in capsys.readouterr().out
    assert main(["show", "latest", "--db", str(db)]) == 0
    shown = capsys.readouterr().out
    assert "stop past the crossroads: PASS" in shown and "stop_mm.mean_within" in shown


BAD_SUITES = [
    ("", "cases: missing (required)"),
    ("[[cases]]\nname = 'x'\naction = 'jump'\n", "cases[0].action: expected one of"),
    ("[[cases]]\nname = 'x'\naction = 'turn'\n", "cases[0].params.angle_deg: required"),
    ("[[cases]]\nname = 'x'\naction = 'turn'\nparams = { angle_deg = 'a' }\n", "cases[0].params.angle_deg: expected a number"),
    ("[[cases]]\nname = 'x'\naction = 'turn'\nparams = { angle_deg = 90, spin = 1 }\n", "cases[0].params.spin: unknown parameter"),
    ("[[cases]]\nname = 'x'\naction = 'probe_edge'\nparams = { sensor = 'nose' }\n", "unknown sensor 'nose'"),
    ("repeat = 0\n[[cases]]\nname = 'x'\naction = 'stop'\n", "repeat: must be at least 1"),
    ("[[cases]]\nname = 'x'\nrepeat = -2\naction = 'stop'\n", "cases[0].repeat: must be at least 1"),
    ("[[cases]]\nname = 'x'\naction = 'stop'\nreset = 'magic'\n", "cases[0].reset: expected sim, operator or routine:NAME"),
    ("[[cases]]\nname = 'x'\naction = 'stop'\ncolour = 'red'\n", "cases[0].colour: unknown key"),
    ("[[cases]]\nname = 'x'\naction = 'stop'\nexpect = { angel_error_deg = { max = 3 } }\n",
     "cases[0].expect.angel_error_deg: no run measures 'angel_error_deg'"),
    ("[[cases]]\nname = 'x'\naction = 'stop'\nexpect = { stop_sprad_mm = { max = 3 } }\n",
     "no run measures 'stop_sprad_mm'"),
    ("[[cases]]\nname = 'x'\naction = 'stop'\n[[cases]]\nname = 'x'\naction = 'stop'\n", "case name 'x' is used twice"),
    ("[[cases]]\nname = 'x'\naction = 'stop'\nexpect = { stop_mm = { near = 3 } }\n", "near"),
    ("[[cases]]\nname = 'x'\naction = 'stop'\nexpect = { stop_mm = { mean_within = [9, 1] } }\n", "mean_within"),
    ("[[cases]]\nname = 'x'\naction = 'stop'\njudge_by = 'gut'\n", "cases[0].judge_by: expected one of robot, truth"),
    ("[[cases]]\nname = 'x'\nsteps = []\n", "cases[0].steps: expected at least one step"),
    ("[[cases]]\nname = 'x'\nsteps = [{ action = 'stop' }]\naction = 'stop'\n", "give either steps or action"),
    ("[[cases]]\nname = ''\naction = 'stop'\n", "cases[0].name: must not be empty"),
    ("line_width_mm = -3\n[[cases]]\nname = 'x'\naction = 'stop'\n", "line_width_mm: must be greater than 0"),
    ("telemetry_hz = 900\n[[cases]]\nname = 'x'\naction = 'stop'\n", "telemetry_hz: must be at most 500"),
    ("cases = 3\n", "cases: expected an array of tables"),
    ("[[cases]\n", "not valid TOML"),
]


@pytest.mark.parametrize("body, message", BAD_SUITES)
def test_bad_suite_is_one_clear_line(tmp_path, capsys, body, message):
    suite = write_suite(tmp_path, body)
    code = main(["run", str(suite), "--db", str(tmp_path / "r.sqlite")])
    err = capsys.readouterr().err
    assert code == 2
    assert str(suite) in err and message in err
    assert "Traceback" not in err


BAD_PROFILES = [
    ("wheel_diameter_mm = 56.0", "wheel_diameter_mm = -56.0", "wheel_diameter_mm: must be at least 1.0, got -56.0"),
    ('id = "kestrel-7"', 'id = ""', "id: must not be empty"),
    ('left = "outer_left"', 'left = "whisker"', "junctions.left: unknown sensor 'whisker'"),
    ("forward_mm = 70.0", 'forward_mm = "far"', "sensors.left.forward_mm: expected a number"),
    ("spin_scale = 1.0", "spin_scale = 7.0", "spin_scale: must be at most 2.0"),
    ("spin_scale = 1.0", "spin_scale = 1.0\nspin_offset_deg = 45.0", "spin_offset_deg: must be at most 30.0"),
    ("spin_scale = 1.0", "spin_scale = 1.0\npivot_offset_deg = 'a bit'", "pivot_offset_deg: expected a number"),
]


@pytest.mark.parametrize("good, bad, message", BAD_PROFILES)
def test_bad_profile_names_file_and_key(tmp_path, capsys, good, bad, message):
    suite = write_suite(tmp_path, "[[cases]]\nname = 'x'\naction = 'stop'\n")
    profile = tmp_path / "practice_robot.toml"
    text = profile.read_text()
    assert good in text
    profile.write_text(text.replace(good, bad, 1))
    assert main(["run", str(suite), "--db", str(tmp_path / "r.sqlite")]) == 2
    err = capsys.readouterr().err
    assert f"{profile}: {message}" in err


def test_a_failing_case_says_why_in_the_terminal(tmp_path, capsys):
    suite = write_suite(tmp_path, "repeat = 2\n[[cases]]\nname = 'x'\nroutine = 'nosuch'\n")
    assert main(["run", str(suite), "--db", str(tmp_path / "r.sqlite")]) == 1
    out = capsys.readouterr().out
    assert "x: FAIL  (0 pass, 2 fail;" in out
    assert "runs 1, 2: fail: hub refused (unknown_action): no action or routine 'nosuch'" in out
    assert main(["show", "latest", "--db", str(tmp_path / "r.sqlite")]) == 0
    assert "runs 1, 2: fail: hub refused (unknown_action)" in capsys.readouterr().out


@pytest.mark.parametrize("where, message", [("missing/out", "folder {tmp}/missing does not exist"),
                                             ("", "is a folder; give a file name")])
@pytest.mark.parametrize("option", ["--json", "--junit"])
def test_unwritable_reports_are_refused_before_the_robot_moves(tmp_path, capsys, where, message, option):
    suite = write_suite(tmp_path, "[[cases]]\nname = 'x'\naction = 'stop'\n")
    db = tmp_path / "r.sqlite"
    assert main(["run", str(suite), "--db", str(db), option, str(tmp_path / where)]) == 2
    err = capsys.readouterr().err
    assert message.format(tmp=tmp_path) in err and "Traceback" not in err
    assert not db.exists()  # refused before the store was even opened


def test_expectations_on_spreads_and_on_a_routine_s_own_metrics_load(tmp_path):
    from harness.suites import load_suite

    suite = write_suite(tmp_path, "[[cases]]\nname = 'a'\naction = 'turn'\nparams = { angle_deg = 90 }\n"
                                  "expect = { turn_spread_deg = { max = 3 }, stop_spread_2d_mm = { max = 9 } }\n"
                                  "[[cases]]\nname = 'b'\nroutine = 'square'\n"
                                  "expect = { corner_gap_mm = { max = 5 } }\n")
    assert [sorted(case.expect) for case in load_suite(suite).cases] == [
        ["stop_spread_2d_mm", "turn_spread_deg"], ["corner_gap_mm"]]


def test_an_unknown_key_lists_every_key_allowed_there(tmp_path, capsys):
    # Keys the file leaves out count too: `seed` is optional and must be suggested for `reeset`.
    suite = write_suite(tmp_path, "reeset = 3\n[[cases]]\nname = 'x'\naction = 'stop'\n")
    assert main(["run", str(suite), "--db", str(tmp_path / "r.sqlite")]) == 2
    err = capsys.readouterr().err
    assert "reeset: unknown key (known here: " in err
    for key in ("repeat", "reset", "seed", "telemetry_hz", "line_width_mm"):
        assert key in err.split("known here: ")[1]


def test_geometry_sends_newer_keys_only_when_set():
    # A hub from before wheel_ratio and the turn offsets refuses a hello that names them, so a
    # profile that leaves them at the hub's defaults does not send them.
    profile = load_profile(SUITES_DIR / "practice_robot.toml")
    assert set(profile.geometry()) == {"wheel_diameter_mm", "track_mm", "distance_scale", "spin_scale",
                                       "pivot_scale"}
    changed = dataclasses.replace(profile, wheel_ratio=1.02, spin_offset_deg=1.5, pivot_offset_deg=-0.5)
    assert {k: changed.geometry()[k] for k in ("wheel_ratio", "spin_offset_deg", "pivot_offset_deg")} == {
        "wheel_ratio": 1.02, "spin_offset_deg": 1.5, "pivot_offset_deg": -0.5}


def test_a_missing_serial_port_is_a_clear_link_error(tmp_path, capsys):
    suite = write_suite(tmp_path, "[[cases]]\nname = 'x'\naction = 'stop'\nreset = 'operator'\n")
    assert main(["run", str(suite), "--link", "serial:/dev/no-such-hub", "--db", str(tmp_path / "r.sqlite")]) == 3
    err = capsys.readouterr().err
    assert "cannot open serial port /dev/no-such-hub" in err and "trackproof links" in err
    assert "Traceback" not in err


def test_ctrl_c_keeps_finished_runs_and_the_session_resumes(tmp_path, capsys, monkeypatch):
    from harness.session import Session

    suite = write_suite(tmp_path, "repeat = 4\n[[cases]]\nname = 'turn'\naction = 'turn'\nparams = { angle_deg = 45 }\n"
                                  "[[cases]]\nname = 'later'\naction = 'stop'\n"
                                  "expect = { duration_s = { max = 5 } }\n")
    db = tmp_path / "r.sqlite"
    real_run = Session.run
    calls = {"n": 0}

    def interrupted(self, *args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 3:
            raise KeyboardInterrupt  # Ctrl-C during the third run
        return real_run(self, *args, **kwargs)

    monkeypatch.setattr(Session, "run", interrupted)
    assert main(["run", str(suite), "--db", str(db), "--repeat", "4"]) == 130
    out, err = capsys.readouterr()
    assert "--resume" in err and "--repeat 4 --resume" in err  # the printed command runs the same plan
    # The interrupted case says what happened to each run, the untouched one that it never ran.
    assert "turn: FAIL  (2 pass, 0 fail, 1 aborted, 1 not run;" in out
    assert "run 3: aborted: KeyboardInterrupt" in out
    assert "later: NOT RUN  (0 pass, 0 fail, not run;" in out
    assert "no finished runs measured" not in out  # a case that never ran has nothing to check
    with Store(db, readonly=True) as store:
        uid = store.resolve_session("latest")
        assert store.session(uid)["status"] == "aborted"
        assert list(store.runs(uid)["status"]) == ["pass", "pass", "aborted"]
    monkeypatch.setattr(Session, "run", real_run)
    # Only with the suite it ran: another suite (or this one edited) is refused, nothing added.
    other = write_suite(tmp_path, "[[cases]]\nname = 'x'\naction = 'stop'\n", name="other.toml")
    assert main(["run", str(other), "--db", str(db), "--resume", uid]) == 2
    assert f"session {uid} recorded suite" in capsys.readouterr().err
    assert main(["run", str(suite), "--db", str(db), "--resume", uid, "--seed", "9"]) == 2
    assert f"session {uid} ran with seed 0" in capsys.readouterr().err
    assert main(["run", str(suite), "--db", str(db), "--resume", uid]) == 0
    with Store(db, readonly=True) as store:
        runs = store.runs(uid)
        assert store.session(uid)["status"] == "finished"
    passed = runs[runs["status"] == "pass"]
    for case in ("turn", "later"):
        assert sorted(passed[passed["case_name"] == case]["repetition"]) == [1, 2, 3, 4]


def test_sigkill_of_the_runner_loses_no_finished_run(tmp_path):
    import os
    import signal
    import subprocess
    import sys
    import time

    suite = write_suite(tmp_path, "repeat = 500\n[[cases]]\nname = 'follow'\naction = 'follow_line'\n"
                                  "params = { distance_mm = 300 }\n")
    db = tmp_path / "kill.sqlite"
    child = subprocess.Popen([sys.executable, "-m", "harness", "run", str(suite), "--db", str(db)],
                             stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 60
        finished = 0
        while finished < 3:
            assert time.monotonic() < deadline and child.poll() is None
            time.sleep(0.2)
            if db.exists():
                try:
                    with Store(db, readonly=True) as store:
                        runs = store.runs(store.resolve_session("latest"))
                        finished = int((runs["status"] == "pass").sum())
                except Exception:  # the runner may be between creating the file and its first session
                    finished = 0
        os.kill(child.pid, signal.SIGKILL)
        child.wait(timeout=10)
    finally:
        if child.poll() is None:
            child.kill()
    with Store(db) as store:  # a writable open recovers what the killed runner left running
        uid = store.resolve_session("latest")
        runs = store.runs(uid)
        assert store.session(uid)["status"] == "aborted"
        assert set(runs["status"]) <= {"pass", "aborted"}
        assert (runs["status"] == "aborted").sum() <= 1
        passed = runs[runs["status"] == "pass"]
        assert len(passed) >= finished
        for run_id in passed["run_id"]:
            assert len(store.telemetry(int(run_id))) > 10
        assert set(store.measurements(uid)["run_status"]) <= {"pass", "aborted"}


def test_operator_reset_prompts_and_skip_and_quit(tmp_path):
    from harness.runner import Runner
    from harness.suites import load_suite

    suite = load_suite(write_suite(tmp_path, "repeat = 3\nreset = 'operator'\n[[cases]]\nname = 't'\n"
                                             "action = 'turn'\nparams = { angle_deg = 30 }\n"))
    answers = iter(["", "s", "q"])
    prompts = []

    def ask(prompt):
        prompts.append(prompt)
        return next(answers)

    with Store(tmp_path / "op.sqlite") as store:
        report = Runner(suite, store, ask=ask).run()
        runs = store.runs(report.uid)
    assert len(prompts) == 3 and "Enter to go, s to skip, q to quit" in prompts[0]
    assert report.status == "aborted"
    assert [r.status for r in report.cases[0].runs] == ["pass", "aborted", "aborted"]  # as stored
    assert list(runs["status"]) == ["pass", "aborted", "aborted"]
