"""UMBmark (calibrate odometry): the formulas against REFERENCES.md section 2, an exact square
model as an independent oracle, dead reckoning against closed-form arcs, the encoder-held straight
drive on the hub (CPython and MicroPython), and the whole test on the simulator, which must
recover the wheel-diameter ratio and track width written into a course's [truth]."""

from __future__ import annotations

import argparse
import json
import math
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from harness.analysis.umbmark import (
    alpha_beta_from_x,
    alpha_beta_from_y,
    curvature_radius,
    diameter_corrections,
    integrate_odometry,
    umbmark,
    wheel_diameter_ratio,
)
from harness.calibrate.odometry import (
    OdometryModel,
    SquarePlan,
    add_parser,
    calibrate_odometry,
    in_start_frame,
    parse_position,
)
from harness.links import SimLink
from harness.profile import load_profile
from harness.robot import RobotConnector
from harness.sim import DEFAULT_PROFILE, Simulation, truth_report, truth_snapshot
from harness.sim.course import load_course
from micropython_runner import run_micropython

pytestmark = pytest.mark.usefixtures("results_in_tmp")

ROOT = Path(__file__).resolve().parent.parent

# ------------------------------------------------------------------ the formulas
# REFERENCES.md section 2, worked example [C]: D_n = 0.150 m, b_n = 0.340 m, L = 4 m, truth
# E_d = 1.002 and E_b = 1.010, one run each way (the error is purely systematic).
CW = np.array([[-0.293593, -0.337811]])
CCW = np.array([[0.062942, -0.060080]])


def test_umbmark_formulas_match_the_worked_example() -> None:
    res = umbmark(CW, CCW, side=4.0, track=0.340)
    assert res.e_max_syst == pytest.approx(0.447564, abs=2e-6)
    alpha, beta = alpha_beta_from_x(res.cg_cw, res.cg_ccw, 4.0)
    assert alpha == pytest.approx(0.014416, abs=2e-6)
    assert math.degrees(alpha) == pytest.approx(0.82596, abs=2e-4)
    assert beta == pytest.approx(0.022283, abs=2e-6)
    assert math.degrees(beta) == pytest.approx(1.27675, abs=2e-4)
    assert curvature_radius(4.0, beta) == pytest.approx(179.5091, abs=2e-2)
    assert res.from_x.e_d == pytest.approx(1.001896, abs=2e-6)
    assert res.from_x.e_b == pytest.approx(1.009262, abs=2e-6)
    # "average of x- and y-based estimates": alpha and beta averaged, then converted.
    assert res.combined.e_d == pytest.approx(1.002006, abs=2e-6)
    assert res.combined.e_b == pytest.approx(1.010217, abs=2e-6)
    c_l, c_r = diameter_corrections(res.from_x.e_d)
    assert (c_l, c_r) == (pytest.approx(0.999053, abs=2e-6), pytest.approx(1.000947, abs=2e-6))
    assert res.from_x.e_b * 0.340 == pytest.approx(0.343149, abs=2e-6)


def test_corrections_keep_the_average_and_the_ratio() -> None:
    # REFERENCES section 2: c_R / c_L = E_d and (c_L + c_R) / 2 = 1 [C].
    for e_d in (0.97, 0.999, 1.0, 1.002, 1.05):
        c_l, c_r = diameter_corrections(e_d)
        assert c_r / c_l == pytest.approx(e_d, rel=1e-12)
        assert (c_l + c_r) / 2 == pytest.approx(1.0, rel=1e-12)


def test_straight_legs_give_unit_ratio_and_units_do_not_matter() -> None:
    assert math.isinf(curvature_radius(4.0, 0.0)) and wheel_diameter_ratio(4.0, 0.0, 0.34) == 1.0
    metres = umbmark(CW, CCW, 4.0, 0.340)
    millimetres = umbmark(CW * 1000, CCW * 1000, 4000.0, 340.0)
    assert millimetres.combined.e_d == pytest.approx(metres.combined.e_d, rel=1e-12)
    assert millimetres.combined.e_b == pytest.approx(metres.combined.e_b, rel=1e-12)
    # The y components give the second estimate (REFERENCES: alpha from y_cw - y_ccw, beta from the sum).
    a_y, b_y = alpha_beta_from_y(metres.cg_cw, metres.cg_ccw, 4.0)
    assert a_y == pytest.approx((-0.337811 + 0.060080) / -16.0)
    assert b_y == pytest.approx((-0.337811 - 0.060080) / -16.0)


# ------------------------------------------------------------------ an exact square, as an oracle


def _arc(x: float, y: float, th: float, d: float, dth: float) -> tuple[float, float, float]:
    """Exact pose after moving d along an arc that turns by dth (closed form, plane geometry)."""
    if abs(dth) < 1e-15:
        return x + d * math.cos(th), y + d * math.sin(th), th
    r = d / dth
    return x + r * (math.sin(th + dth) - math.sin(th)), y - r * (math.cos(th + dth) - math.cos(th)), th + dth


def exact_square(side: float, d_nom: float, b_nom: float, e_d: float, e_b: float, cw: bool,
                 d_left: float | None = None, d_right: float | None = None, b_odo: float | None = None) -> tuple[float, float]:
    """The real end point when the controller turns the wheels so that its odometry (wheels
    d_left/d_right, track b_odo; the nominal ones by default) sees a perfect square: four legs,
    four 90 degree spin turns. Truth: average diameter d_nom, D_R/D_L = e_d, track e_b * b_nom."""
    true_l, true_r, b = d_nom * 2 / (e_d + 1), d_nom * 2 * e_d / (e_d + 1), e_b * b_nom
    d_left, d_right, b_odo = d_left or d_nom, d_right or d_nom, b_odo or b_nom
    sign = -1.0 if cw else 1.0
    x = y = th = 0.0
    for _ in range(4):
        s_l, s_r = side / d_left * true_l, side / d_right * true_r  # wheel angle times true radius
        x, y, th = _arc(x, y, th, (s_l + s_r) / 2, (s_r - s_l) / b)
        quarter = math.pi / 2 * b_odo / 2
        s_l, s_r = -sign * quarter / d_left * true_l, sign * quarter / d_right * true_r
        x, y, th = _arc(x, y, th, (s_l + s_r) / 2, (s_r - s_l) / b)
    return x, y


def test_exact_square_reproduces_the_reference_errors_and_the_correction() -> None:
    cw = exact_square(4.0, 0.150, 0.340, 1.002, 1.010, cw=True)
    ccw = exact_square(4.0, 0.150, 0.340, 1.002, 1.010, cw=False)
    assert cw == (pytest.approx(-0.293593, abs=1e-6), pytest.approx(-0.337811, abs=1e-6))
    assert ccw == (pytest.approx(0.062942, abs=1e-6), pytest.approx(-0.060080, abs=1e-6))
    res = umbmark(np.array([cw]), np.array([ccw]), 4.0, 0.340)
    c_l, c_r = diameter_corrections(res.from_x.e_d)
    after = [exact_square(4.0, 0.150, 0.340, 1.002, 1.010, cw=d, d_left=c_l * 0.150, d_right=c_r * 0.150,
                          b_odo=res.from_x.e_b * 0.340) for d in (True, False)]
    assert max(math.hypot(*p) for p in after) == pytest.approx(0.026711, abs=1e-6)  # "17x smaller"


@pytest.mark.parametrize(("side", "d_nom", "b_nom", "e_d", "e_b", "expect_d", "expect_b", "before", "after"), [
    # REFERENCES section 2 [C]: the small-robot variant, and smaller true errors on the worked
    # example's robot (which the reference leaves implicit: only that geometry gives its digits).
    (1.0, 0.056, 0.120, 1.005, 1.03, 1.004195, 1.026377, 0.2534, 0.0342),
    (4.0, 0.150, 0.340, 1.0002, 1.001, 1.000199, 1.000993, None, None),
])
def test_variants(side, d_nom, b_nom, e_d, e_b, expect_d, expect_b, before, after) -> None:
    ends = [exact_square(side, d_nom, b_nom, e_d, e_b, cw=d) for d in (True, False)]
    res = umbmark(np.array([ends[0]]), np.array([ends[1]]), side, b_nom)
    assert res.from_x.e_d == pytest.approx(expect_d, abs=2e-6)
    assert res.from_x.e_b == pytest.approx(expect_b, abs=2e-6)
    if before is not None:
        assert res.e_max_syst == pytest.approx(before, abs=1e-4)
        c_l, c_r = diameter_corrections(res.from_x.e_d)
        again = [exact_square(side, d_nom, b_nom, e_d, e_b, cw=d, d_left=c_l * d_nom, d_right=c_r * d_nom,
                              b_odo=res.from_x.e_b * b_nom) for d in (True, False)]
        assert max(math.hypot(*p) for p in again) == pytest.approx(after, abs=1e-4)


# ------------------------------------------------------------------ dead reckoning


def test_odometry_follows_a_closed_form_arc_and_a_spin() -> None:
    # Wheels at steady but unequal speeds drive an arc of radius R = b/2 (v_r + v_l)/(v_r - v_l)
    # (Where am I?, p. 20, eqs. 1.2-1.5 integrated in closed form).
    b, n = 120.0, 400
    left = np.linspace(0, 300.0, n + 1)[1:]
    right = np.linspace(0, 360.0, n + 1)[1:]
    x, y, th = integrate_odometry(left, right, b)
    theta = (360.0 - 300.0) / b
    radius = (300.0 + 360.0) / 2 / theta
    assert th == pytest.approx(theta, rel=1e-12)
    assert x == pytest.approx(radius * math.sin(theta), rel=1e-6)
    assert y == pytest.approx(radius * (1 - math.cos(theta)), rel=1e-6)
    # A spin turns on the spot, clockwise when the left wheel runs forward.
    x, y, th = integrate_odometry(np.linspace(0, 94.2478, 50), np.linspace(0, -94.2478, 50), b)
    assert (x, y) == (pytest.approx(0.0, abs=1e-9), pytest.approx(0.0, abs=1e-9))
    assert math.degrees(th) == pytest.approx(-90.0, abs=1e-3)


def test_truth_is_turned_into_the_start_frame() -> None:
    east = {"x_mm": 0.0, "y_mm": 0.0, "heading_deg": 90.0}  # the mat's y is up; east is x
    assert in_start_frame(east, {"x_mm": 10.0, "y_mm": 0.0}) == pytest.approx((10.0, 0.0))
    assert in_start_frame(east, {"x_mm": 0.0, "y_mm": 10.0}) == pytest.approx((0.0, 10.0))  # north is left
    north = {"x_mm": 5.0, "y_mm": 5.0, "heading_deg": 0.0}
    assert in_start_frame(north, {"x_mm": 5.0, "y_mm": 15.0}) == pytest.approx((10.0, 0.0))
    assert in_start_frame(north, {"x_mm": -5.0, "y_mm": 5.0}) == pytest.approx((0.0, 10.0))


def test_operator_positions_are_parsed_strictly() -> None:
    assert parse_position("-12 35") == (-12.0, 35.0)
    assert parse_position(" 4.5, -2 ") == (4.5, -2.0)
    for bad in ("", "12", "1 2 3", "a b", "nan 1", "inf 0"):
        assert parse_position(bad) is None


def test_odometry_model_is_what_the_hub_assumes() -> None:
    profile = load_profile(DEFAULT_PROFILE)
    model = OdometryModel.of(profile)
    assert model.mm_per_deg == pytest.approx(math.pi * 56.0 / 360.0)
    assert model.track_mm == pytest.approx(112.0)
    from dataclasses import replace

    scaled = OdometryModel.of(replace(profile, spin_scale=1.1, distance_scale=1.05))
    # A spin of 90 degrees by the hub (hub_side.motion.spin_motor_deg) must read back as 90 degrees.
    from hub_side.motion import spin_motor_deg

    geometry = replace(profile, spin_scale=1.1, distance_scale=1.05).geometry()
    deg = spin_motor_deg(90.0, geometry)
    _, _, th = integrate_odometry(np.array([deg * scaled.mm_per_deg]), np.array([-deg * scaled.mm_per_deg]),
                                  scaled.track_mm)
    assert math.degrees(th) == pytest.approx(-90.0, rel=1e-12)


# ------------------------------------------------------------------ the hub's encoder-held straight

HOLD_SCRIPT = """
try:
    from scripted_board import ScriptedBoard
except ImportError:
    from hub_script.scripted_board import ScriptedBoard
from hub_side import wire
from hub_side.listener import Listener

# The scripted board: 0.5 mm per wheel degree (D = 180/pi mm) and 4 wheel degrees of difference
# per degree of heading (track 2 D); its right motor is 35/36 as strong as the left.
GEOMETRY = {"wheel_diameter_mm": 57.29578, "track_mm": 114.59156}

def drive(params, geometry=GEOMETRY):
    board = ScriptedBoard()
    listener = Listener(board, robot_id="s", control_period_us=10000)
    reader = wire.FrameReader()
    board.host_send(wire.encode_message(wire.HELLO, 1, {"proto": wire.PROTOCOL_VERSION, "session": "h",
                                                        "watchdog_ms": 20000, "geometry": geometry}))
    board.host_send(wire.encode_message(wire.START, 2, {"action": "drive_straight", "telemetry_hz": 0,
                                                        "params": params}))
    for _ in range(200000):
        wait = listener.tick()
        board.idle_us(173)
        for t, seq, body in reader.feed(board.take_tx()):
            if t == wire.RESULT:
                msg = wire.decode_json(body)
                s_mm, x_mm, cdeg = board.pose()
                print(msg["status"], msg["enc_left_deg"], msg["enc_right_deg"], s_mm, x_mm, cdeg)
                return
        board.idle_us(min(wait, 20000))

drive({"distance_mm": 300, "speed_pct": 50, "hold": "encoders"})
drive({"distance_mm": 300, "speed_pct": 50, "kp_heading": 0})
drive({"distance_mm": 300, "speed_pct": 50, "hold": "gyro"})
# Told the right wheel is 3 % larger (it is not): the hold turns the wheels 1.03 : 1 in degrees.
geometry = dict(GEOMETRY)
geometry["wheel_ratio"] = 1.03
drive({"distance_mm": 300, "speed_pct": 50, "hold": "encoders"}, geometry)
"""


def test_encoder_hold_drives_straight_by_the_wheels_on_both_interpreters(tmp_path: Path) -> None:
    script = tmp_path / "hold.py"
    script.write_text(HOLD_SCRIPT)
    env = dict(os.environ, PYTHONPATH=f"{ROOT}{os.pathsep}{ROOT / 'tests' / 'hub_script'}")
    cpython = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, env=env, timeout=60)
    assert cpython.returncode == 0, cpython.stderr
    mpy = run_micropython(HOLD_SCRIPT, [ROOT / "hub_side", ROOT / "tests" / "hub_script"])
    assert mpy.split() == cpython.stdout.split()  # the board model is all integer: same numbers
    rows = [line.split() for line in cpython.stdout.splitlines()]
    (enc_status, el, er, _, x_enc, h_enc), (_, ol, orr, _, x_open, h_open), (gyro_status, *_rest), ratio_row = rows
    assert enc_status == gyro_status == "done"
    # Held by the encoders the wheels turn alike and the robot keeps its heading; left alone the
    # weaker right motor makes it curve right (clockwise) by several degrees.
    assert abs(int(el) - int(er)) <= 4 and abs(int(h_enc)) <= 100  # centidegrees
    assert int(ol) - int(orr) >= 12 and int(h_open) > 300
    assert abs(int(x_enc)) < abs(int(x_open))
    # With wheel_ratio 1.03 the hold keeps c_L * left = c_R * right: left / right = c_R / c_L = 1.03.
    assert ratio_row[0] == "done" and int(ratio_row[1]) / int(ratio_row[2]) == pytest.approx(1.03, abs=0.01)


def test_encoder_hold_ignores_a_drifting_gyro(tmp_path: Path) -> None:
    course = _course(tmp_path, 56.0, 56.0, 112.0, extra="gyro_bias_dps = 4.0")
    sim = Simulation(load_course(course), load_profile(DEFAULT_PROFILE), seed=1)
    from harness.session import Session

    session = Session(SimLink(sim), session_id="hold")
    session.hello(geometry=sim.profile.geometry())
    turned = {}
    for hold in ("gyro", "encoders"):
        sim.reset()
        before = truth_snapshot(sim)
        record = session.run("drive_straight", {"distance_mm": 500.0, "speed_pct": 40.0, "hold": hold})
        assert record.status == "done"
        turned[hold] = truth_report(before, truth_snapshot(sim))["heading_change_deg"]
    assert abs(turned["gyro"]) > 5.0  # the gyro's bias is followed: the robot really turns
    assert abs(turned["encoders"]) < 0.5  # equal wheels, held by the encoders: straight


# ------------------------------------------------------------------ on the simulator


def _course(tmp_path: Path, left_mm: float, right_mm: float, track_mm: float, extra: str = "") -> Path:
    """A bare course (the squares need room, not lines) with the given true wheels and track."""
    path = tmp_path / "bare.toml"
    path.write_text(f"""name = "bare"
[start]
x_mm = 0.0
y_mm = 0.0
heading_deg = 90.0
[[lines]]
name = "far away"
points = [[-5000, -5000], [-4990, -5000]]
[truth]
wheel_left_diameter_mm = {left_mm!r}
wheel_right_diameter_mm = {right_mm!r}
track_mm = {track_mm!r}
{extra}
""")
    return path


def _wheels(e_d: float, average_mm: float = 56.0) -> tuple[float, float]:
    """True left and right diameters with D_R / D_L = e_d and the profile's average."""
    return average_mm * 2 / (e_d + 1), average_mm * 2 * e_d / (e_d + 1)


NOISE = "sensor_noise_pct = 1.0\ngyro_noise_deg = 0.1\nplacement_sd_mm = 1.5\nplacement_sd_deg = 0.7"


@pytest.mark.parametrize(("e_d", "track", "runs", "extra", "tol_d", "tol_b"), [
    # Tolerances stated: E_d within 0.0005 and E_b within 0.001 on a noiseless robot; twice that
    # with sensor and gyro noise and placement error (1.5 mm, 0.7 deg) and three runs a direction.
    (1.005, 113.5, 1, "", 0.0005, 0.001),
    (0.996, 110.8, 3, NOISE, 0.001, 0.002),
])
def test_umbmark_recovers_the_true_wheels_and_track(tmp_path, e_d, track, runs, extra, tol_d, tol_b) -> None:
    left, right = _wheels(e_d)
    profile = load_profile(DEFAULT_PROFILE)  # believes 56 mm wheels and a 112 mm track
    connector = RobotConnector(profile, "sim", course=_course(tmp_path, left, right, track, extra), seed=4)
    cal = calibrate_odometry(connector, SquarePlan(600.0, 30.0, 25.0), runs, verify=True)
    true_e_b = track / profile.track_mm  # [truth] track over the profile's: UMBmark's E_b
    est = cal.result.combined
    assert est.e_d == pytest.approx(e_d, abs=tol_d)
    assert est.e_b == pytest.approx(true_e_b, abs=tol_b)
    assert cal.track_mm_new == pytest.approx(track, abs=tol_b * profile.track_mm)
    lo, hi = cal.intervals["e_b"]
    assert lo <= est.e_b <= hi
    assert cal.wheel_ratio_new == pytest.approx(e_d, abs=tol_d)  # the profile had 1.0
    # With the corrected track and wheel ratio the squares close: both errors are gone (E_b and
    # E_d ~ 1); what is left is noise and the first-order model's remainder.
    after = cal.verify_result
    assert after is not None and after.e_max_syst < 0.25 * cal.result.e_max_syst
    assert after.combined.e_b == pytest.approx(1.0, abs=tol_b)
    assert after.combined.e_d == pytest.approx(1.0, abs=tol_d)


def test_operator_measured_squares_give_the_same_answer(tmp_path) -> None:
    """A robot that is not the simulator's own (no truth for the harness): the operator puts it
    back on the start mark and reads its end position off a tape. Here the 'operator' is the
    simulation behind a serial-like link, read from its truth."""
    left, right = _wheels(1.004)
    sim = Simulation(load_course(_course(tmp_path, left, right, 114.0)), load_profile(DEFAULT_PROFILE), seed=2)
    connector = RobotConnector(sim.profile, "serial:/dev/fake", open_link=lambda spec, profile: SimLink(sim))
    assert connector.sim is None
    start: dict = {}
    asked: list[str] = []

    def operator(prompt: str) -> str:
        asked.append(prompt)
        if "start mark" in prompt and "Where" not in prompt:
            sim.reset()
            start["pose"] = truth_snapshot(sim)["pose"]
            return ""
        if "Where" in prompt:
            forward, leftward = in_start_frame(start["pose"], truth_snapshot(sim)["pose"])
            return "nonsense" if len(asked) == 2 else f"{forward:.1f} {leftward:.1f}"  # one typo, asked again
        raise AssertionError(prompt)

    cal = calibrate_odometry(connector, SquarePlan(600.0, 30.0, 25.0), 1, ask=operator)
    assert cal.result.combined.e_d == pytest.approx(1.004, abs=0.0006)
    assert cal.result.combined.e_b == pytest.approx(114.0 / 112.0, abs=0.0015)
    assert sum("Where" in p for p in asked) == 3  # two squares, one answer asked twice


def _odometry_cli(tmp_path, wheel_ratio: float):
    """A course with these wheels and a 115 mm track, a copy of the bundled profile to write
    into, and a runner of `calibrate odometry` on them that returns its JSON report."""
    left, right = _wheels(wheel_ratio)
    course = _course(tmp_path, left, right, 115.0)
    robot = tmp_path / "robot.toml"
    robot.write_text((ROOT / "suites" / "practice_robot.toml").read_text())
    parser = argparse.ArgumentParser()
    add_parser(parser.add_subparsers())
    report = tmp_path / "odometry.json"

    def run(*extra: str) -> dict:
        args = parser.parse_args(["odometry", "--robot", str(robot), "--course", str(course), "--repeat", "1",
                                  "--json", str(report), *extra])
        assert args.func(args) == 0
        return json.loads(report.read_text())

    return course, robot, run


def test_cli_writes_the_track_and_the_profile_then_closes_the_squares(tmp_path, capsys) -> None:
    course, robot, cli = _odometry_cli(tmp_path, 1.0)

    def run(*extra: str) -> dict:
        return cli("--side-mm", "500", *extra)

    first = run("--write")
    out = capsys.readouterr().out
    assert "E_max,syst (before)" in out and "Wrote track_mm" in out
    written = load_profile(robot)
    assert written.track_mm == pytest.approx(115.0, abs=0.2)
    assert written.track_mm == pytest.approx(round(first["recommend"]["track_mm"], 2))
    text = robot.read_text()
    assert "# Robot profile for the invented demo robot" in text  # comments kept
    assert re.search(r"# \d{4}-\d\d-\d\d: track_mm 112(\.0)? -> 115\.\d+: UMBmark", text)  # the dated note
    second = run()
    # The robot now closes its squares: the written track removed the systematic error.
    assert second["umbmark"]["e_max_syst"] < 0.1 * first["umbmark"]["e_max_syst"]
    assert second["umbmark"]["combined"]["e_b"] == pytest.approx(1.0, abs=0.002)


def test_cli_refuses_to_write_the_bundled_profile_and_bad_sides(tmp_path) -> None:
    from harness.errors import InputError

    parser = argparse.ArgumentParser()
    add_parser(parser.add_subparsers())
    args = parser.parse_args(["odometry", "--write"])
    with pytest.raises(InputError, match="needs --robot"):
        args.func(args)
    args = parser.parse_args(["odometry", "--side-mm", "-5"])
    with pytest.raises(InputError, match="--side-mm"):
        args.func(args)


# ------------------------------------------------------------------ unequal wheels: wheel_ratio

# Hand-computed for D = 56 mm, track 120 mm, E_d = wheel_ratio = 1.05. Each wheel's diameter is
# c * D with c_L = 2 / (E_d + 1) = 0.975609756 and c_R = 2 / (1/E_d + 1) = 1.024390244 (Borenstein
# & Feng 1996, REFERENCES.md section 2); so 1 / c_L = (E_d + 1) / 2 = 1.025 and
# 1 / c_R = (1/E_d + 1) / 2 = 0.976190476. Equal 56 mm wheels need 90 * 120 / 56 = 192.857142857
# motor degrees each for a 90 degree spin, and 385.714285714 for a 90 degree pivot (the module's
# common-practice kinematics, checked in tests/test_cli_sim.py); each wheel takes that over its c.
GEOMETRY_UNEQUAL = {"wheel_diameter_mm": 56.0, "track_mm": 120.0, "distance_scale": 1.0, "spin_scale": 1.0,
                    "pivot_scale": 1.0, "wheel_ratio": 1.05}


def test_wheel_helpers_against_hand_computed_values() -> None:
    from hub_side import motion

    g = GEOMETRY_UNEQUAL
    assert motion.wheel_factors(g) == (pytest.approx(0.975609756, abs=1e-9), pytest.approx(1.024390244, abs=1e-9))
    assert motion.spin_wheel_deg(90.0, g) == (pytest.approx(197.678571429, abs=1e-6),
                                              pytest.approx(188.265306122, abs=1e-6))
    assert motion.pivot_wheel_deg(90.0, g) == (pytest.approx(395.357142857, abs=1e-6),
                                               pytest.approx(376.530612245, abs=1e-6))
    # pi * 56 / 360 = 0.488692191 mm per degree for the average wheel; each wheel that times c.
    assert motion.wheel_mm_per_deg(g) == (pytest.approx(0.476772869, abs=1e-9), pytest.approx(0.500611513, abs=1e-9))
    # 100 degrees on each wheel: the mean of 47.6772869 and 50.0611513 mm (the average is kept).
    assert motion.travel_mm(100, 100, g) == pytest.approx(48.8692191, abs=1e-6)
    assert motion.travel_mm(100, 0, g) == pytest.approx(23.83864345, abs=1e-6)
    # The encoder heading reads a per-wheel spin back as its angle, and equal degrees on both
    # wheels (arcs 47.677 and 50.061 mm) as (47.6772869 - 50.0611513) / 120 rad = -1.1382 deg.
    left, right = motion.spin_wheel_deg(90.0, g)
    assert motion.encoder_heading_deg(left, -right, g) == pytest.approx(90.0, rel=1e-12)
    assert motion.encoder_heading_deg(100, 100, g) == pytest.approx(math.degrees(-2.3838644 / 120.0), abs=1e-6)
    # The host's odometry model uses the same per-wheel millimetres.
    model = OdometryModel(math.pi * 56.0 / 360.0, 120.0, 1.05)
    assert model.wheel_mm_per_deg == pytest.approx(motion.wheel_mm_per_deg(g), rel=1e-12)


@pytest.mark.parametrize("scales", [(1.0, 1.0, 1.0), (1.02, 1.05, 0.97)])
def test_wheel_ratio_one_changes_nothing_bit_for_bit(scales) -> None:
    """With wheel_ratio 1.0 the per-wheel helpers give exactly the equal-wheel formulas'
    numbers (the ones the hub used before wheel_ratio existed), written out here."""
    from hub_side import motion

    ds, ss, ps = scales
    for d, b in ((56.0, 112.0), (43.2, 117.7), (88.0, 161.3)):
        g = {"wheel_diameter_mm": d, "track_mm": b, "distance_scale": ds, "spin_scale": ss, "pivot_scale": ps,
             "wheel_ratio": 1.0}
        mm = 1.0 / (360.0 / (math.pi * d) * ds)
        for angle in (90.0, -37.5, 721.0):
            spin = angle * b / d * ss
            pivot = angle * 2.0 * b / d * ps
            assert motion.spin_wheel_deg(angle, g) == (spin, spin)
            assert motion.pivot_wheel_deg(angle, g) == (pivot, pivot)
        for left, right in ((0, 0), (123, 119), (-4567, 4571), (10001, -3)):
            assert motion.travel_mm(left, right, g) == ((left + right) * 0.5 * mm)
            assert motion.encoder_heading_deg(left, right, g) == (left - right) * d / (2.0 * b * ss)


def test_new_ratio_composes_with_the_old() -> None:
    from harness.calibrate.odometry import compose_wheel_ratio

    # The squares ran with wheels believed at ratio 1.02 (c_L = 2/2.02, c_R = 2.04/2.02); true
    # wheels 55.8 and 57.4 mm. UMBmark's E_d is the true ratio over the believed one.
    c_l, c_r = diameter_corrections(1.02)
    e_d = (57.4 / (c_r * 56.0)) / (55.8 / (c_l * 56.0))
    assert e_d == pytest.approx(57.4 / 55.8 / 1.02, rel=1e-12)
    assert compose_wheel_ratio(1.02, e_d) == pytest.approx(57.4 / 55.8, rel=1e-12)
    assert compose_wheel_ratio(1.0, 1.004) == 1.004


def test_umbmark_on_a_profile_with_a_wrong_ratio_composes_to_the_true_one(tmp_path) -> None:
    """The squares run with wheel_ratio 1.012 in the profile on wheels whose true ratio is 1.006:
    the measured E_d is about 1.006 / 1.012, and old x E_d gives back the true ratio (a larger
    mismatch is recovered less closely: UMBmark is first order, REFERENCES.md section 2, pitfall 4)."""
    from dataclasses import replace

    left, right = _wheels(1.006)
    profile = replace(load_profile(DEFAULT_PROFILE), wheel_ratio=1.012)
    connector = RobotConnector(profile, "sim", course=_course(tmp_path, left, right, 112.0), seed=4)
    cal = calibrate_odometry(connector, SquarePlan(600.0, 30.0, 25.0), 1)
    assert cal.result.combined.e_d == pytest.approx(1.006 / 1.012, abs=0.0005)
    assert cal.wheel_ratio_new == pytest.approx(1.006, abs=0.0005)


def _end_poses(course: Path, profile) -> dict[str, tuple[float, float, float]]:
    """(forward mm, left mm, heading change deg) from the truth after a 90 degree encoder spin
    turn and a 500 mm encoder-held straight, each from the course's start."""
    from harness.session import Session

    sim = Simulation(load_course(course), profile, seed=4)
    session = Session(SimLink(sim), session_id="ratio")
    session.hello(geometry=profile.geometry())
    out = {}
    for action, params in (("turn", {"angle_deg": 90.0, "mode": "spin", "using": "encoders", "speed_pct": 25.0}),
                           ("drive_straight", {"distance_mm": 500.0, "speed_pct": 30.0, "hold": "encoders"})):
        sim.reset()
        before = truth_snapshot(sim)
        assert session.run(action, params).status == "done"
        after = truth_snapshot(sim)
        fwd, lft = in_start_frame(before["pose"], after["pose"])
        out[action] = (fwd, lft, truth_report(before, after)["heading_change_deg"])
    return out


def test_cli_writes_track_and_wheel_ratio_and_unequal_wheels_stop_mattering(tmp_path, capsys) -> None:
    from dataclasses import replace

    course, robot, run = _odometry_cli(tmp_path, 1.01)
    first = run("--write")
    assert "wheel_ratio = 1.0" in capsys.readouterr().out  # "Wrote ... wheel_ratio = 1.0098..."
    original = load_profile(ROOT / "suites" / "practice_robot.toml")
    written = load_profile(robot)
    assert written.wheel_ratio == pytest.approx(1.01, abs=0.0005)
    assert written.wheel_ratio == round(first["recommend"]["wheel_ratio"], 6)
    assert written.track_mm == pytest.approx(115.0, abs=0.2)
    text = robot.read_text()
    assert re.search(r"# \d{4}-\d\d-\d\d: wheel_ratio added, 1\.0\d+: UMBmark.*old x E_d\)\nwheel_ratio = 1\.0", text)
    assert re.search(r"# \d{4}-\d\d-\d\d: track_mm 112(\.0)? -> 115\.\d+: UMBmark", text)

    # The squares again: with the track alone, and with the track and the wheel ratio.
    plan = SquarePlan(600.0, 30.0, 25.0)
    track_only = replace(original, track_mm=written.track_mm)
    e_track = calibrate_odometry(RobotConnector(track_only, "sim", course=course, seed=4), plan, 1).result
    e_both = calibrate_odometry(RobotConnector(written, "sim", course=course, seed=4), plan, 1).result
    # Measured: E_max,syst 161.5 mm as bundled, 86.8 mm with track_mm alone, 4.1 mm with both.
    assert first["umbmark"]["e_max_syst"] > 150.0
    assert e_both.e_max_syst < 0.1 * e_track.e_max_syst
    assert e_both.combined.e_d == pytest.approx(1.0, abs=0.0005)

    # A 90 degree spin turn and a 500 mm straight by the encoders, against the truth.
    before, after = _end_poses(course, track_only), _end_poses(course, written)
    # The spin stays on its spot: measured 0.41 mm off with the track alone, 0.007 mm with both.
    assert math.hypot(*after["turn"][:2]) < 0.2 * math.hypot(*before["turn"][:2])
    # Its heading (about 1.3 deg past 90 from coasting, either way) is no worse.
    assert abs(after["turn"][2] - 90.0) <= abs(before["turn"][2] - 90.0) + 0.05
    # The straight no longer curves: measured 11.2 mm to the left and 2.52 deg clockwise with the
    # track alone, 1.1 mm and 0.15 deg with both (what is left is the hold's whole-degree encoder
    # steps); the end point is nearer (500, 0).
    assert abs(after["drive_straight"][1]) < 0.2 * abs(before["drive_straight"][1])
    assert abs(after["drive_straight"][2]) < 0.2 * abs(before["drive_straight"][2])
    assert (math.hypot(after["drive_straight"][0] - 500.0, after["drive_straight"][1])
            < math.hypot(before["drive_straight"][0] - 500.0, before["drive_straight"][1]))


def test_a_full_speed_turn_keeps_the_wheels_in_ratio() -> None:
    # With unequal wheels each wheel gets power in proportion to its target; at full speed the
    # faster one must not be clamped alone (the wheels would no longer finish together).
    from harness.links import SimLink
    from harness.session import Session
    from harness.sim import Simulation

    sim = Simulation.from_files(seed=1)
    powers: list[tuple[float, float]] = []
    set_power = sim.board.set_power
    sim.board.set_power = lambda left, right: (powers.append((left, right)), set_power(left, right))[1]
    session = Session(SimLink(sim))
    geometry = dict(sim.profile.geometry(), wheel_ratio=1.08)
    session.hello(geometry=geometry)
    record = session.run("turn", {"angle_deg": 90, "mode": "spin", "speed_pct": 100, "slow_deg": 0})
    assert record.status == "done"
    moving = [(lft, rgt) for lft, rgt in powers if lft and rgt]
    assert moving and max(max(abs(lft), abs(rgt)) for lft, rgt in moving) <= 100.0
    ratios = {round(abs(lft / rgt), 6) for lft, rgt in moving}
    # Left turns 2/(E_d+1), right 2/(1/E_d+1) of the mean: the left wheel (smaller) needs more degrees.
    assert ratios == {round(1.08, 6)}
