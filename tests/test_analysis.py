"""Tests for harness.analysis: statistics against independent code and published check values,
and the verdicts a suite's expectations produce.

Source tags follow /work/shared/REFERENCES.md: [S] seen in a source, [M] from memory,
[C] computed and cross-checked with independent code.
"""

from __future__ import annotations

import json
import math
import statistics

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from harness.analysis import (
    CHECK_KINDS,
    Check,
    Summary,
    angle_error_stats,
    angle_errors,
    evaluate,
    iso9283_ap,
    iso9283_rp,
    orientation_rp,
    rms,
    summarize,
    unit_of,
    validate_expectations,
    verdict,
    wrap_deg,
)


def lre(q: float, c: float) -> float:
    """NIST's log relative error: the number of agreeing significant digits ([M], REFERENCES §6)."""
    return math.inf if q == c else -math.log10(abs(q - c) / abs(c))


finite = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False, allow_infinity=False)
# scipy's sem underflows on values near 1e-300; those are tested apart, against statistics only.
moderate = finite.filter(lambda v: v == 0.0 or abs(v) > 1e-100)
samples = st.lists(moderate, min_size=2, max_size=40)


# ---------------------------------------------------------------------------------------------
# summarize against independent implementations


@settings(max_examples=150, deadline=None)
@given(samples)
def test_summarize_matches_statistics_and_scipy(xs: list[float]) -> None:
    # Reference: Python's statistics module (exact rational arithmetic internally) for mean and
    # sd, scipy.stats.sem and scipy.stats.t.interval for the 95 % confidence interval.
    s = summarize(xs)
    scale = max(abs(v) for v in xs) or 1.0
    assert s.n == len(xs)
    assert s.mean == pytest.approx(statistics.mean(xs), rel=1e-12, abs=1e-12 * scale)
    assert s.sd == pytest.approx(statistics.stdev(xs), rel=1e-9, abs=1e-12 * scale)
    assert (s.min, s.max, s.range) == (min(xs), max(xs), max(xs) - min(xs))
    assert s.min <= s.mean <= s.max
    if statistics.stdev(xs) == 0:
        assert s.ci95_low == s.ci95_high == s.mean
    else:
        lo, hi = scipy.stats.t.interval(0.95, len(xs) - 1, loc=statistics.mean(xs),
                                        scale=scipy.stats.sem(xs))
        half = (hi - lo) / 2
        assert s.ci95_low == pytest.approx(lo, rel=1e-9, abs=1e-9 * half + 1e-12 * scale)
        assert s.ci95_high == pytest.approx(hi, rel=1e-9, abs=1e-9 * half + 1e-12 * scale)


def test_summarize_small_and_empty_inputs() -> None:
    empty = summarize([])
    assert empty.n == 0 and math.isnan(empty.mean) and math.isnan(empty.ci95_high)
    assert empty.as_dict() == {"n": 0, "mean": None, "sd": None, "min": None, "max": None,
                               "range": None, "ci95_low": None, "ci95_high": None}
    one = summarize([4.5])
    assert (one.n, one.mean, one.min, one.max, one.range) == (1, 4.5, 4.5, 4.5, 0.0)
    assert math.isnan(one.sd) and math.isnan(one.ci95_low) and math.isnan(one.ci95_high)
    json.dumps(one.as_dict(), allow_nan=False)  # JSON-safe: NaN became None
    assert summarize(np.array([[1.0, 2.0], [3.0, 4.0]])).n == 4  # any shape is flattened


def test_summarize_neither_underflows_nor_overflows() -> None:
    # Squared deviations of 1e-294 underflow to 0 and of 1e200 overflow to inf unless scaled;
    # the reference is statistics.stdev (exact rational arithmetic).
    for xs in ([0.0, 1.761394438557743e-294], [1e200, -1e200, 3e199]):
        assert summarize(xs).sd == pytest.approx(statistics.stdev(xs), rel=1e-12)


@pytest.mark.parametrize("bad", [[1.0, float("nan"), 3.0], [float("inf"), 1.0], [-math.inf]])
def test_summarize_refuses_nan_and_infinity(bad: list[float]) -> None:
    with pytest.raises(ValueError, match="NaN or infinite"):
        summarize(bad)


# ---------------------------------------------------------------------------------------------
# NIST StRD univariate summary statistics (REFERENCES §6): certified values [S], data
# construction for NumAcc2-4 [S: after Simon & Lesage 1989], data transcription verified [C].

# Michelso.dat, 100 values in the NIST file order, copied from REFERENCES §6.
MICHELSO = [float(v) for v in """
299.85 299.74 299.90 300.07 299.93 299.85 299.95 299.98 299.98 299.88
300.00 299.98 299.93 299.65 299.76 299.81 300.00 300.00 299.96 299.96
299.96 299.94 299.96 299.94 299.88 299.80 299.85 299.88 299.90 299.84
299.83 299.79 299.81 299.88 299.88 299.83 299.80 299.79 299.76 299.80
299.88 299.88 299.88 299.86 299.72 299.72 299.62 299.86 299.97 299.95
299.88 299.91 299.85 299.87 299.84 299.84 299.85 299.84 299.84 299.84
299.89 299.81 299.81 299.82 299.80 299.77 299.76 299.74 299.75 299.76
299.91 299.92 299.89 299.86 299.88 299.72 299.84 299.85 299.85 299.78
299.89 299.84 299.78 299.81 299.76 299.81 299.79 299.81 299.82 299.85
299.87 299.87 299.81 299.74 299.81 299.94 299.95 299.80 299.81 299.87
""".split()]


def _numacc(centre: float, low: float, high: float) -> list[float]:
    """NumAcc2/3/4 construction: the centre value, then 500 pairs (low, high)."""
    return [centre] + [low, high] * 500


def test_nist_michelso() -> None:
    # NIST StRD Michelso: certified mean 299.852400000000, sd 0.0790105478190518,
    # lag-1 autocorrelation 0.535199668621283. r1 is asserted too (REFERENCES: "always assert mean,
    # SD and r1 together") because it is what catches a reordered transcription; the sum
    # 29985.24 [C] catches a mistyped value.
    x = np.array(MICHELSO)
    assert len(x) == 100 and math.fsum(MICHELSO) == pytest.approx(29985.24, abs=1e-9)
    d = x - x.mean()
    r1 = float(np.dot(d[1:], d[:-1]) / np.dot(d, d))
    assert lre(r1, 0.535199668621283) > 12
    s = summarize(MICHELSO)
    assert lre(s.mean, 299.852400000000) > 13
    assert lre(s.sd, 0.0790105478190518) > 12  # float64 reaches about 13 digits [C]


def test_nist_numacc1() -> None:
    # NIST StRD NumAcc1: 10000001, 10000003, 10000002 (file order [M]; the order does not matter
    # here); certified mean 10000002 and sd 1, both exact.
    s = summarize([10000001, 10000003, 10000002])
    assert (s.n, s.mean, s.sd) == (3, 10000002.0, 1.0)


@pytest.mark.parametrize(
    ("name", "data", "mean", "sd", "min_lre"),
    [
        # NIST StRD certified mean / sd; min_lre is what float64 data allows (REFERENCES §6 [C]:
        # numpy reaches about 9 digits on NumAcc4, whose values float64 cannot hold exactly).
        ("NumAcc2", _numacc(1.2, 1.1, 1.3), 1.2, 0.1, 13),
        ("NumAcc3", _numacc(1000000.2, 1000000.1, 1000000.3), 1000000.2, 0.1, 9),
        ("NumAcc4", _numacc(10000000.2, 10000000.1, 10000000.3), 10000000.2, 0.1, 8),
    ],
)
def test_nist_numacc(name: str, data: list[float], mean: float, sd: float, min_lre: float) -> None:
    s = summarize(data)
    assert s.n == 1001
    assert lre(s.mean, mean) >= 13, name
    assert lre(s.sd, sd) >= min_lre, name


def test_numacc4_sd_is_as_good_as_the_float64_data_allows() -> None:
    # REFERENCES §6 [C]: the exact sd of the float64-rounded NumAcc4 data is 0.100000000558794
    # (what numpy.std(ddof=1) gives); a stable algorithm must land there, not merely near 0.1.
    s = summarize(_numacc(10000000.2, 10000000.1, 10000000.3))
    assert s.sd == pytest.approx(0.100000000558794, rel=1e-12)


def test_naive_one_pass_formula_would_fail_numacc4() -> None:
    # Why the two-pass algorithm matters (REFERENCES §6 [C]): (sum x^2 - n mean^2) / (n - 1)
    # cancels catastrophically on NumAcc4. With numpy's sums the "variance" comes out as about
    # -0.032 (REFERENCES quotes 0.178885 = sqrt(0.032)) instead of 0.01: nowhere near, so the
    # NumAcc4 test above can fail.
    x = np.array(_numacc(10000000.2, 10000000.1, 10000000.3))
    naive_var = (np.sum(x * x) - x.size * np.mean(x) ** 2) / (x.size - 1)
    assert abs(naive_var - 0.01) > 0.01
    assert lre(summarize(x).sd, 0.1) > 8


# ---------------------------------------------------------------------------------------------
# Student t confidence interval


def test_ci_half_width_uses_student_t_table_value() -> None:
    # Published t table: t(0.975, 19) = 2.093 (NIST/SEMATECH e-Handbook of Statistical Methods,
    # table of critical values of the t distribution). For n = 20 the 95 % CI half-width is
    # 2.093 s / sqrt(20) to 3 decimals. A normal-theory 1.960 would be off by 0.03 here.
    rng = np.random.default_rng(20)
    x = rng.normal(80.0, 1.0, 20)
    s = summarize(x)
    half = (s.ci95_high - s.ci95_low) / 2
    assert half == pytest.approx(2.093 * s.sd / math.sqrt(20), abs=5e-4)
    assert abs(half - 1.960 * s.sd / math.sqrt(20)) > 0.02
    assert s.mean - s.ci95_low == pytest.approx(s.ci95_high - s.mean)


@pytest.mark.parametrize(("n", "t_table"), [(2, 12.706), (5, 2.776), (30, 2.045)])
def test_ci_other_t_table_values(n: int, t_table: float) -> None:
    # Two-sided 95 % critical values t(0.975, n - 1) from standard t tables [M: recalled, not
    # re-read]; small n is where t and the normal 1.96 differ most.
    x = np.arange(n, dtype=float)
    s = summarize(x)
    half = (s.ci95_high - s.ci95_low) / 2
    assert half / (s.sd / math.sqrt(n)) == pytest.approx(t_table, abs=5e-4)


# ---------------------------------------------------------------------------------------------
# ISO 9283-style accuracy and repeatability. The formulas are [M] (REFERENCES §1: the clause
# text was not read; they match several independent open-source implementations). The worked
# example's numbers are made up, its arithmetic checked [C].

ISO_POINTS = [(100.8, 50.3), (101.2, 49.6), (100.5, 50.9), (101.0, 50.1), (100.9, 49.8)]


def test_iso9283_rp_worked_example_2d() -> None:
    # REFERENCES §1 worked example, by hand:
    #   barycentre x = 504.4/5 = 100.88, y = 250.7/5 = 50.14
    #   l_j = |p_j - barycentre|: sqrt(0.0320) = 0.178885, sqrt(0.3940) = 0.627694,
    #         sqrt(0.7220) = 0.849706, sqrt(0.0160) = 0.126491, sqrt(0.1160) = 0.340588
    #   l_bar = 2.123364 / 5 = 0.424673
    #   S_l = sqrt(0.378265 / (n - 1 = 4)) = sqrt(0.094566) = 0.307516
    #   RP = 0.424673 + 3 * 0.307516 = 1.347221 mm
    rp = iso9283_rp(ISO_POINTS)
    assert rp == pytest.approx(1.347221, abs=1e-6)
    # The ddof trap: S_l with n instead of n - 1 gives 1.249825. It must not be what we return.
    assert abs(rp - 1.249825) > 0.05
    # Accuracy: AP = sqrt(0.88^2 + 0.14^2) = sqrt(0.7744 + 0.0196) = 0.891067 mm.
    assert iso9283_ap(ISO_POINTS, (100.0, 50.0)) == pytest.approx(0.891067, abs=1e-6)


def test_iso9283_rp_1d_and_3d() -> None:
    # 1-D by hand: 1, 2, 3 -> barycentre 2, l = 1, 0, 1, l_bar = 2/3,
    # S_l = sqrt(((1/3)^2 + (2/3)^2 + (1/3)^2) / 2) = sqrt(1/3), RP = 2/3 + 3 sqrt(1/3) = 2.398717.
    assert iso9283_rp([1.0, 2.0, 3.0]) == pytest.approx(2 / 3 + 3 * math.sqrt(1 / 3), rel=1e-12)
    assert iso9283_rp(np.array([[1.0], [2.0], [3.0]])) == iso9283_rp([1.0, 2.0, 3.0])
    # A plane embedded in 3-D (z constant) gives the 2-D result.
    pts3 = [(x, y, 7.0) for x, y in ISO_POINTS]
    assert iso9283_rp(pts3) == pytest.approx(1.347221, abs=1e-6)
    assert iso9283_ap(pts3, (100.0, 50.0, 7.0)) == pytest.approx(0.891067, abs=1e-6)
    assert iso9283_ap([79.0, 81.0, 83.0], 80.0) == pytest.approx(1.0)


def test_iso9283_edge_cases() -> None:
    assert math.isnan(iso9283_rp([5.0]))
    assert math.isnan(iso9283_rp(np.empty((0, 2))))
    assert math.isnan(iso9283_ap(np.empty((0, 2)), (0.0, 0.0)))
    assert iso9283_rp([(1.0, 1.0)] * 4) == 0.0
    with pytest.raises(ValueError, match="shape"):
        iso9283_rp(np.zeros((3, 4)))
    with pytest.raises(ValueError, match="coordinate"):
        iso9283_ap(ISO_POINTS, (1.0, 2.0, 3.0))
    with pytest.raises(ValueError, match="NaN"):
        iso9283_rp([(1.0, float("nan")), (2.0, 2.0)])


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(finite, finite), min_size=2, max_size=20),
       st.floats(-1e3, 1e3), st.floats(-1e3, 1e3), st.floats(0, 2 * math.pi))
def test_iso9283_rp_ignores_where_the_points_are(pts: list[tuple[float, float]], dx: float,
                                                 dy: float, theta: float) -> None:
    # Repeatability is a property of the scatter: moving or rotating the whole cloud must not
    # change it (independent check: rigid motions preserve distances to the barycentre).
    p = np.array(pts)
    c, s = math.cos(theta), math.sin(theta)
    moved = p @ np.array([[c, s], [-s, c]]) + (dx, dy)
    scale = float(np.max(np.abs(p))) + 1.0
    assert iso9283_rp(moved) == pytest.approx(iso9283_rp(p), rel=1e-7, abs=1e-9 * scale)


def test_orientation_rp_worked_example() -> None:
    # REFERENCES §1 step 7: headings 90.5, 89.2, 91.0, 90.1, 89.7 (commanded 90) ->
    # mean 90.1, AP_theta = +0.1, S_theta = 0.696419, RP_theta = +/-3 * 0.696419 = +/-2.089258.
    h = [90.5, 89.2, 91.0, 90.1, 89.7]
    assert orientation_rp(h) == pytest.approx(2.089258, abs=1e-6)
    stats = angle_error_stats(angle_errors(h, 90.0))
    assert stats["signed"].mean == pytest.approx(0.1, abs=1e-12)
    assert stats["signed"].sd == pytest.approx(0.696419, abs=1e-6)
    assert stats["rp"] == pytest.approx(2.089258, abs=1e-6)
    assert math.isnan(orientation_rp([12.0]))


def test_distance_repeatability_worked_example() -> None:
    # REFERENCES §1 step 8 [C]: D_j = 500.400090, 500.900090, 500.300040, 500.500040, 500.400090,
    # commanded 500 -> mean 500.500070, AD = 0.500070, S_D = 0.234531, RD = +/-3 S_D = +/-0.703594.
    s = summarize([500.400090, 500.900090, 500.300040, 500.500040, 500.400090])
    assert s.mean - 500.0 == pytest.approx(0.500070, abs=1e-6)
    assert 3 * s.sd == pytest.approx(0.703594, abs=1e-6)


# ---------------------------------------------------------------------------------------------
# Heading wrap-around (REFERENCES §11, [M] apart from the scipy circular mean [C])


def test_wrap_deg_boundaries() -> None:
    assert wrap_deg(180.0) == 180.0
    assert wrap_deg(-180.0) == 180.0  # (-180, 180]: -180 is the same heading as 180
    assert wrap_deg(540.0) == 180.0
    assert wrap_deg(-190.0) == 170.0
    assert wrap_deg(190.0) == -170.0
    assert wrap_deg(0.0) == 0.0 and wrap_deg(360.0) == 0.0
    assert isinstance(wrap_deg(10.0), float)
    assert wrap_deg(np.nextafter(180.0, 200.0)) > -180.0  # tiny overshoot must not give -180
    np.testing.assert_array_equal(wrap_deg([350.0, -350.0]), [-10.0, 10.0])


@settings(max_examples=200, deadline=None)
@given(st.floats(-1e6, 1e6))
def test_wrap_deg_range_and_congruence(a: float) -> None:
    w = wrap_deg(a)
    assert -180.0 < w <= 180.0
    k = (a - w) / 360.0
    assert k == pytest.approx(round(k), abs=1e-9)


def test_circular_case_179_minus179_178() -> None:
    # REFERENCES §11: for 179, -179, 178 the circular mean is 179.33 deg [C, scipy.stats.circmean];
    # a naive arithmetic mean gives 59.3 deg, which would turn a 3-degree scatter into hundreds.
    h = [179.0, -179.0, 178.0]
    assert scipy.stats.circmean(h, high=180, low=-180) == pytest.approx(179.33, abs=0.005)
    assert statistics.mean(h) == pytest.approx(59.33, abs=0.005)
    # Errors against a commanded 180: -1, +1, -2 (not -1, -359, -2).
    e = angle_errors(h, 180.0)
    np.testing.assert_allclose(e, [-1.0, 1.0, -2.0], atol=1e-12)
    stats = angle_error_stats(e)
    assert stats["signed"].mean == pytest.approx(-2 / 3)
    assert stats["mean_abs"] == pytest.approx(2 / 3)
    assert stats["abs"].mean == pytest.approx(4 / 3)  # mean of |error|, not |mean error|
    assert stats["rms"] == pytest.approx(math.sqrt(2.0))
    # Orientation RP = 3 * sd of (179, 181, 178) = 3 * 1.527525 = 4.582576 (by hand).
    assert orientation_rp(h) == pytest.approx(3 * statistics.stdev([179.0, 181.0, 178.0]))
    assert orientation_rp(h) == pytest.approx(4.582576, abs=1e-6)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(-20, 20), min_size=2, max_size=20), st.floats(-720, 720))
def test_orientation_rp_is_the_same_anywhere_on_the_circle(dev: list[float], offset: float) -> None:
    # The scatter of headings must not depend on where the circle's cut at +/-180 falls.
    angles = wrap_deg(np.array(dev) + offset)
    assert orientation_rp(angles) == pytest.approx(3 * statistics.stdev(dev), rel=1e-6, abs=1e-7)


def test_angle_errors_broadcast() -> None:
    e = angle_errors([91.0, -89.0, 271.0], [90.0, -90.0, -90.0])
    np.testing.assert_allclose(e, [1.0, 1.0, 1.0], atol=1e-12)


# ---------------------------------------------------------------------------------------------
# RMS


def test_rms_values() -> None:
    # By hand: sqrt((3^2 + 4^2) / 2) = sqrt(12.5); a constant offset is its own RMS.
    assert rms([3.0, 4.0]) == pytest.approx(math.sqrt(12.5))
    assert rms([-5.0] * 7) == pytest.approx(5.0)
    assert rms([0.0, 0.0]) == 0.0
    assert math.isnan(rms([]))
    assert rms([1e200, -1e200]) == pytest.approx(1e200)  # no overflow
    with pytest.raises(ValueError):
        rms([1.0, float("nan")])


@settings(max_examples=100, deadline=None)
@given(st.lists(finite, min_size=1, max_size=40))
def test_rms_matches_definition(xs: list[float]) -> None:
    # Independent: statistics.fmean of the squares.
    assert rms(xs) == pytest.approx(math.sqrt(statistics.fmean(v * v for v in xs)), rel=1e-9)


# ---------------------------------------------------------------------------------------------
# Verdicts


def _with_mean(mean: float, n: int = 20) -> np.ndarray:
    """n values with exactly this mean and a small symmetric scatter."""
    return mean + np.tile([-0.5, 0.5], n // 2)


def _with_sd(sd: float, n: int = 20) -> np.ndarray:
    """n values, mean 0, sample sd exactly sd: +/-a with a = sd sqrt((n - 1) / n)."""
    return np.tile([-1.0, 1.0], n // 2) * sd * math.sqrt((n - 1) / n)


def test_texts_carry_the_deciding_numbers() -> None:
    checks = evaluate({"stop_mm": {"mean_within": [75, 85]},
                       "angle_error_deg": {"sd_max": 0.5}},
                      {"stop_mm": _with_mean(82.31), "angle_error_deg": _with_sd(0.83)})
    assert [c.text for c in checks] == [
        "stop_mm.mean_within [75, 85]: mean 82.31 mm (n=20) is inside",
        "angle_error_deg.sd_max 0.5: sd 0.83 deg (n=20) exceeds it",
    ]
    assert [c.passed for c in checks] == [True, False]
    assert checks[0].measured == pytest.approx(82.31) and checks[0].limit == [75, 85]
    assert checks[1].measured == pytest.approx(0.83) and checks[1].n == 20
    assert verdict(checks) == "fail"


def test_loose_expectation_passes_and_tight_one_fails() -> None:
    rng = np.random.default_rng(7)

    def normal(mean: float, sd: float) -> np.ndarray:  # exactly this mean and sd
        z = rng.standard_normal(20)
        return mean + sd * (z - z.mean()) / z.std(ddof=1)

    m = {"stop_mm": normal(80.0, 1.5), "angle_error_deg": normal(0.4, 0.8),
         "error_rms_pct": rng.uniform(5.0, 9.0, 20)}
    loose = {"stop_spread_mm": {"max": 10.0}, "stop_mm": {"mean_within": [70, 90], "sd_max": 3},
             "angle_error_deg": {"mean_abs_max": 2.0, "sd_max": 2.0}, "error_rms_pct": {"max": 12}}
    tight = {"stop_spread_mm": {"max": 1.0}, "stop_mm": {"mean_within": [70, 75], "sd_max": 0.5},
             "angle_error_deg": {"mean_abs_max": 0.05, "sd_max": 0.1}, "error_rms_pct": {"max": 6}}
    ok = evaluate(loose, m)
    assert verdict(ok) == "pass" and len(ok) == 6
    bad = evaluate(tight, m)
    assert verdict(bad) == "fail" and not any(c.passed for c in bad)
    s = summarize(m["stop_mm"])
    assert f"sd {s.sd:.2f} mm (n=20) exceeds it" in bad[2].text
    assert f"RP {iso9283_rp(m['stop_mm']):.2f} mm of stop_mm (n=20) exceeds it" in bad[0].text
    above = int(np.sum(m["error_rms_pct"] > 6))
    assert f"largest {m['error_rms_pct'].max():.2f} % (n=20, {above} above) exceeds it" in bad[5].text


V = np.array([1.0, 2.0, 3.0, 4.0])  # mean 2.5, sd 1.290994, range 3, 95 % CI 0.445740 .. 4.554260


@pytest.mark.parametrize(
    ("check", "limit", "passed", "fragment"),
    [
        ("max", 4.0, True, "largest 4.00 mm (n=4) is within"),
        ("max", 3.5, False, "largest 4.00 mm (n=4, 1 above) exceeds it"),
        ("min", 1.0, True, "smallest 1.00 mm (n=4) is within"),
        ("min", 2.5, False, "smallest 1.00 mm (n=4, 2 below) is below it"),
        ("mean_within", [2.5, 3.0], True, "mean 2.50 mm (n=4) is inside"),
        ("mean_within", [2.6, 3.0], False, "mean 2.50 mm (n=4) is outside"),
        ("mean_abs_max", 2.5, True, "|mean| 2.50 mm (n=4) is within"),
        ("mean_abs_max", 2.4, False, "|mean| 2.50 mm (n=4) exceeds it"),
        ("sd_max", 1.3, True, "sd 1.29 mm (n=4) is within"),
        ("sd_max", 1.29, False, "sd 1.291 mm (n=4) exceeds it"),  # more digits near the limit
        ("range_max", 3.0, True, "range 3.00 mm (1.00 to 4.00, n=4) is within"),
        ("range_max", 2.9, False, "range 3.00 mm (1.00 to 4.00, n=4) exceeds it"),
        ("ci_within", [0.4, 4.6], True, "95% CI of the mean [0.45, 4.55] mm (mean 2.50, n=4)"),
        ("ci_within", [0.5, 4.6], False, "[0.45, 4.55] mm (mean 2.50, n=4) is not inside"),
        ("ci_within", [0.4, 4.5542], False, "[0.45, 4.5543] mm (mean 2.50, n=4) is not inside"),
    ],
)
def test_every_check_kind(check: str, limit: object, passed: bool, fragment: str) -> None:
    # CI by scipy.stats.t.interval(0.95, 3, loc=2.5, scale=scipy.stats.sem(V)) = 0.445740..4.554260.
    (c,) = evaluate({"stop_mm": {check: limit}}, {"stop_mm": V})
    assert c.expectation == f"stop_mm.{check}"
    assert c.passed is passed, c.text
    assert fragment in c.text
    assert verdict([c]) == ("pass" if passed else "fail")


def test_check_kinds_are_all_covered() -> None:
    assert set(CHECK_KINDS) == {"max", "min", "mean_within", "mean_abs_max", "sd_max",
                                "range_max", "ci_within"}


def test_ci_within_measured_is_the_interval() -> None:
    (c,) = evaluate({"stop_mm": {"ci_within": [0, 5]}}, {"stop_mm": V})
    lo, hi = scipy.stats.t.interval(0.95, 3, loc=2.5, scale=scipy.stats.sem(V))
    assert c.measured == pytest.approx([lo, hi])
    json.dumps(c.as_dict(), allow_nan=False)


def test_spread_metrics_are_iso9283_rp_of_their_base() -> None:
    pts = np.array(ISO_POINTS)
    m = {"stop_mm": pts[:, 0], "stop_xy_mm": pts, "heading_deg": [90.5, 89.2, 91.0, 90.1, 89.7]}
    checks = evaluate({"stop_spread_2d_mm": {"max": 1.35},     # RP 1.347221 (REFERENCES §1)
                       "stop_spread_mm": {"max": 0.1},
                       "heading_spread_deg": {"max": 2.0}},    # RP 2.089258 (REFERENCES §1)
                      m)
    assert [c.passed for c in checks] == [True, False, False]
    assert checks[0].text == "stop_spread_2d_mm.max 1.35: 2-D RP 1.347 mm of stop_xy_mm (n=5) is within"
    assert checks[0].measured == pytest.approx(1.347221, abs=1e-6)
    assert checks[1].measured == pytest.approx(iso9283_rp(pts[:, 0]))
    assert checks[2].text == "heading_spread_deg.max 2: RP 2.09 deg of heading_deg (n=5) exceeds it"
    # A spread measured per run (no base metric) is checked like any other metric.
    (c,) = evaluate({"lap_spread_mm": {"max": 3.0}}, {"lap_spread_mm": [1.0, 2.0]})
    assert c.passed and "largest 2.00 mm" in c.text


def test_heading_spread_wraps_around() -> None:
    (c,) = evaluate({"heading_spread_deg": {"max": 5.0}}, {"heading_deg": [179.0, -179.0, 178.0]})
    assert c.passed and c.measured == pytest.approx(4.582576, abs=1e-6)


def test_missing_or_too_few_values_fail_with_a_clear_text() -> None:
    checks = evaluate(
        {"stop_mm": {"mean_within": [75, 85]}, "turn_deg": {"sd_max": 1.0},
         "stop_spread_mm": {"max": 6.0}, "lap_s": {"max": 30}, "x_mm": {"max": 1}},
        {"turn_deg": [90.0], "stop_mm_other": [1.0], "lap_s": [], "x_mm": [1.0, float("nan")]},
    )
    assert [c.passed for c in checks] == [False] * 5
    assert checks[0].text == "stop_mm.mean_within [75, 85]: no finished runs measured stop_mm"
    assert checks[0].measured is None
    assert checks[1].text == "turn_deg.sd_max 1: sd_max needs at least 2 finished runs of turn_deg, got 1"
    assert checks[2].text == ("stop_spread_mm.max 6: no finished runs measured stop_mm "
                              "(needed for stop_spread_mm)")
    assert checks[3].text == "lap_s.max 30: no finished runs measured lap_s"
    assert "x_mm has 1 NaN or infinite value(s) among 2 runs" in checks[4].text


def test_one_run_is_enough_for_per_run_limits_but_not_for_a_spread() -> None:
    m = {"stop_mm": [80.0]}
    (ok,) = evaluate({"stop_mm": {"max": 85}}, m)
    assert ok.passed and ok.text == "stop_mm.max 85: largest 80.00 mm (n=1) is within"
    (sp,) = evaluate({"stop_spread_mm": {"max": 6}}, m)
    assert not sp.passed and "needs at least 2 finished runs of stop_mm, got 1" in sp.text
    (ci,) = evaluate({"stop_mm": {"ci_within": [0, 100]}}, m)
    assert not ci.passed


def test_invalid_expectations_fail_instead_of_raising() -> None:
    checks = evaluate({"stop_mm": {"average": 3, "max": "six"}, "x_mm": 5},
                      {"stop_mm": [1.0, 2.0]})
    assert [c.passed for c in checks] == [False, False, False]
    assert "invalid expectation: unknown check 'average'" in checks[0].text
    assert "expected a finite number, got 'six'" in checks[1].text
    assert "expected a table of checks" in checks[2].text
    (c,) = evaluate([1, 2], {})  # type: ignore[arg-type]
    assert not c.passed and "expected a table of metric -> checks" in c.text
    (c,) = evaluate({"stop_spread_2d_mm": {"max": 1}}, {"stop_xy_mm": [1.0, 2.0]})
    assert not c.passed and "must be (n, 2) points" in c.text
    (c,) = evaluate({"stop_mm": {"max": 1}}, {"stop_mm": np.zeros((3, 2))})
    assert not c.passed and "one value per run" in c.text


def test_verdict() -> None:
    yes = Check("a_mm.max", True, 1.0, 2.0, "ok")
    no = Check("a_mm.min", False, 1.0, 2.0, "no")
    assert verdict([]) == "pass"  # the caller fails cases whose runs did not finish
    assert verdict([yes, yes]) == "pass"
    assert verdict([yes, no]) == "fail"


def test_units_from_the_name_suffix() -> None:
    assert [unit_of(n) for n in ("stop_mm", "turn_deg", "error_rms_pct", "lap_s", "count")] == [
        "mm", "deg", "%", "s", ""]
    (c,) = evaluate({"junctions": {"min": 3}}, {"junctions": [3, 4]})
    assert c.text == "junctions.min 3: smallest 3.00 (n=2) is within"


def test_validate_accepts_a_good_suite() -> None:
    good = {"stop_spread_mm": {"max": 6.0}, "stop_mm": {"mean_within": [75, 85], "sd_max": 2.0},
            "angle_error_deg": {"mean_abs_max": 1.5, "sd_max": 1.0, "min": -5, "max": 5},
            "error_rms_pct": {"max": 12}, "stop_mm_b": {"ci_within": (70, 90), "range_max": 0},
            "stop_spread_2d_mm": {"max": np.float64(4.5)}}
    assert validate_expectations(good) == []


def test_validate_names_the_key_path_of_each_problem() -> None:
    problems = validate_expectations(
        {"stop_mm": {"mean_within": [85, 75], "sd_max": -1, "avg": 3, "ci_within": [1]},
         "turn_deg": {"max": True, "min": float("nan")},
         "stop_spread_mm": {"sd_max": 1.0, "max": -2},
         "lap_s": {"min": 40, "max": 30},
         "x_mm": 6},
        prefix="cases.junction3.expect",
    )
    p = "cases.junction3.expect."
    assert problems == [
        p + "stop_mm.mean_within: expected low <= high, got [85, 75]",
        p + "stop_mm.sd_max: expected a limit >= 0 (an sd is never negative), got -1",
        p + "stop_mm.avg: unknown check 'avg' (expected one of max, min, mean_within, "
            "mean_abs_max, sd_max, range_max, ci_within)",
        p + "stop_mm.ci_within: expected [low, high] (two finite numbers), got [1]",
        p + "turn_deg.max: expected a finite number, got True",
        p + "turn_deg.min: expected a finite number, got nan",
        p + "stop_spread_mm.sd_max: sd_max does not apply to a spread (one value per case); "
            "use max or min here, or put sd_max on stop_mm",
        p + "stop_spread_mm.max: expected a limit >= 0 (a spread is never negative), got -2",
        p + "lap_s: min 40 is greater than max 30; no run can pass both",
        p + "x_mm: expected a table of checks such as {max = 6.0}, got 6",
    ]
    assert validate_expectations("max = 6") == [
        "expectations: expected a table of metric -> checks, got str"]
    assert all(isinstance(m, str) for m in validate_expectations({"a_mm": {"max": "x"}}))


def test_summary_type() -> None:
    s = summarize([1.0, 2.0])
    assert isinstance(s, Summary)
    with pytest.raises(AttributeError):
        s.n = 3  # type: ignore[misc]  # frozen
