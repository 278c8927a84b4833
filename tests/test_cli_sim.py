"""`trackproof sim` as a user runs it, and the kinematics the hub's actions rely on."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys

import pandas as pd
import pytest

from harness.cli import main, parse_value
from hub_side.motion import DEFAULT_GEOMETRY, deg_per_mm, pivot_motor_deg, ramp_speed_pct, spin_motor_deg


def run_cli(capsys, *args: str) -> tuple[int, str, str]:
    code = main(list(args))
    out, err = capsys.readouterr()
    return code, out, err


def test_sim_follow_line_json_has_result_truth_and_telemetry(capsys, tmp_path):
    csv = tmp_path / "telemetry.csv"
    code, out, _ = run_cli(capsys, "sim", "follow_line", "junctions=3", "side=any", "overrun_mm=80",
                           "speed_pct=50", "--seed", "3", "--json", "--telemetry-csv", str(csv))
    assert code == 0
    report = json.loads(out)
    assert report["result"]["status"] == "done" and report["result"]["junctions"] == 3
    assert {"start", "end", "travel_mm", "heading_change_deg"} <= set(report["truth"])
    telemetry = report["telemetry"]
    assert telemetry["dropped"] == 0 and telemetry["samples"] == report["result"]["samples"]
    assert "refl_outer_left_pct" in telemetry["channels"]
    frame = pd.read_csv(csv)
    assert list(frame.columns) == telemetry["channels"]
    assert len(frame) == telemetry["samples"]


def test_sim_turn_prints_a_readable_report(capsys):
    code, out, _ = run_cli(capsys, "sim", "turn", "angle_deg=90", "mode=spin", "speed_pct=40")
    assert code == 0
    assert "turn on simulated kestrel-7" in out and ": done" in out
    assert "truth: travelled" in out and "telemetry:" in out


@pytest.mark.parametrize("args, message", [
    (["sim", "jump"], "unknown action 'jump'"),
    (["sim", "turn", "angle=90"], "turn.angle: unknown parameter"),
    (["sim", "turn", "angle_deg=ninety"], "turn.angle_deg: expected a number"),
    (["sim", "turn"], "turn.angle_deg: required"),
    (["sim", "turn", "angle_deg"], "expected key=value"),
    (["sim", "probe_edge", "sensor=nose"], "unknown sensor 'nose'"),
    (["sim", "turn", "angle_deg=90", "--course", "no/such/course.toml"], "no/such/course.toml: file not found"),
    # The hub's own message, whole (only text echoed from the host is cut short).
    (["sim", "follow_line"], "follow_line needs distance_mm, junctions or time_s"),
    (["sim", "turn", "angle_deg=90", "--telemetry-hz", "1000"], "--telemetry-hz: must be 0 (off) to 500"),
    (["sim", "turn", "angle_deg=90", "speed_pct=0"], "turn.speed_pct: must be between 1.0 and 100.0, got 0"),
    (["sim", "turn", "angle_deg=90", "--baud", "9600"], "--baud: is for sim serve only"),
    (["sim", "serve", "speed_pct=40"], "sim serve: takes no key=value parameters"),
    (["sim", "serve", "--telemetry-hz", "7"], "sim serve: takes no --telemetry-hz"),
])
def test_bad_input_is_one_clear_line_and_exit_code_2(capsys, args, message):
    code, out, err = run_cli(capsys, *args)
    assert code == 2
    assert message in err
    assert "Traceback" not in err and err.count("\n") == 1


def test_course_file_errors_name_file_and_key(capsys, tmp_path):
    course = tmp_path / "bad_course.toml"
    course.write_text('[start]\nx_mm = 0\ny_mm = 0\n[[lines]]\npoints = [[0, 0], [100, "a"]]\n')
    code, _, err = run_cli(capsys, "sim", "stop", "--course", str(course))
    assert code == 2
    assert f"{course}: lines[0].points[1]: expected [x_mm, y_mm]" in err


def test_python_dash_m_harness_works_like_trackproof():
    done = subprocess.run([sys.executable, "-m", "harness", "sim", "stop", "--json"], capture_output=True,
                          text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout)["result"]["status"] == "done"


@pytest.mark.parametrize("unbuffered", ["1", ""])
def test_a_reader_that_goes_away_is_no_traceback(tmp_path, unbuffered):
    # `trackproof calibrate turns | head -1`: the reader has gone before the report is printed
    # (here it is gone from the start), with stdout buffered or not. The moves are kept all the same.
    db = tmp_path / "r.sqlite"
    command = [sys.executable, "-m", "harness", "calibrate", "turns", "--modes", "spin", "--repeat", "1",
               "--db", str(db)]
    read_end, write_end = os.pipe()
    os.close(read_end)
    try:
        done = subprocess.run(command, stdout=write_end, stderr=subprocess.PIPE, text=True, timeout=60,
                              env={**os.environ, "PYTHONUNBUFFERED": unbuffered})
    finally:
        os.close(write_end)
    assert "Traceback" not in done.stderr and "Exception ignored" not in done.stderr
    assert done.returncode == 1
    assert "6 runs: 6 pass" in subprocess.run([sys.executable, "-m", "harness", "sessions", "--db", str(db)],
                                              capture_output=True, text=True, timeout=60).stdout


def test_an_unwritable_telemetry_csv_is_refused_before_the_move(tmp_path, capsys):
    assert main(["sim", "turn", "angle_deg=90", "--telemetry-csv", str(tmp_path / "no" / "t.csv")]) == 2
    err = capsys.readouterr().err
    assert f"folder {tmp_path / 'no'} does not exist" in err and "Traceback" not in err


def test_values_parse_as_numbers_flags_and_lists():
    assert parse_value("3") == 3 and parse_value("2.5") == 2.5
    assert parse_value("true") is True and parse_value("left,right") == ["left", "right"]
    assert parse_value("spin") == "spin"


# Common practice for a differential drive (no published source): one motor degree moves a
# wheel pi*D/360 mm; a spin by angle a needs a*T/D motor degrees per wheel, a pivot twice that.
# Check values for D = 56 mm and T = 120 mm, computed independently in REFERENCES.md section 9.
GEOMETRY_56_120 = dict(DEFAULT_GEOMETRY, wheel_diameter_mm=56.0, track_mm=120.0)


def test_kinematics_check_values():
    assert spin_motor_deg(90.0, GEOMETRY_56_120) == pytest.approx(192.857143, abs=1e-6)
    assert pivot_motor_deg(90.0, GEOMETRY_56_120) == pytest.approx(385.714286, abs=1e-6)
    assert 100.0 * deg_per_mm(GEOMETRY_56_120) == pytest.approx(204.627784, abs=1e-6)
    assert deg_per_mm(GEOMETRY_56_120) == pytest.approx(360.0 / (math.pi * 56.0))


def test_correction_factors_scale_motor_degrees():
    scaled = dict(GEOMETRY_56_120, distance_scale=1.02, spin_scale=1.05, pivot_scale=0.97)
    assert deg_per_mm(scaled) == pytest.approx(1.02 * deg_per_mm(GEOMETRY_56_120))
    assert spin_motor_deg(90.0, scaled) == pytest.approx(1.05 * 192.857143, abs=1e-5)
    assert pivot_motor_deg(90.0, scaled) == pytest.approx(0.97 * 385.714286, abs=1e-5)


def test_ramp_hold_ramp_profile():
    p = {"speed_pct": 60.0, "start_pct": 20.0, "ramp_up_mm": 100.0, "end_pct": 10.0, "ramp_down_mm": 50.0}
    assert ramp_speed_pct(0.0, None, p) == 20.0
    assert ramp_speed_pct(50.0, None, p) == 40.0  # half-way up the ramp
    assert ramp_speed_pct(300.0, 200.0, p) == 60.0  # holding
    assert ramp_speed_pct(400.0, 25.0, p) == 35.0  # half-way down
    assert ramp_speed_pct(450.0, 0.0, p) == 10.0
