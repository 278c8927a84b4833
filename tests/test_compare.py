"""`trackproof compare`: Welch and Brown-Forsythe against scipy and published check values, the
runs-needed estimate against Cohen's table and a Monte Carlo of scipy's tests, the verdict rules,
and the rebuild check end to end on the simulator."""

from __future__ import annotations

import json
import math
import shutil
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from scipy import stats

import harness.cli as cli
from harness.analysis.compare import (
    brown_forsythe,
    case_verdict,
    compare_metric,
    deciding_metrics,
    holm_adjust,
    is_error_like,
    judge_family,
    judge_metric,
    mean_difference_ci,
    mean_goal,
    metric_tests,
    runs_needed,
    welch_from_stats,
    welch_power,
    welch_test,
)
from harness.runner import Runner
from harness.store import Store
from harness.suites import load_suite

SUITES = Path(__file__).resolve().parents[1] / "suites"

# ------------------------------------------------------------------ Welch's t-test

samples = st.lists(st.floats(min_value=-1e3, max_value=1e3, allow_nan=False), min_size=2, max_size=40)


def _spread(x: list[float]) -> float:
    return float(np.std(x)) / max(1.0, float(np.max(np.abs(x))))


@settings(max_examples=150, deadline=None)
@given(samples, samples)
def test_welch_matches_scipy(a, b):
    assume(_spread(a) > 1e-6 and _spread(b) > 1e-6)  # scipy warns and loses digits on near-constant data
    ours = welch_test(a, b)
    ref = stats.ttest_ind(a, b, equal_var=False)  # reference: Welch's test in scipy
    assert ours.t == pytest.approx(float(ref.statistic), rel=1e-9, abs=1e-9)
    assert ours.df == pytest.approx(float(ref.df), rel=1e-9)
    assert ours.p == pytest.approx(float(ref.pvalue), rel=1e-7, abs=1e-12)
    low, high = mean_difference_ci(ours)
    ci = ref.confidence_interval(0.95)
    assert low == pytest.approx(float(ci.low), rel=1e-7, abs=1e-9)
    assert high == pytest.approx(float(ci.high), rel=1e-7, abs=1e-9)


def test_welch_check_values_from_references_section_8():
    # REFERENCES.md section 8, small example [C]: t = 3.028045, nu = 7.090420, p = 0.018873.
    w = welch_test([102, 98, 110, 105, 99], [95, 92, 99, 91, 97])
    assert w.t == pytest.approx(3.028045, abs=1e-6)
    assert w.df == pytest.approx(7.090420, abs=1e-6)
    assert w.p == pytest.approx(0.018873, abs=1e-6)
    # NIST/SEMATECH e-Handbook section 1.3.5.3 (AUTO83B summary statistics, as quoted in
    # REFERENCES.md section 8): Welch T = -12.94627, nu = 136.875.
    w = welch_from_stats(20.14458, 6.41470, 249, 30.48101, 6.10771, 79)
    assert w.t == pytest.approx(-12.94627, abs=1e-5)
    assert w.df == pytest.approx(136.875, abs=1e-3)
    # REFERENCES.md section 8, the two robots' stop errors: Welch t = -0.245310, nu = 23.1208,
    # p = 0.8084 (the means do not differ; the spreads do, see below).
    w = welch_test(ROBOT_1, ROBOT_2)
    assert w.t == pytest.approx(-0.245310, abs=1e-6)
    assert w.df == pytest.approx(23.1208, abs=1e-4)
    assert w.p == pytest.approx(0.8084, abs=1e-4)


def test_welch_on_constant_samples_follows_its_convention():
    same = welch_test([3.0, 3.0, 3.0], [3.0, 3.0])
    assert (same.t, same.p, same.diff) == (0.0, 1.0, 0.0)
    apart = welch_test([3.0, 3.0], [2.0, 2.0, 2.0])
    assert apart.t == math.inf and apart.p == 0.0 and mean_difference_ci(apart) == (1.0, 1.0)
    with pytest.raises(ValueError, match="at least 2"):
        welch_test([1.0], [1.0, 2.0])
    with pytest.raises(ValueError, match="NaN"):
        welch_test([1.0, float("nan")], [1.0, 2.0])


# ------------------------------------------------------------------ Brown-Forsythe

# REFERENCES.md section 8, worked example: two robots' 20-run stop errors (mm).
ROBOT_1 = [0.5, -0.3, 0.8, 0.1, -0.6, 0.4, 0.2, -0.1, 0.7, -0.4, 0.3, 0.0, -0.2, 0.6, 0.1, -0.5, 0.4, 0.2, -0.3, 0.1]
ROBOT_2 = [1.5, -1.2, 2.1, 0.3, -1.8, 1.1, 0.6, -0.9, 1.9, -1.4, 0.8, -0.2, -0.7, 1.6, 0.4, -1.5, 1.2, 0.5, -1.1, 0.2]


def test_brown_forsythe_check_values_from_references_section_8():
    # REFERENCES.md section 8 [C]: W = 18.414588, p = 1.1792e-4, F(1, 38).
    bf = brown_forsythe(ROBOT_1, ROBOT_2)
    assert bf.w == pytest.approx(18.414588, abs=1e-6)
    assert bf.p == pytest.approx(1.1792e-4, rel=1e-4)
    assert (bf.df1, bf.df2) == (1, 38)


def _within_scatter(groups: list[list[float]]) -> float:
    z = [np.abs(np.asarray(g) - np.median(g)) for g in groups]
    return sum(float(np.sum((g - g.mean()) ** 2)) for g in z) / max(1.0, max(float(np.max(np.abs(g))) for g in groups)) ** 2


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(st.lists(samples, min_size=2, max_size=4))
def test_brown_forsythe_matches_scipy_levene_with_median(groups):
    assume(_within_scatter(groups) > 1e-9)  # no scatter within groups: W is undefined (scipy: inf/nan)
    ours = brown_forsythe(*groups)
    ref = stats.levene(*groups, center="median")  # reference: Levene's test with the median in scipy
    assert ours.w == pytest.approx(float(ref.statistic), rel=1e-8, abs=1e-9)
    assert ours.p == pytest.approx(float(ref.pvalue), rel=1e-7, abs=1e-9)
    assert (ours.df1, ours.df2) == (len(groups) - 1, sum(len(g) for g in groups) - len(groups))


def test_brown_forsythe_without_scatter_follows_its_convention():
    assert brown_forsythe([1.0, 1.0, 1.0], [5.0, 5.0, 5.0]).p == 1.0  # both constant: same spread
    apart = brown_forsythe([0.0, 2.0], [0.0, 4.0])  # z = [1, 1] and [2, 2]
    assert apart.w == math.inf and apart.p == 0.0
    with pytest.raises(ValueError, match="2 groups"):
        brown_forsythe([1.0, 2.0])


# ------------------------------------------------------------------ runs needed (power)


def test_runs_needed_reproduces_cohens_table():
    # Cohen (1992), "A power primer", Psychological Bulletin 112(1):155-159, Table 2: two-sample
    # t-test, two-sided alpha 0.05, power 0.80: 64 per group for d = 0.5, 26 for d = 0.8, 393 for
    # d = 0.2. With equal sds our formula is the exact noncentral-t power of that test; Cohen's
    # 393 came from an approximation, the exact answer is 394.
    assert runs_needed(0.5, 1.0, 1.0) == 64
    assert runs_needed(0.8, 1.0, 1.0) == 26 == runs_needed(1.6, 2.0, 2.0)  # d is what counts
    assert runs_needed(0.2, 1.0, 1.0) in (393, 394)
    assert runs_needed(0.0, 1.0, 1.0) is None
    assert runs_needed(1e-6, 1.0, 1.0) is None  # beyond MAX_RUNS
    assert runs_needed(1.0, 0.0, 0.0) == 2  # no noise: two runs show any difference


@pytest.mark.parametrize("delta, sd_a, sd_b", [(1.0, 0.5, 1.5), (0.3, 0.2, 0.4), (3.0, 2.5, 0.5)])
def test_runs_needed_against_monte_carlo_of_scipy_welch(delta, sd_a, sd_b):
    """Simulate scipy's Welch test: at the returned n the power is at least 0.80 and at n - 1 it
    is not (within Monte Carlo error, 20 000 tries: standard error 0.003)."""
    n = runs_needed(delta, sd_a, sd_b)
    assert n is not None and n > 3
    rng = np.random.default_rng(7)
    for m in (n - 1, n):
        a, b = rng.normal(0.0, sd_a, (20000, m)), rng.normal(delta, sd_b, (20000, m))
        simulated = float(np.mean(stats.ttest_ind(a, b, axis=1, equal_var=False).pvalue < 0.05))
        assert simulated == pytest.approx(welch_power(m, delta, sd_a, sd_b), abs=0.012)
    assert welch_power(n - 1, delta, sd_a, sd_b) < 0.8 <= welch_power(n, delta, sd_a, sd_b)


def test_spread_runs_needed_against_monte_carlo_of_scipy_levene():
    """The spread planning (the Welch formula on z = |y - median|) against simulated scipy
    Brown-Forsythe tests: normal data, sd 1 against sd 2, at the planned n the power is about
    0.80 (approximation; 2000 tries, standard error 0.009)."""
    mz, sz = math.sqrt(2.0 / math.pi), math.sqrt(1.0 - 2.0 / math.pi)  # half-normal mean and sd
    n = runs_needed(mz, sz, 2.0 * sz)
    assert n is not None and 15 <= n <= 35
    rng = np.random.default_rng(11)
    a, b = rng.normal(0.0, 1.0, (2000, n)), rng.normal(0.0, 2.0, (2000, n))
    simulated = np.mean([stats.levene(x, y, center="median").pvalue < 0.05 for x, y in zip(a, b)])
    assert simulated == pytest.approx(0.80, abs=0.05)


def test_power_stays_finite_where_scipy_noncentral_t_gives_nan():
    assert welch_power(1000, 1.0, 1.0, 1.0) == pytest.approx(1.0)
    assert welch_power(2, 0.0, 1.0, 1.0) == pytest.approx(0.05)


# ------------------------------------------------------------------ verdict rules


def test_what_better_means():
    assert mean_goal("stop_mm", {"mean_within": [76, 88]}) == ("middle", 82.0)
    assert mean_goal("stop_mm", {"min": 70, "max": 80}) == ("middle", 75.0)
    assert mean_goal("turn_deg", {"mean_abs_max": 2}) == ("abs", 0.0)
    assert mean_goal("angle_error_deg", {}) == ("abs", 0.0)
    assert mean_goal("heading_drift_deg", {}) == ("abs", 0.0)
    assert mean_goal("overrun_mm", {"max": 70}) == ("low", 0.0)
    assert mean_goal("distance_mm", {"min": 70}) == ("high", 0.0)
    assert mean_goal("duration_s", {}) is None
    assert mean_goal("overrun_mm", {"sd_max": 2}) is None
    assert is_error_like("line_sd_mm") and not is_error_like("used_mm")


def _normal(mean: float, sd: float, n: int = 30, seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed).normal(mean, sd, n)


def test_verdicts_on_synthetic_runs():
    window = {"mean_within": [76, 88]}
    base = _normal(80.0, 1.0)
    # Same data: nothing moved, and 30 runs are enough to see a 1-sd shift or a doubled spread.
    same = compare_metric("stop_mm", base, base.copy(), window)
    assert same.verdict == "same" and same.mean_part.runs_needed <= 30
    # Moved away from the middle (82) -> worse; towards it -> better; the effect in mm.
    worse = compare_metric("stop_mm", base, base - 3.0, window)
    assert worse.verdict == "worse" and worse.mean_part.verdict == "worse"
    assert worse.tests.diff == pytest.approx(-3.0) and worse.tests.diff_ci95[0] < -3.0 < worse.tests.diff_ci95[1]
    assert compare_metric("stop_mm", base, base + 2.0, window).verdict == "better"
    # Spread tripled, same mean -> worse spread; the ratio of sds is the effect size.
    wide = compare_metric("stop_mm", base, 80.0 + 3.0 * (base - base.mean()), window)
    assert wide.spread_part.verdict == "worse" and wide.mean_part.verdict == "same"
    assert wide.tests.sd_ratio == pytest.approx(3.0)
    assert compare_metric("stop_mm", wide.tests.mean[0] + 3.0 * (base - base.mean()), base, window).verdict == "better"
    # Error-like: a smaller magnitude is better, whatever the sign.
    assert compare_metric("angle_error_deg", _normal(-3.0, 0.2), _normal(0.5, 0.2, seed=1)).verdict == "better"
    # No known direction: a significant move is "changed".
    assert compare_metric("duration_s", _normal(1.0, 0.01), _normal(1.1, 0.01, seed=1)).verdict == "changed"
    # Better mean but a much wider spread: worse.
    mixed = compare_metric("angle_error_deg", _normal(2.0, 0.1), _normal(0.0, 1.0, seed=1))
    assert mixed.mean_part.verdict == "better" and mixed.spread_part.verdict == "worse" and mixed.verdict == "worse"


def test_not_enough_runs_says_how_many_more():
    few = compare_metric("stop_mm", _normal(80.0, 1.0, n=5), _normal(80.3, 1.0, n=5, seed=1), {"mean_within": [76, 88]})
    assert few.verdict == "not enough runs" and few.mean_part.verdict == "not enough runs"
    needed = few.mean_part.runs_needed
    assert needed is not None and needed > 5 and few.mean_part.more_runs == (needed - 5, needed - 5)
    sd_a, sd_b = few.tests.sd
    assert needed == runs_needed(max(abs(few.tests.diff), math.sqrt((sd_a ** 2 + sd_b ** 2) / 2)), sd_a, sd_b)
    one = compare_metric("stop_mm", [80.0], [81.0, 82.0, 80.5])
    assert one.verdict == "not enough runs" and one.mean_part.more_runs == (1, 0)
    assert one.spread_part.more_runs == (2, 0)


def test_case_verdict_from_deciding_metrics():
    expect = {"stop_spread_mm": {"max": 6.0}, "overrun_mm": {"sd_max": 2}}
    names = ["stop_mm", "overrun_mm", "error_rms_pct", "duration_s", "distance_mm"]
    assert deciding_metrics(expect, names) == ["stop_mm", "overrun_mm", "error_rms_pct"]
    assert deciding_metrics({}, ["duration_s", "turn_deg"]) == ["duration_s", "turn_deg"]
    stop_same = compare_metric("stop_mm", _normal(80, 1), _normal(80, 1))
    slower = compare_metric("duration_s", _normal(1.0, 0.01), _normal(1.1, 0.01, seed=1))
    assert slower.verdict == "changed"
    # A duration is information only when the suite names what matters.
    assert case_verdict([stop_same, slower], ["stop_mm"])[0] == stop_same.verdict
    unclear = compare_metric("stop_mm", _normal(80, 1, n=4), _normal(80.5, 1, n=6, seed=2))
    verdict, more = case_verdict([unclear, slower], ["stop_mm", "duration_s"])
    assert verdict == "not enough runs" and more is not None and more[0] - more[1] == 2
    worse = compare_metric("stop_mm", _normal(80, 1), _normal(80, 4, seed=3))
    assert case_verdict([unclear, worse], ["stop_mm"])[0] == "worse"


def test_holm_adjustment():
    # Holm (1979), step-down: sorted p 0.005, 0.01, 0.03, 0.04 -> 4 x 0.005 = 0.02, 3 x 0.01 = 0.03,
    # 2 x 0.03 = 0.06, max(0.06, 1 x 0.04) = 0.06; worked by hand from the definition.
    assert holm_adjust([0.01, 0.04, 0.03, 0.005]) == pytest.approx([0.03, 0.06, 0.06, 0.02])
    assert holm_adjust([0.5, 0.9]) == pytest.approx([1.0, 1.0])
    assert holm_adjust([]) == []


def test_a_family_of_unchanged_metrics_raises_no_false_alarm():
    """Twelve metrics of pure noise, same distribution on both sides: some test is below 0.05 on
    its own, but after Holm's correction nothing is called better, worse or changed."""
    rng = np.random.default_rng(6)
    family = [metric_tests(f"m{k}_error_mm", rng.normal(0, 1, 20), rng.normal(0, 1, 20)) for k in range(12)]
    raw = [p for t in family for p in t.pvalues]
    assert min(raw) < 0.05  # alone, this one would be a (false) change
    judged = judge_family(family)
    assert not any(m.verdict in ("better", "worse", "changed") for m in judged)
    # A real change stays visible inside the family.
    family.append(metric_tests("angle_error_deg", rng.normal(1, 0.2, 20), rng.normal(3, 0.2, 20)))
    judged = judge_family(family)
    # It has the smallest of the 26 p-values, so Holm multiplies it by 26.
    assert judged[-1].verdict == "worse"
    assert judged[-1].mean_part.p_adjusted == pytest.approx(26 * judged[-1].mean_part.p)


def test_same_in_a_family_needs_the_runs_the_corrected_test_needs():
    """A 1-sd shift needs 17 runs per side at alpha 0.05 but 34 at 0.05/26: in a family of 26
    tests, 20 unchanged runs per side may not be called "same" (it was, before the runs were
    planned at the level the Holm-adjusted decision really works at)."""
    assert runs_needed(1.0, 1.0, 1.0) == 17 and runs_needed(1.0, 1.0, 1.0, 0.05 / 26) == 34
    rng = np.random.default_rng(8)
    base = rng.normal(80.0, 1.0, 20)
    unchanged = metric_tests("stop_error_mm", base, base.copy())  # p = 1 for both tests
    sd_a, sd_b = unchanged.sd
    margin = math.sqrt((sd_a ** 2 + sd_b ** 2) / 2.0)
    # Alone, 20 runs are enough for a 1-sd shift.
    alone = judge_metric(unchanged)
    assert alone.mean_part.verdict == "same" and alone.mean_part.runs_needed == runs_needed(margin, sd_a, sd_b)
    # With 12 noise metrics more the family has 26 tests: the runs are planned at alpha/26.
    family = [metric_tests(f"m{k}_error_mm", rng.normal(0, 1, 20), rng.normal(0, 1, 20)) for k in range(12)]
    judged = judge_family([*family, unchanged])[-1]
    mean = judged.mean_part
    assert mean.verdict == "not enough runs" and judged.verdict == "not enough runs"
    assert mean.runs_needed == runs_needed(margin, sd_a, sd_b, 0.05 / 26) > 30
    assert mean.more_runs == (mean.runs_needed - 20, mean.runs_needed - 20)
    assert mean.power_alpha == pytest.approx(0.05 / 26) and "alpha/26" in mean.why
    assert judged.spread_part.power_alpha == pytest.approx(0.05 / 26)
    assert judge_metric(unchanged, family_size=26).mean_part == mean  # what judge_family passes on
    # Enough runs for the family: "same" again, and the text says at which level.
    many = rng.normal(80.0, 1.0, 60)
    big = judge_family([*family, metric_tests("stop_error_mm", many, many.copy())])[-1]
    assert big.mean_part.verdict == "same" and "enough to see one that matters" in big.mean_part.why
    assert "alpha/26 = 0.00192" in big.mean_part.why
    with pytest.raises(ValueError):
        judge_metric(unchanged, family_size=0)


def test_runs_planned_at_alpha_over_m_give_the_power_under_holm():
    """Monte Carlo of scipy's Welch test inside a family of 26 tests (25 with nothing changed, one
    with a 1-sd shift), decided by Holm's adjusted p < 0.05: at the runs planned at alpha/26 the
    shift is found at least 80 % of the time; at the 17 planned at alpha it is not (about 0.34).
    2000 tries, standard error about 0.01."""
    m, tries = 26, 2000
    rng = np.random.default_rng(12)

    def holm_power(n: int) -> float:
        a = rng.normal(0.0, 1.0, (tries, m, n))
        b = rng.normal(0.0, 1.0, (tries, m, n))
        b[:, 0, :] += 1.0  # the one real change
        p = stats.ttest_ind(a, b, axis=2, equal_var=False).pvalue
        return float(np.mean([holm_adjust(list(row))[0] < 0.05 for row in p]))

    planned = runs_needed(1.0, 1.0, 1.0, 0.05 / m)
    assert holm_power(planned) >= 0.78
    assert holm_power(17) == pytest.approx(0.34, abs=0.05)


# ------------------------------------------------------------------ end to end on the simulator

SUITE = '''
name = "rebuild check"
robot = "{robot}"
course = "practice_course.toml"
repeat = 45
seed = 5

[[cases]]
name = "spin by encoders"
action = "turn"
params = {{ angle_deg = 90, mode = "spin", speed_pct = 40, using = "encoders" }}

[[cases]]
name = "stop past the first junction"
steps = [
  {{ action = "follow_line", params = {{ junctions = 1, side = "any", overrun_mm = 60, speed_pct = 40 }} }},
  {{ action = "probe_edge", params = {{ sensor = "outer_left" }} }},
]
[cases.expect]
stop_mm.mean_within = [60, 80]
'''

OTHER_SUITE = '''
name = "warm-up"
robot = "practice_robot.toml"
course = "practice_course.toml"
repeat = 3
seed = 1

[[cases]]
name = "spin by encoders"
action = "turn"
params = { angle_deg = 90, mode = "spin", speed_pct = 40, using = "encoders" }

[[cases]]
name = "quick pivot"
action = "turn"
params = { angle_deg = 45, mode = "pivot_left", speed_pct = 40 }
'''


def compare_cli(argv: list[str]) -> int:
    return cli.main(["compare", *argv])


@pytest.fixture(scope="module")
def sessions(tmp_path_factory):
    """One results file with: the bundled profile twice (same seed), a warm-up suite, and a
    rebuilt robot whose spin_scale is 4 % short, so its encoder spins stop 4 % early."""
    d = tmp_path_factory.mktemp("rebuild")
    for name in ("practice_robot.toml", "practice_course.toml"):
        shutil.copy(SUITES / name, d / name)
    profile = (SUITES / "practice_robot.toml").read_text()
    assert "spin_scale = 1.0\n" in profile
    (d / "rebuilt_robot.toml").write_text(profile.replace("spin_scale = 1.0\n", "spin_scale = 0.96\n"))
    (d / "suite.toml").write_text(SUITE.format(robot="practice_robot.toml"))
    (d / "rebuilt.toml").write_text(SUITE.format(robot="rebuilt_robot.toml"))
    (d / "other.toml").write_text(OTHER_SUITE)
    db = d / "results.sqlite"
    uids = {}
    with Store(db) as store:
        for key, suite in (("first", "suite.toml"), ("again", "suite.toml"), ("other", "other.toml"),
                           ("rebuilt", "rebuilt.toml")):
            uids[key] = Runner(load_suite(d / suite), store, link="sim").run().uid
    return db, uids


def _cases(path: Path) -> dict[str, dict]:
    return {c["name"]: c for c in json.loads(path.read_text())["cases"]}


def test_same_robot_same_seed_is_the_same(sessions, tmp_path, monkeypatch, capsys):
    db, uids = sessions
    out = tmp_path / "same.json"
    assert compare_cli([uids["first"], uids["again"][:-2], "--db", str(db), "--json", str(out)]) == 0
    data = json.loads(out.read_text())
    assert data["verdict"] == "same" and not data["any_worse"]
    assert {c["name"]: c["verdict"] for c in data["cases"]} == {"spin by encoders": "same",
                                                                 "stop past the first junction": "same"}
    stop = _cases(out)["stop past the first junction"]
    by_name = {m["name"]: m for m in stop["metrics"]}
    assert by_name["stop_mm"]["decides"] and not by_name["duration_s"]["decides"]
    # "same" was planned at alpha over the deciding family's size, and says so.
    deciding = data["family_sizes"]["deciding"]
    assert deciding >= 4 and data["family_sizes"]["information"] >= 4
    stop_mean = by_name["stop_mm"]["mean"]
    assert stop_mean["runs_needed_alpha"] == pytest.approx(0.05 / deciding)
    assert stop_mean["runs_needed"] > runs_needed(1.0, 1.0, 1.0)  # more than the uncorrected 17
    assert by_name["duration_s"]["mean"]["runs_needed_alpha"] == pytest.approx(0.05 / data["family_sizes"]["information"])
    assert by_name["stop_mm"]["mean"]["diff"] == 0.0 and by_name["stop_mm"]["better_means"]["target"] == 70.0
    shown = capsys.readouterr().out
    assert "overall: SAME" in shown and "spin by encoders: SAME" in shown
    assert f"alpha/{deciding} = {0.05 / deciding:.3g} for the {deciding} deciding tests" in " ".join(shown.split())


def test_a_short_spin_scale_is_worse_and_undoing_it_is_better(sessions, tmp_path, monkeypatch, capsys):
    db, uids = sessions
    out = tmp_path / "worse.json"
    assert compare_cli([uids["first"], uids["rebuilt"], "--db", str(db), "--json", str(out)]) == 1
    spin = _cases(out)["spin by encoders"]
    assert spin["verdict"] == "worse"
    error = next(m for m in spin["metrics"] if m["name"] == "angle_error_deg")
    assert error["unit"] == "deg" and error["mean"]["verdict"] == "worse" and error["mean"]["p"] < 1e-6
    # 4 % of a 90 degree spin is about 3.6 degrees more short; the interval holds the shift.
    low, high = error["mean"]["ci95"]
    assert -4.5 < low < error["mean"]["diff"] < high < -2.5
    # Line following does not use spin_scale: that case must not look worse by chance.
    assert _cases(out)["stop past the first junction"]["verdict"] == "same"
    assert "spin by encoders: WORSE" in capsys.readouterr().out
    back = tmp_path / "better.json"
    assert compare_cli([uids["rebuilt"], uids["first"], "--db", str(db), "--json", str(back)]) == 0
    assert _cases(back)["spin by encoders"]["verdict"] == "better"


def test_latest_pairs_the_two_newest_sessions_of_the_latest_suite(sessions, tmp_path, monkeypatch):
    db, uids = sessions
    out = tmp_path / "latest.json"
    assert compare_cli(["--latest", "--db", str(db), "--json", str(out)]) == 1
    data = json.loads(out.read_text())
    # The warm-up session in between belongs to another suite and is skipped.
    assert (data["baseline"]["session"], data["current"]["session"]) == (uids["again"], uids["rebuilt"])


def test_cases_in_one_session_only_are_listed_not_compared(sessions, tmp_path, monkeypatch, capsys):
    db, uids = sessions
    out = tmp_path / "other.json"
    assert compare_cli([uids["first"], uids["other"], "--db", str(db), "--json", str(out)]) == 0
    data = json.loads(out.read_text())
    assert [c["name"] for c in data["cases"]] == ["spin by encoders"]
    assert data["only_in_baseline"] == ["stop past the first junction"]
    assert data["only_in_current"] == ["quick pivot"]
    spin = data["cases"][0]
    # 3 runs against 45 cannot tell; the comparison says how many more.
    assert spin["runs"] == {"baseline": 45, "current": 3}
    if spin["verdict"] == "not enough runs":
        assert spin["more_runs"]["current"] > 0
    shown = capsys.readouterr().out
    assert "only in current (not compared): quick pivot" in shown


def test_bad_input_exits_2_and_names_the_file(sessions, tmp_path, monkeypatch, capsys):
    db, uids = sessions
    assert compare_cli(["nosuch", uids["first"], "--db", str(db)]) == 2
    err = capsys.readouterr().err
    assert str(db) in err and "no session matches 'nosuch'" in err and "Traceback" not in err
    assert compare_cli([uids["first"], "--db", str(db)]) == 2
    assert "or --latest" in capsys.readouterr().err
    assert compare_cli([uids["first"], uids["first"], "--db", str(db)]) == 2
    assert "same session" in capsys.readouterr().err
    assert compare_cli([uids["first"], uids["again"], "--alpha", "0.7", "--db", str(db)]) == 2
    assert "--alpha" in capsys.readouterr().err
    missing = tmp_path / "none.sqlite"
    assert compare_cli(["--latest", "--db", str(missing)]) == 2
    assert str(missing) in capsys.readouterr().err


def test_a_json_path_in_a_missing_folder_exits_2_before_comparing(sessions, tmp_path, monkeypatch, capsys):
    """A --json path that cannot be written is bad input found before any work: no report, and
    no exit code that could be mistaken for (or hide) exit 1 for "worse"."""
    db, uids = sessions
    bad = tmp_path / "nonexistent" / "x.json"
    assert compare_cli([uids["first"], uids["rebuilt"], "--db", str(db), "--json", str(bad)]) == 2
    shown = capsys.readouterr()
    assert shown.out == "" and str(bad) in shown.err and "does not exist" in shown.err
    assert "Traceback" not in shown.err and not bad.parent.exists()
    # The same comparison with a writable path: the report, the file, and exit 1 for "worse".
    good = tmp_path / "x.json"
    assert compare_cli([uids["first"], uids["rebuilt"], "--db", str(db), "--json", str(good)]) == 1
    assert "overall: WORSE" in capsys.readouterr().out and json.loads(good.read_text())["any_worse"]


def test_latest_needs_two_sessions_of_the_suite(tmp_path, monkeypatch, capsys):
    for name in ("practice_robot.toml", "practice_course.toml"):
        shutil.copy(SUITES / name, tmp_path / name)
    (tmp_path / "other.toml").write_text(OTHER_SUITE.replace("repeat = 3", "repeat = 1"))
    db = tmp_path / "one.sqlite"
    with Store(db) as store:
        Runner(load_suite(tmp_path / "other.toml"), store, link="sim").run()
    assert compare_cli(["--latest", "--db", str(db)]) == 2
    err = capsys.readouterr().err
    assert str(db) in err and "only one session of 'warm-up'" in err


def test_interrupted_runs_are_not_counted_and_a_case_without_runs_cannot_tell(tmp_path, monkeypatch, capsys):
    from harness.session import Session

    for name in ("practice_robot.toml", "practice_course.toml"):
        shutil.copy(SUITES / name, tmp_path / name)
    (tmp_path / "other.toml").write_text(OTHER_SUITE)
    db = tmp_path / "cut.sqlite"
    real_run, calls = Session.run, {"n": 0}

    def interrupted(self, *args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 3:
            raise KeyboardInterrupt  # Ctrl-C during the third spin: the pivots never run
        return real_run(self, *args, **kwargs)

    with Store(db) as store:
        full = Runner(load_suite(tmp_path / "other.toml"), store, link="sim").run().uid
        monkeypatch.setattr(Session, "run", interrupted)
        cut = Runner(load_suite(tmp_path / "other.toml"), store, link="sim").run()
        monkeypatch.setattr(Session, "run", real_run)
        assert cut.status == "aborted" and list(store.runs(cut.uid)["status"]) == ["pass", "pass", "aborted"]
    out = tmp_path / "cut.json"
    assert compare_cli([full, cut.uid, "--db", str(db), "--json", str(out)]) == 0
    cases = _cases(out)
    assert cases["spin by encoders"]["runs"] == {"baseline": 3, "current": 2}
    assert cases["quick pivot"]["verdict"] == "not enough runs" and cases["quick pivot"]["metrics"] == []
    assert "no metric from robot measured" in cases["quick pivot"]["note"]
    assert "quick pivot: NOT ENOUGH RUNS" in capsys.readouterr().out
