"""trackproof calibrate distance / turns, and writing the results back into the robot profile.

The fits are checked against outside implementations on synthetic data (scipy.stats.linregress,
numpy.polyfit, numpy.linalg.lstsq, scipy.optimize.curve_fit, scipy.stats.t). End to end, each
calibration must recover the simulator's hidden true parameters (the course's [truth] table,
which the profile does not know), and a robot given the recommended values must do better than
with the nominal ones.
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import math
import re
from pathlib import Path

import numpy as np
import pytest
import tomlkit
from scipy import optimize, stats

from harness import cli
from harness.calibrate.distance import DriveRun, analyse_distance, collect_drives, nominal_deg_per_mm
from harness.calibrate.fit import fit_line, fit_through_origin, fit_with_offset_if_needed
from harness.calibrate.turns import TurnRun, analyse_turns, collect_turns, turn_plan
from harness.calibrate.writeback import updated_profile_text, write_profile_values
from harness.errors import InputError, TrackproofError
from harness.links import SimLink
from harness.profile import RobotProfile, load_profile
from harness.robot import RobotConnector
from harness.sim import DEFAULT_COURSE, DEFAULT_PROFILE, Simulation, truth_report, truth_snapshot
from harness.sim.course import load_course
from harness.store import Store

pytestmark = pytest.mark.usefixtures("results_in_tmp")

PRACTICE_TRUTH = load_course(DEFAULT_COURSE).truth
NOMINAL = load_profile(DEFAULT_PROFILE)


# ------------------------------------------------------------------ what calibration must find
#
# Derivations from the simulator's physics (harness/sim/robot.py) and the hub's kinematics
# (hub_side/motion.py), with D the profile's wheel diameter, T its track, and D_L, D_R, T_true,
# slip the course's [truth]:
#
# distance: the hub turns a millimetre into 360 / (pi D) * distance_scale motor degrees. A wheel of
#   diameter D_w travels pi D_w / 360 mm per motor degree, so the straight-line truth is
#   360 / (pi D_eff) motor degrees per mm with D_eff the mean of D_L and D_R (both wheels turn
#   alike going straight; the harmonic mean, which a perfectly straight path would give, differs
#   by 4e-5 here), and the true distance_scale = D / D_eff.
# spin: the hub turns A degrees as A * T / D * spin_scale motor degrees on each wheel, in opposite
#   directions. The simulator turns the body by (left_mm - right_mm) / T_true * (1 - slip)
#   radians, i.e. e * D_eff / T_true * (1 - slip) degrees for e motor degrees on each wheel.
#   Turning exactly A needs spin_scale = (D / T) * T_true / (D_eff * (1 - slip)).
# pivot: one wheel does all of it, A * 2T / D * pivot_scale motor degrees, turning the body by
#   e * D_w / (2 T_true) * (1 - slip) degrees: pivot_left (about the stopped left wheel) moves
#   the right wheel, so its scale uses D_R; pivot_right uses D_L. With the same angles for both,
#   the pooled slope is the mean of the two slopes, so the pooled scale is the harmonic mean of
#   the two, which is the spin formula again (D_eff = mean of D_L and D_R).

def true_scales(truth: dict[str, float], profile: RobotProfile = NOMINAL) -> dict[str, float]:
    d, t = profile.wheel_diameter_mm, profile.track_mm
    d_l, d_r = truth["wheel_left_diameter_mm"], truth["wheel_right_diameter_mm"]
    t_true, keep = truth["track_mm"], 1.0 - truth["turn_slip"]
    d_eff = (d_l + d_r) / 2.0
    return {
        "distance_scale": d / d_eff,
        "spin_scale": (d / t) * t_true / (d_eff * keep),
        "pivot_scale": (d / t) * t_true / (d_eff * keep),
        "pivot_left": (d / t) * t_true / (d_r * keep),
        "pivot_right": (d / t) * t_true / (d_l * keep),
    }


def test_true_scales_of_the_practice_course() -> None:
    # Hand arithmetic: 56 / 56.05; 0.5 * 114.5 / (56.05 * 0.97); 0.5 * 114.5 / (55.8 * 0.97).
    s = true_scales(PRACTICE_TRUTH)
    assert s["distance_scale"] == pytest.approx(0.999108, abs=1e-6)
    assert s["spin_scale"] == pytest.approx(1.052999, abs=1e-6)
    assert s["pivot_left"] == pytest.approx(1.057717, abs=1e-6)
    assert s["pivot_right"] == pytest.approx(1.048324, abs=1e-6)


@pytest.fixture
def worn_course(tmp_path: Path) -> Path:
    """The practice mat with a robot whose wheels and track are far from the profile's."""
    text = DEFAULT_COURSE.read_text(encoding="utf-8")
    for key, value in (("wheel_left_diameter_mm", 57.4), ("wheel_right_diameter_mm", 57.0),
                       ("track_mm", 118.0), ("turn_slip", 0.05)):
        text, n = re.subn(rf"^{key} = .*$", f"{key} = {value}", text, flags=re.M)
        assert n == 1
    path = tmp_path / "worn_course.toml"
    path.write_text(text, encoding="utf-8")
    return path


# ------------------------------------------------------------------ fits against references

def _synthetic(seed: int, intercept: float, slope: float, n: int = 15, sd: float = 0.8):
    rng = np.random.default_rng(seed)
    x = np.repeat([45.0, 90.0, 135.0, 180.0, 270.0], n // 5)
    return x, intercept + slope * x + rng.normal(0.0, sd, x.size)


def test_fit_line_matches_linregress_and_polyfit() -> None:
    x, y = _synthetic(7, 1.6, 0.95)
    f = fit_line(x, y)
    ref = stats.linregress(x, y)  # reference: scipy.stats.linregress
    assert f.slope == pytest.approx(ref.slope, rel=1e-12)
    assert f.intercept == pytest.approx(ref.intercept, rel=1e-10)
    assert f.slope_se == pytest.approx(ref.stderr, rel=1e-10)
    assert f.intercept_se == pytest.approx(ref.intercept_stderr, rel=1e-10)
    # Reference: numpy.polyfit with cov=True scales the covariance by SSE / (n - 2).
    coef, cov = np.polyfit(x, y, 1, cov=True)
    assert (f.slope, f.intercept) == pytest.approx(tuple(coef), rel=1e-10)
    assert (f.slope_se, f.intercept_se) == pytest.approx(tuple(np.sqrt(np.diag(cov))), rel=1e-9)
    # Intervals: scipy.stats.t.interval around the estimates, n - 2 degrees of freedom.
    assert f.slope_ci == pytest.approx(stats.t.interval(0.95, x.size - 2, loc=ref.slope, scale=ref.stderr))
    assert f.intercept_ci == pytest.approx(
        stats.t.interval(0.95, x.size - 2, loc=ref.intercept, scale=ref.intercept_stderr))
    assert f.intercept_p == pytest.approx(2 * stats.t.sf(abs(ref.intercept / ref.intercept_stderr), x.size - 2))
    assert np.allclose(f.residuals, y - (ref.intercept + ref.slope * x))


def test_fit_through_origin_matches_lstsq_and_curve_fit() -> None:
    x, y = _synthetic(11, 0.0, 2.04, sd=1.5)
    f = fit_through_origin(x, y)
    # Reference: numpy.linalg.lstsq on the single column x.
    slope = np.linalg.lstsq(x.reshape(-1, 1), y, rcond=None)[0][0]
    assert f.slope == pytest.approx(slope, rel=1e-12)
    # Reference: scipy.optimize.curve_fit, whose covariance is scaled by SSE / (n - 1).
    popt, pcov = optimize.curve_fit(lambda xx, b: b * xx, x, y, p0=[1.0])
    assert f.slope == pytest.approx(popt[0], rel=1e-8)
    assert f.slope_se == pytest.approx(math.sqrt(pcov[0, 0]), rel=1e-6)
    assert f.dof == x.size - 1 and f.through_origin
    assert f.slope_ci == pytest.approx(stats.t.interval(0.95, x.size - 1, loc=f.slope, scale=f.slope_se))


def test_offset_is_kept_only_when_significant() -> None:
    x, y = _synthetic(3, 1.5, 0.95, sd=0.3)
    chosen, with_intercept = fit_with_offset_if_needed(x, y)
    assert with_intercept.intercept_p < 1e-3 and chosen is with_intercept
    assert chosen.intercept == pytest.approx(1.5, abs=0.3)
    x, y = _synthetic(5, 0.0, 0.95, sd=0.3)
    chosen, with_intercept = fit_with_offset_if_needed(x, y)
    assert with_intercept.intercept_p > 0.05  # this seed's data have no offset to find
    assert chosen.through_origin and chosen.intercept == 0.0


def test_fits_refuse_what_cannot_be_fitted() -> None:
    with pytest.raises(ValueError, match="at least 3"):
        fit_line([1.0, 2.0], [1.0, 2.0])
    with pytest.raises(ValueError, match="two different x"):
        fit_line([90.0, 90.0, 90.0], [88.0, 89.0, 90.0])
    with pytest.raises(ValueError, match="finite"):
        fit_through_origin([1.0, float("nan")], [1.0, 2.0])


# ------------------------------------------------------------------ write-back

def test_writeback_keeps_comments_and_order(tmp_path: Path) -> None:
    path = tmp_path / "robot.toml"
    original = DEFAULT_PROFILE.read_text(encoding="utf-8")
    path.write_text(original, encoding="utf-8")
    text = write_profile_values(path, {"spin_scale": 1.0532, "pivot_scale": 1.05227},
                                "calibrate turns,\n36 turns", today=dt.date(2025, 3, 14))
    assert path.read_text(encoding="utf-8") == text
    new_lines = text.splitlines()
    notes = [line for line in new_lines if line.startswith("# 2025-03-14")]
    assert notes == ["# 2025-03-14: spin_scale 1.0 -> 1.0532: calibrate turns, 36 turns",
                     "# 2025-03-14: pivot_scale 1.0 -> 1.05227: calibrate turns, 36 turns"]
    # Apart from the two notes and the two values, the file is line for line what it was.
    kept = [line for line in new_lines if line not in notes]
    old_lines = original.splitlines()
    changed = [(a, b) for a, b in zip(old_lines, kept) if a != b]
    assert changed == [("spin_scale = 1.0", "spin_scale = 1.0532"), ("pivot_scale = 1.0", "pivot_scale = 1.05227")]
    assert len(kept) == len(old_lines)
    # Each note sits right above the value it describes, and the key order is unchanged.
    assert new_lines[new_lines.index("spin_scale = 1.0532") - 1] == notes[0]
    assert list(tomlkit.parse(text)) == list(tomlkit.parse(original))
    profile = load_profile(path)
    assert (profile.spin_scale, profile.pivot_scale, profile.distance_scale) == (1.0532, 1.05227, 1.0)
    assert profile.sensors == NOMINAL.sensors and profile.follow == NOMINAL.follow


def test_writeback_adds_a_missing_key_among_the_top_level_ones(tmp_path: Path) -> None:
    path = tmp_path / "robot.toml"
    original = DEFAULT_PROFILE.read_text(encoding="utf-8").replace("pivot_scale = 1.0\n", "")
    path.write_bytes(original.replace("\n", "\r\n").encode())
    write_profile_values(path, {"pivot_scale": 1.048}, "why", today=dt.date(2025, 1, 2))
    raw = path.read_bytes()
    assert b"\r\n" in raw and b"\n" not in raw.replace(b"\r\n", b"")  # line endings kept
    text = raw.decode().replace("\r\n", "\n")
    assert "# 2025-01-02: pivot_scale added, 1.048: why\npivot_scale = 1.048\n" in text
    assert text.index("pivot_scale = 1.048") < text.index("[sensors.left]")
    assert load_profile(path).pivot_scale == 1.048


def test_writeback_refuses_bad_values_and_leaves_the_file(tmp_path: Path) -> None:
    path = tmp_path / "robot.toml"
    path.write_text(DEFAULT_PROFILE.read_text(encoding="utf-8"), encoding="utf-8")
    before = path.read_bytes()
    with pytest.raises(InputError, match="spin_scale: must be at most 2.0"):
        write_profile_values(path, {"spin_scale": 3.0}, "too big")
    with pytest.raises(InputError, match="not a number"):
        write_profile_values(path, {"id": 2.0}, "not a number key")
    with pytest.raises(InputError, match="finite number"):
        write_profile_values(path, {"spin_scale": float("nan")}, "nan")
    assert path.read_bytes() == before
    with pytest.raises(InputError, match="file not found"):
        write_profile_values(tmp_path / "missing.toml", {"spin_scale": 1.0}, "x")
    with pytest.raises(InputError, match="nothing to write"):
        updated_profile_text(before.decode(), {}, "x")


# ------------------------------------------------------------------ distance, end to end

def _connector(course: Path = DEFAULT_COURSE, profile: RobotProfile = NOMINAL, seed: int = 0) -> RobotConnector:
    return RobotConnector(profile, "sim", course=course, seed=seed)


def _calibrate_distance(course: Path, seed: int, repeat: int = 1, **kw):
    connector = _connector(course, seed=seed)
    session = connector.connect()
    plan = [(s, d) for _ in range(repeat) for s in (20.0, 40.0, 60.0) for d in (200.0, 400.0, 600.0)]
    runs = collect_drives(connector, session, plan, action="follow_line", measure=kw.pop("measure", "truth"),
                          ask=input, **kw)
    session.close()
    return runs


def _drive_errors(course: Path, profile: RobotProfile, distance_mm: float, speed_pct: float, n: int = 4):
    """Truth minus commanded for n drives, and the hub's own distance minus truth."""
    connector = _connector(course, profile, seed=99)
    session = connector.connect()
    sim = connector.sim
    landing, measuring = [], []
    for _ in range(n):
        sim.reset()
        before = truth_snapshot(sim)
        record = session.run("follow_line", profile.action_defaults(
            "follow_line", {"distance_mm": distance_mm, "speed_pct": speed_pct}), telemetry_hz=0)
        truth = truth_report(before, truth_snapshot(sim))
        landing.append(truth["travel_mm"] - distance_mm)
        measuring.append(record.result["distance_mm"] - truth["travel_mm"])
    session.close()
    return np.array(landing), np.array(measuring)


def test_distance_recovers_the_practice_robot_and_overrun_grows_with_speed() -> None:
    runs = _calibrate_distance(DEFAULT_COURSE, seed=1)
    cal = analyse_distance(runs, wheel_diameter_mm=56.0, profile_scale=1.0)
    want = true_scales(PRACTICE_TRUTH)["distance_scale"]
    # Tolerance 3e-4: a third of the practice robot's whole error (1 - 0.99911), so "no
    # correction" cannot pass; the fit's own 95 % interval is about +-1.5e-4 with 9 runs.
    assert cal.factor == pytest.approx(want, abs=3e-4)
    assert cal.factor_ci[0] <= want <= cal.factor_ci[1]
    assert cal.fit.slope == pytest.approx(want * nominal_deg_per_mm(56.0), rel=3e-4)
    # The simulator coasts speed x brake lag after power off, so the overrun grows about linearly
    # with speed: at 60 % it is about three times what it is at 20 %.
    overruns = [b.overrun.mean for b in cal.bands]
    assert overruns[0] < overruns[1] < overruns[2]
    assert 2.0 < overruns[2] / overruns[0] < 4.0
    assert cal.overrun_fit is not None and cal.overrun_fit.slope_ci[0] > 0
    assert [(b.low_pct, b.high_pct) for b in cal.bands] == [(0, 30), (30, 50), (50, 100)]
    assert cal.band_for(45.0).speed_pct == 40.0 and cal.band_for(100.0).speed_pct == 60.0


def test_distance_on_worn_wheels_and_the_robot_then_lands_better(worn_course: Path) -> None:
    runs = _calibrate_distance(worn_course, seed=2)
    cal = analyse_distance(runs, wheel_diameter_mm=56.0, profile_scale=1.0, for_mm=500.0)
    want = true_scales(load_course(worn_course).truth)["distance_scale"]  # 56 / 57.2 = 0.97902
    assert cal.factor == pytest.approx(want, abs=5e-4)
    # A 500 mm drive at 40 %: with the fitted factor the hub measures distance right, and with the
    # 40 % band's factor it also lands where it was asked to.
    band = cal.band_for(40.0)
    nominal_land, nominal_measure = _drive_errors(worn_course, NOMINAL, 500.0, 40.0)
    fitted_land, fitted_measure = _drive_errors(
        worn_course, dataclasses.replace(NOMINAL, distance_scale=round(cal.factor, 5)), 500.0, 40.0)
    band_land, _ = _drive_errors(
        worn_course, dataclasses.replace(NOMINAL, distance_scale=round(band.band_factor, 5)), 500.0, 40.0)
    assert np.mean(np.abs(nominal_measure)) > 8.0 and np.mean(np.abs(fitted_measure)) < 0.6
    assert np.mean(np.abs(nominal_land)) > 14.0  # 2 % long plus the coast
    assert np.mean(np.abs(fitted_land)) < np.mean(np.abs(nominal_land)) / 2
    assert np.mean(np.abs(band_land)) < 1.0


def test_distance_by_probing_a_line_ahead(worn_course: Path) -> None:
    # outer_left sits 70 mm ahead and 40 mm left of the axle: at the start (x = 350) it is at
    # x = 420, and north_spur_a's near edge is at 700 - 19 / 2 = 690.5, so 270.5 mm ahead.
    # On worn wheels (true factor 0.979, 2 % from the profile's 1.0) so that returning the
    # profile's value unchanged would fail.
    connector = _connector(worn_course, seed=3)
    session = connector.connect()
    plan = [(s, d) for s in (20.0, 40.0) for d in (100.0, 150.0, 200.0) for _ in range(2)]
    runs = collect_drives(connector, session, plan, action="follow_line", measure="probe", ask=input,
                          line_mm=270.5, probe_sensor="outer_left")
    session.close()
    assert all(r.usable and r.edge_mm is not None for r in runs)
    cal = analyse_distance(runs, wheel_diameter_mm=56.0, profile_scale=1.0, line_mm=270.5)
    want = true_scales(load_course(worn_course).truth)["distance_scale"]
    # Every run ends at the same line, so the fit rests on one reference: the sensor sees the
    # edge a millimetre or two early (its footprint crosses the threshold first), a systematic
    # 0.6 % here. Probing is the rough method, and the help says so.
    assert cal.factor == pytest.approx(want, abs=8e-3) and abs(cal.factor - 1.0) > 0.01
    with pytest.raises(InputError, match="--line-mm"):
        analyse_distance(runs, wheel_diameter_mm=56.0, profile_scale=1.0)


def test_outputs_are_checked_before_the_robot_moves(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from harness.cli import main

    assert main(["calibrate", "turns", "--json", str(tmp_path / "no-such-folder" / "x.json")]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert main(["calibrate", "turns", "--robot", str(tmp_path / "missing.toml"), "--write"]) == 2


def test_a_closed_input_at_a_prompt_is_a_clean_stop(monkeypatch: pytest.MonkeyPatch,
                                                     capsys: pytest.CaptureFixture[str]) -> None:
    import io

    from harness.cli import main

    monkeypatch.setattr("sys.stdin", io.StringIO(""))
    assert main(["calibrate", "distance", "--measure", "ruler", "--repeat", "1"]) == 130
    err = capsys.readouterr().err
    assert "no one answered the prompt" in err and "Traceback" not in err


def test_distance_too_few_usable_runs_is_an_error() -> None:
    runs = [DriveRun(40.0, 200.0, 410.0, 201.0, 200.5), DriveRun(40.0, 400.0, note="skipped by the operator")]
    with pytest.raises(TrackproofError, match="only 1 usable run"):
        analyse_distance(runs, wheel_diameter_mm=56.0, profile_scale=1.0)


# ------------------------------------------------------------------ turns, end to end

def _turn_errors(profile: RobotProfile, command_deg: float, want_deg: float = 90.0, n: int = 3) -> np.ndarray:
    """True heading change minus the wanted angle, for spin turns commanded both ways."""
    connector = _connector(profile=profile, seed=5)
    session = connector.connect()
    errors = []
    for sign in [1, -1] * n:
        before = truth_snapshot(connector.sim)
        session.run("turn", {"angle_deg": sign * command_deg, "mode": "spin"}, telemetry_hz=0)
        errors.append(sign * truth_report(before, truth_snapshot(connector.sim))["heading_change_deg"] - want_deg)
    session.close()
    return np.array(errors)


def test_turns_recover_the_practice_robot_and_it_then_turns_better() -> None:
    connector = _connector(seed=4)
    session = connector.connect()
    # Two turns per angle and direction: with fewer, the coast offset (about 0.5 deg on a pivot)
    # is often not significant, the line is forced through 0, and the scale is 0.6 % off.
    runs = collect_turns(connector, session, turn_plan(["spin", "pivot_left", "pivot_right"],
                                                       [45.0, 90.0, 180.0], 2), speed_pct=40.0)
    session.close()
    assert all(r.usable for r in runs)
    cal = analyse_turns(runs, 1.0, 1.0)
    want = true_scales(PRACTICE_TRUTH)
    # Tolerance 0.5 %: the coast at the end of a turn is nearly, not exactly, the same at every
    # angle, so the line is not perfect; the practice robot is 5 % off, so 0.5 % is a real test.
    assert cal.scales["spin"].scale == pytest.approx(want["spin_scale"], rel=5e-3)
    assert cal.scales["pivot"].scale == pytest.approx(want["pivot_scale"], rel=5e-3)
    for mode in ("pivot_left", "pivot_right"):
        assert cal.per_mode[mode].scale == pytest.approx(want[mode], rel=5e-3)
    # The two pivots differ by 0.9 % (55.8 against 56.3 mm wheels), and the fit sees it.
    assert cal.per_mode["pivot_left"].scale > cal.per_mode["pivot_right"].scale
    # Spin turns coast on after the motors stop: a fixed, significant, positive offset.
    spin = cal.scales["spin"]
    assert spin.offset_significant and spin.parts[0].with_intercept.intercept_p < 0.01
    assert 0.5 < spin.offset_deg < 3.0
    # Gyro and truth agree to the gyro's noise and drift.
    assert max(abs(r.gyro_deg - r.truth_deg) for r in runs) < 0.5
    rows = cal.residual_rows()
    assert len(rows) == 3 * 3 * 2 and all(r["n"] == 2 for r in rows)
    assert max(abs(r["residual_deg"]) for r in rows) < 1.0

    # A 90 degree spin: nominal profile, then the recommended spin_scale, then with the offset too.
    nominal = _turn_errors(NOMINAL, 90.0)
    better = dataclasses.replace(NOMINAL, spin_scale=round(spin.scale, 5))
    scaled = _turn_errors(better, 90.0)
    assert np.mean(np.abs(nominal)) > 2.0
    assert np.mean(np.abs(scaled)) < np.mean(np.abs(nominal))
    # With the recommended offset in the profile too, the hub aims short and a 90 lands on 90.
    assert spin.writes_offset and spin.recommended_offset_deg == spin.offset_deg  # the profile had none
    both = dataclasses.replace(better, spin_offset_deg=round(spin.recommended_offset_deg, 2))
    assert np.mean(np.abs(_turn_errors(both, 90.0))) < 0.6


def test_turns_on_worn_wheels(worn_course: Path) -> None:
    connector = _connector(worn_course, seed=6)
    session = connector.connect()
    runs = collect_turns(connector, session, turn_plan(["spin", "pivot_left", "pivot_right"],
                                                       [45.0, 90.0, 180.0], 2), speed_pct=40.0)
    session.close()
    cal = analyse_turns(runs, 1.0, 1.0)
    want = true_scales(load_course(worn_course).truth)  # spin: 0.5 * 118 / (57.2 * 0.95) = 1.0858
    assert cal.scales["spin"].scale == pytest.approx(want["spin_scale"], rel=5e-3)
    assert cal.scales["pivot"].scale == pytest.approx(want["pivot_scale"], rel=5e-3)


def test_recommended_offset_allows_for_the_offset_the_hub_already_applied() -> None:
    # A robot that coasts 2.0 deg and turns 0.95 of what it is asked, calibrated while its
    # profile already aims 1.5 deg short: each turn is aimed at A - 1.5, so it measures
    # 2.0 + 0.95 * (A - 1.5). The fit sees intercept 2.0 - 0.95 * 1.5 = 0.575 and slope 0.95; the
    # coast to put in the profile is 0.575 + 0.95 * 1.5 = 2.0 again (common practice: the
    # algebra of the fitted line, no published source).
    jitter = [0.02, -0.03, 0.01, -0.01, 0.03, -0.02]
    runs = [TurnRun("spin", sign * angle, gyro_deg=sign * (2.0 + 0.95 * (angle - 1.5) + jitter[k % 6]))
            for k, (angle, sign) in enumerate((a, s) for a in (45.0, 90.0, 180.0) for s in (1, -1, 1, -1))]
    spin = analyse_turns(runs, 1.0, 1.0, spin_offset_deg=1.5).scales["spin"]
    assert spin.offset_significant and spin.offset_deg == pytest.approx(0.575, abs=0.05)
    assert spin.slope == pytest.approx(0.95, abs=1e-3)
    assert spin.recommended_offset_deg == pytest.approx(2.0, abs=0.05)
    assert spin.as_dict()["recommended_offset_deg"] == spin.recommended_offset_deg
    # A profile offset that is right leaves no intercept to find, and is kept (times the slope).
    runs = [TurnRun("spin", sign * angle, gyro_deg=sign * (angle + jitter[k % 6]))
            for k, (angle, sign) in enumerate((a, s) for a in (45.0, 90.0, 180.0) for s in (1, -1))]
    spin = analyse_turns(runs, 1.0, 1.0, spin_offset_deg=1.5).scales["spin"]
    assert not spin.offset_significant and spin.writes_offset
    assert spin.recommended_offset_deg == pytest.approx(1.5 * spin.slope)
    assert not analyse_turns(runs, 1.0, 1.0).scales["spin"].writes_offset


def test_turn_fit_needs_two_angles() -> None:
    runs = [TurnRun("spin", a, gyro_deg=a * 0.95) for a in (90.0, -90.0, 90.0)]
    with pytest.raises(TrackproofError, match="at least 2 different angles"):
        analyse_turns(runs, 1.0, 1.0)


# ------------------------------------------------------------------ the command line

def trackproof(argv: list[str]) -> int:
    return cli.main(argv)


@pytest.fixture
def robot_file(tmp_path: Path) -> Path:
    path = tmp_path / "robot.toml"
    path.write_text(DEFAULT_PROFILE.read_text(encoding="utf-8"), encoding="utf-8")
    return path


def test_cli_distance_writes_the_profile(monkeypatch, capsys, robot_file: Path, tmp_path: Path) -> None:
    import json

    out = tmp_path / "d.json"
    code = trackproof(["calibrate", "distance", "--robot", str(robot_file), "--repeat", "1", "--write",
                       "--json", str(out)])
    assert code == 0
    text = capsys.readouterr().out
    assert "distance_scale = 0.999" in text and "overrun_mm = " in text
    report = json.loads(out.read_text())
    written = report["written"]["distance_scale"]
    assert written == pytest.approx(true_scales(PRACTICE_TRUTH)["distance_scale"], abs=3e-4)
    assert load_profile(robot_file).distance_scale == written
    assert f"distance_scale 1.0 -> {written}: trackproof calibrate distance, 9 runs" in robot_file.read_text()


def test_cli_turns_writes_both_scales_and_the_coast(monkeypatch, capsys, robot_file: Path) -> None:
    code = trackproof(["calibrate", "turns", "--robot", str(robot_file), "--write"])
    assert code == 0
    out = capsys.readouterr().out
    assert "spin_scale = 1.05" in out and "spin_offset_deg = +1." in out
    profile = load_profile(robot_file)
    assert profile.spin_scale == pytest.approx(1.053, rel=5e-3)
    assert profile.pivot_scale == pytest.approx(1.053, rel=5e-3)
    assert profile.distance_scale == 1.0
    # The spin's coast (about 1.9 deg in the simulator) goes in too, with the speed in the note.
    assert 1.0 < profile.spin_offset_deg < 3.0
    assert "spin_offset_deg added, " in robot_file.read_text() and "at 40 %" in robot_file.read_text()
    # Calibrating again with those values: the scale and the coast stay put (the hub now aims
    # short by the coast, and the fit allows for it).
    first = profile
    assert trackproof(["calibrate", "turns", "--robot", str(robot_file), "--write", "--seed", "9"]) == 0
    again = load_profile(robot_file)
    assert again.spin_scale == pytest.approx(first.spin_scale, rel=3e-3)
    assert again.spin_offset_deg == pytest.approx(first.spin_offset_deg, abs=0.5)


def test_cli_turns_leaves_out_an_offset_the_hub_would_refuse(monkeypatch, capsys, robot_file: Path) -> None:
    # A hub from before the turn offsets reports no such keys in its hello: writing one would
    # make that same hub refuse the next hello, so only the scales are written.
    from harness.session import Session

    hello = Session.hello

    def older_hub(self, *args, **kwargs):
        hub = hello(self, *args, **kwargs)
        for key in ("spin_offset_deg", "pivot_offset_deg"):
            hub.geometry.pop(key, None)
        return hub

    monkeypatch.setattr(Session, "hello", older_hub)
    assert trackproof(["calibrate", "turns", "--robot", str(robot_file), "--modes", "spin", "--write"]) == 0
    out = capsys.readouterr().out
    assert "not written: spin_offset_deg = +1." in out and "update it (trackproof hub install) first" in out
    profile = load_profile(robot_file)
    assert profile.spin_scale == pytest.approx(1.053, rel=5e-3) and profile.spin_offset_deg == 0.0
    assert "spin_offset_deg" not in robot_file.read_text()


def test_offsets_outside_the_limits_are_not_written() -> None:
    from harness.calibrate.turns import offset_not_writable

    known = {"spin_offset_deg": 0.0, "pivot_offset_deg": 0.0}
    assert offset_not_writable("spin_offset_deg", 29.99, known) == ""
    assert "outside -30 to 30 deg" in offset_not_writable("spin_offset_deg", 30.01, known)
    assert "outside -30 to 30 deg" in offset_not_writable("pivot_offset_deg", -31.0, known)
    assert "does not know the key" in offset_not_writable("pivot_offset_deg", 1.0, {"spin_offset_deg": 0.0})


def test_cli_turns_refuses_angles_within_the_profile_offset(capsys, robot_file: Path) -> None:
    text = robot_file.read_text().replace("spin_scale = 1.0", "spin_scale = 1.0\nspin_offset_deg = 20.0", 1)
    robot_file.write_text(text)
    assert trackproof(["calibrate", "turns", "--robot", str(robot_file), "--angles", "15,90"]) == 2
    assert "15 deg is within the profile's spin_offset_deg of 20 deg" in capsys.readouterr().err
    # Pivots have their own offset (0 here): the same angles are fine for them alone.
    assert trackproof(["calibrate", "turns", "--robot", str(robot_file), "--angles", "15,90",
                       "--modes", "pivot_left", "--repeat", "1"]) == 0


def test_cli_input_errors(monkeypatch, capsys, robot_file: Path) -> None:
    # --write without --robot: refused before anything moves; the bundled profile is never written.
    assert trackproof(["calibrate", "distance", "--write"]) == 2
    assert "needs --robot PATH" in capsys.readouterr().err
    assert trackproof(["calibrate", "distance", "--link", "serial:/dev/null-hub", "--measure", "truth"]) == 2
    assert "only the simulator knows the truth" in capsys.readouterr().err
    assert trackproof(["calibrate", "turns", "--angles", "90"]) == 2
    assert "two different angles" in capsys.readouterr().err
    assert trackproof(["calibrate", "distance", "--measure", "probe"]) == 2
    assert "--line-mm and --probe-sensor" in capsys.readouterr().err
    # Bad options: argparse's own usage error, exit 2.
    for argv in (["calibrate", "distance", "--speeds", "20,fast"], ["calibrate", "distance", "--speeds", "150"],
                 ["calibrate", "turns", "--modes", "spin,wiggle"], ["calibrate", "turns", "--repeat", "0"],
                 ["calibrate", "distance", "--no-such-option"]):
        with pytest.raises(SystemExit) as exc:
            trackproof(argv)
        assert exc.value.code == 2, argv
    err = capsys.readouterr().err
    assert "'fast'" in err and "wiggle" in err and "150 is outside 0..100" in err


def test_cli_link_failure_is_exit_3(monkeypatch, capsys) -> None:
    assert trackproof(["calibrate", "turns", "--link", "serial:/dev/no-such-hub-port"]) == 3
    assert "/dev/no-such-hub-port" in capsys.readouterr().err


def test_real_robot_flow_with_ruler_readings(monkeypatch, capsys, robot_file: Path) -> None:
    """A 'serial' robot (the simulated hub behind the link, not saying it is simulated): the
    operator confirms, puts the robot back on the start mark, and types ruler readings."""
    sim = Simulation(load_course(DEFAULT_COURSE), NOMINAL, seed=8)
    sim.board.capabilities = {"gyro": True, "battery": True}  # looks like real hardware
    prompts: list[str] = []
    start = [0.0]

    def ask(prompt: str) -> str:
        prompts.append(prompt)
        if prompt.endswith("Type yes to start: "):
            return "yes"
        if "start mark" in prompt:
            sim.reset()
            start[0] = sim.robot.travel_mm
            return ""
        # A ruler read to the nearest half millimetre.
        return f"{round((sim.robot.travel_mm - start[0]) * 2) / 2:.1f}"

    from harness.calibrate import distance

    db = robot_file.parent / "moves.sqlite"
    args = argparse.Namespace(robot=robot_file, course=None, link="serial:/dev/fake-hub", seed=0, repeat=1,
                              write=True, json=None, speeds=[30.0, 50.0], distances=[250.0, 500.0],
                              action="follow_line", measure=None, line_mm=None, probe_sensor=None,
                              for_mm=500.0, band=None, db=db)
    code = distance.cmd_distance(args, ask=ask, open_link=lambda spec, profile: SimLink(sim))
    assert code == 0
    assert "Safety" in prompts[0] and sum("start mark" in p for p in prompts) == 4
    assert sum("by the ruler" in p for p in prompts) == 4
    out = capsys.readouterr().out
    assert "travelled distance by ruler" in out
    # Half-millimetre readings over 250 to 500 mm: within 1e-3 of the truth.
    assert load_profile(robot_file).distance_scale == pytest.approx(
        true_scales(PRACTICE_TRUTH)["distance_scale"], abs=1e-3)
    # Every drive is kept in the results store, under the real link's name.
    with Store(db, readonly=True) as store:
        session = store.sessions().iloc[0]
        runs = store.runs(session["uid"])
    assert (session["suite_name"], session["link"], session["status"]) == (
        "calibrate distance", "serial:/dev/fake-hub", "finished")
    assert sorted(runs["case_name"]) == sorted(f"follow_line {d:g} mm at {s:g} %" for s in (30, 50) for d in (250, 500))
    assert set(runs["status"]) == {"pass"}


def test_real_robot_operator_can_refuse_to_start(monkeypatch, robot_file: Path) -> None:
    sim = Simulation(load_course(DEFAULT_COURSE), NOMINAL, seed=8)
    sim.board.capabilities = {"gyro": True, "battery": True}
    before = sim.robot.travel_mm
    from harness.calibrate import turns
    from harness.operator import OperatorStopped

    db = robot_file.parent / "moves.sqlite"
    args = argparse.Namespace(robot=robot_file, course=None, link="serial:/dev/fake-hub", seed=0, repeat=1,
                              write=True, json=None, angles=[90.0, 180.0], modes=["spin"], speed_pct=40.0, db=db)
    with pytest.raises(OperatorStopped) as exc:
        turns.cmd_turns(args, ask=lambda prompt: "no", open_link=lambda spec, profile: SimLink(sim))
    assert exc.value.exit_code == 130
    assert sim.robot.travel_mm == before and robot_file.read_text() == DEFAULT_PROFILE.read_text()
    with Store(db, readonly=True) as store:  # nothing moved, so no session either
        assert store.sessions().empty


def test_a_reset_routine_the_hub_lacks_is_refused_before_anything_moves() -> None:
    sim = Simulation(load_course(DEFAULT_COURSE), NOMINAL, seed=4)
    before = sim.robot.travel_mm
    connector = RobotConnector(NOMINAL, "serial:/dev/robot", reset_routine="drive_home",
                               open_link=lambda spec, profile: SimLink(sim))
    with pytest.raises(InputError, match="has no routine 'drive_home'") as exc:
        connector.connect()
    assert exc.value.key == "--reset" and sim.robot.travel_mm == before


@pytest.mark.parametrize("command", [["calibrate", "distance"], ["calibrate", "turns"], ["tune"]])
def test_a_reset_routine_is_checked_on_the_simulator_too(capsys, command: list[str]) -> None:
    assert trackproof([*command, "--reset", "nosuch"]) == 2
    assert "--reset: hub kestrel-7 has no routine 'nosuch' (it has: none)" in capsys.readouterr().err


def test_a_hub_that_resets_itself_needs_no_operator() -> None:
    # Over a real link to a simulated hub (as `trackproof sim serve` offers), its sim_reset routine
    # puts the robot back between runs: the operator is never asked to.
    from harness.sim.realtime import add_sim_routines

    sim = Simulation(load_course(DEFAULT_COURSE), NOMINAL, seed=4)
    add_sim_routines(sim)
    resets: list[int] = []
    reset = sim.reset
    sim.reset = lambda: (resets.append(1), reset())[1]
    connector = RobotConnector(NOMINAL, "serial:/dev/robot", open_link=lambda spec, profile: SimLink(sim))
    session = connector.connect()
    asked: list[str] = []
    runs = collect_drives(connector, session, [(40.0, 150.0), (40.0, 200.0)], action="follow_line",
                          measure="probe", ask=lambda prompt: asked.append(prompt) or "",
                          line_mm=270.5, probe_sensor="outer_left")
    assert asked == [] and len(resets) == 2 and all(r.usable for r in runs)
    # A reset routine the hub does not have is named in a clear error.
    connector.reset_routine = "drive_home"
    with pytest.raises(InputError, match="no routine 'drive_home'"):
        collect_drives(connector, session, [(40.0, 200.0)], action="follow_line", measure="probe",
                       ask=lambda prompt: "", line_mm=270.5, probe_sensor="outer_left")
