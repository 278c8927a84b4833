"""Comparing two sets of runs of one case (a baseline and a current build): the rebuild check.

Small pure functions; no I/O. scipy.stats is imported inside the functions that need it (it costs
about a second to import and most commands never compare).

Tests (formulas in REFERENCES.md section 8)
    Means:   Welch's t-test, t = (mean_a - mean_b) / sqrt(s_a^2/n_a + s_b^2/n_b) with the
             Welch-Satterthwaite degrees of freedom (Welch 1947, Satterthwaite 1946); two-sided p
             from Student's t.
    Spreads: Brown-Forsythe (Levene's test with the median, Brown & Forsythe 1974): a one-way
             ANOVA F on z = |y - median of its group|; p from the F distribution.

Effect sizes are in the measurement's own unit: the difference of means (current - baseline) with
its Welch 95 % confidence interval, and the ratio and the difference of the sample standard
deviations.

How many more runs would settle it
    The runs per side needed to detect a difference with 80 % power at the chosen alpha with
    Welch's test, from the usual noncentral-t approximation (the one commercial power software
    documents for the "Satterthwaite t test", after Moser, Stevens & Watts 1989, Communications
    in Statistics - Theory and Methods 18(11):3963-3975; cited from memory, and checked against a
    Monte Carlo of scipy's Welch test in tests/test_compare.py). For n runs per side and planning
    standard deviations s_a, s_b:
        nu(n)     = (n - 1) (s_a^2 + s_b^2)^2 / (s_a^4 + s_b^4)     (Welch-Satterthwaite at n, n)
        lambda(n) = delta / sqrt((s_a^2 + s_b^2) / n)               (noncentrality)
        power(n)  = P(T'(nu, lambda) > t_crit) + P(T'(nu, lambda) < -t_crit),
                    t_crit = t_{1 - alpha/2, nu}, T' noncentral t (scipy.stats.nct)
    With equal sds this is the exact power of Student's pooled test (nu = 2n - 2), so it gives
    Cohen's (1992) table values: 64 per group for d = 0.5, 26 for d = 0.8.
    For spreads the same formula is applied to z = |y - median|: with two groups the
    Brown-Forsythe W is exactly the square of the pooled t statistic on the z's, so the runs that
    detect the difference of mean z detect the spread change (an approximation: z is not normal).

Many tests at once
    A session comparison runs two tests per metric, for several metrics and cases; at 5 % each,
    some "change" would turn up by chance in most comparisons of two identical robots (seen on the
    simulator: a spin_scale change made a line-following stop "worse" at p = 0.04 because the
    random draws moved). So the tests that decide the verdicts form one family and their p-values
    are adjusted with Holm's step-down method (holm_adjust; Holm 1979), which keeps the chance of
    any false "better", "worse" or "changed" in the family below alpha whatever the dependence
    between the tests. harness/compare.py makes the deciding tests of all compared cases one
    family and the information-only tests another. compare_metric, for one metric alone, does
    not adjust.

    The correction costs power, and the runs needed are planned for it: in a family of m tests
    they are computed at alpha/m (Bonferroni), not at alpha. A test with p < alpha/m has a Holm
    adjusted p <= m p < alpha, so Holm rejects at least whenever Bonferroni does: the runs that
    give 80 % power at alpha/m give at least 80 % power under Holm (a safe upper bound; Holm's
    later steps need fewer). Planning at alpha instead would overstate the power: with 26 tests a
    1-sd shift needs 34 runs per side, and at the 17 that alpha = 0.05 asks for the power is 0.34.

Verdicts
    A test with (adjusted) p < alpha decides: the mean (or the spread) moved, for the better or
    the worse. A test with p >= alpha says "same" only when the runs were enough to see a change
    that matters: the runs per side at least those needed (80 % power at alpha/m, m the number of
    tests in its family, see above) for the larger of the observed change and
        - for the mean: a shift of SAME_MEAN_SD (1) standard deviation (the root mean square of
          the two sds): a shift smaller than the robot's own run-to-run scatter hardly changes
          where it ends up;
        - for the spread: the spread growing by SAME_SD_RATIO (a factor 2) over the smaller one.
    When nothing changed, with normal data and equal sds, the runs per side that settle the mean
    and the spread (more for long-tailed data) grow with the family size m (alpha 0.05):
        m            1    2    4    8   26
        mean        17   21   24   28   34
        spread      11   13   15   17   21
    and a spread that really doubled takes 24, 29, 34, 40, 48 runs per side to detect. So a
    suite's usual 20 to 25 runs can say "same" for a handful of deciding tests, not for dozens.
    Otherwise the verdict
    is "not enough runs to tell", with how many more runs per side would settle it. The margins
    only separate "same" from "not enough runs"; they never hide a significant change.

What "better" means
    Spread: a smaller spread is better, for every metric (the robot repeats more tightly).
    Mean, first rule that applies, using the case's expectations in the (current) suite:
      1. a window on the mean (mean_within, ci_within, or both min and max): closer to the
         window's middle is better (stop_mm.mean_within = [76, 88] -> closer to 82 mm);
      2. mean_abs_max, or an error-like name (one containing "error", "spread" or "drift", or
         the word "sd"): a smaller magnitude |mean| is better;
      3. max alone: smaller is better; min alone: larger is better;
      4. otherwise the metric has no better direction (a duration, a raw heading): a significant
         move is "changed", reported but neither better nor worse.
    When a mean and a spread disagree the metric is "worse": a rebuild check must not let a gain
    in one hide a loss in the other.

Case verdict
    Decided by the metrics that say how well the robot did: the ones the suite sets expectations
    on (a spread expectation such as stop_spread_mm counts for stop_mm) and the error-like ones.
    A case with none of these is decided by all its metrics. The others (durations, distances,
    raw headings) are shown with their own verdicts, for information. Precedence:
    worse > better > not enough runs > changed > same.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "BrownForsythe",
    "MetricComparison",
    "MetricTests",
    "PartComparison",
    "Welch",
    "SAME_MEAN_SD",
    "SAME_SD_RATIO",
    "POWER",
    "brown_forsythe",
    "case_verdict",
    "compare_metric",
    "deciding_metrics",
    "holm_adjust",
    "is_error_like",
    "judge_family",
    "judge_metric",
    "mean_difference_ci",
    "mean_goal",
    "metric_tests",
    "runs_needed",
    "welch_from_stats",
    "welch_power",
    "welch_test",
    "worst_verdict",
]

Verdict = Literal["same", "better", "worse", "changed", "not enough runs"]
VERDICTS: tuple[str, ...] = ("worse", "better", "not enough runs", "changed", "same")  # precedence order

SAME_MEAN_SD = 1.0  # a mean shift smaller than this many sds "does not matter"
SAME_SD_RATIO = 2.0  # a spread change smaller than this factor "does not matter"
POWER = 0.8
MAX_RUNS = 100_000  # runs_needed gives up beyond this many runs per side
_ERROR_WORDS = ("error", "spread", "drift")


def _finite(values: ArrayLike, what: str) -> NDArray[np.float64]:
    arr = np.asarray(values, dtype=np.float64).ravel()
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{what}: NaN or infinite values; leave out runs that were not measured")
    return arr


# ---------------------------------------------------------------------------------------------
# Welch's t-test


@dataclass(frozen=True)
class Welch:
    """Welch's test of mean_a - mean_b: t, Welch-Satterthwaite df, two-sided p, and the
    difference and its standard error (for the confidence interval)."""

    t: float
    df: float
    p: float
    diff: float
    se: float


def welch_from_stats(mean_a: float, sd_a: float, n_a: int, mean_b: float, sd_b: float, n_b: int) -> Welch:
    """Welch's t-test from summary statistics (sample sds with n - 1), like
    scipy.stats.ttest_ind_from_stats(..., equal_var=False).

    Both samples constant (sd 0): the test is undefined; by convention t = +-inf, p = 0 when the
    means differ (the difference is certain) and t = 0, p = 1 when they do not.
    """
    if n_a < 2 or n_b < 2:
        raise ValueError(f"Welch's test needs at least 2 values per sample, got {n_a} and {n_b}")
    if sd_a < 0 or sd_b < 0:
        raise ValueError("standard deviations are never negative")
    va, vb = sd_a * sd_a / n_a, sd_b * sd_b / n_b
    diff = mean_a - mean_b
    se = math.sqrt(va + vb)
    if se == 0.0:
        if diff == 0.0:
            return Welch(0.0, math.nan, 1.0, 0.0, 0.0)
        return Welch(math.copysign(math.inf, diff), math.nan, 0.0, diff, 0.0)
    df = (va + vb) ** 2 / (va * va / (n_a - 1) + vb * vb / (n_b - 1))
    t = diff / se
    from scipy.stats import t as student_t

    return Welch(t, df, float(2.0 * student_t.sf(abs(t), df)), diff, se)


def welch_test(a: ArrayLike, b: ArrayLike) -> Welch:
    """Welch's t-test of mean(a) - mean(b) on raw values (scipy.stats.ttest_ind(a, b,
    equal_var=False) is the reference)."""
    x, y = _finite(a, "a"), _finite(b, "b")
    if x.size < 2 or y.size < 2:
        raise ValueError(f"Welch's test needs at least 2 values per sample, got {x.size} and {y.size}")
    return welch_from_stats(float(np.mean(x)), float(np.std(x, ddof=1)), int(x.size),
                            float(np.mean(y)), float(np.std(y, ddof=1)), int(y.size))


def mean_difference_ci(w: Welch, level: float = 0.95) -> tuple[float, float]:
    """Confidence interval of mean_a - mean_b: diff +- t_{(1+level)/2, df} * se (Welch).
    A zero-width interval when both samples are constant."""
    if w.se == 0.0:
        return (w.diff, w.diff)
    from scipy.stats import t as student_t

    half = float(student_t.ppf(0.5 + level / 2.0, w.df)) * w.se
    return (w.diff - half, w.diff + half)


# ---------------------------------------------------------------------------------------------
# Brown-Forsythe


@dataclass(frozen=True)
class BrownForsythe:
    """Brown-Forsythe W with its F degrees of freedom and p, and each group's mean absolute
    deviation from its median (mean z): the spread the test actually compares."""

    w: float
    df1: int
    df2: int
    p: float
    mean_abs_dev: tuple[float, ...]


def abs_dev_from_median(values: ArrayLike) -> NDArray[np.float64]:
    """z = |y - median(y)|, the Brown-Forsythe transform of one group."""
    y = _finite(values, "values")
    return np.abs(y - np.median(y))


def brown_forsythe(*groups: ArrayLike) -> BrownForsythe:
    """Brown-Forsythe test of equal spreads for k >= 2 groups (scipy.stats.levene(*groups,
    center="median") is the reference):

        W = (N - k)/(k - 1) * sum_i n_i (zbar_i - zbar)^2 / sum_i sum_j (z_ij - zbar_i)^2,
        W ~ F(k - 1, N - k) under equal spreads.

    When every z equals its group mean (no within-group scatter) W is undefined: by convention
    W = inf, p = 0 if the group means of z differ, and W = 0, p = 1 if they do not.
    """
    if len(groups) < 2:
        raise ValueError("Brown-Forsythe needs at least 2 groups")
    zs = [abs_dev_from_median(g) for g in groups]
    if any(z.size < 2 for z in zs):
        raise ValueError(f"Brown-Forsythe needs at least 2 values per group, got {[z.size for z in zs]}")
    k, n_total = len(zs), sum(z.size for z in zs)
    means = [float(np.mean(z)) for z in zs]
    grand = float(np.mean(np.concatenate(zs)))
    between = sum(z.size * (m - grand) ** 2 for z, m in zip(zs, means))
    within = sum(float(np.sum((z - m) ** 2)) for z, m in zip(zs, means))
    df1, df2 = k - 1, n_total - k
    # No scatter within the groups (up to rounding, which leaves ~1e-32 of the squared scale):
    # W is 0/0 or x/0; decide it from whether the groups' mean z differ beyond rounding too.
    rounding = 1e-24 * max(grand * grand * n_total, 1e-300)
    if within <= rounding:
        if between <= rounding:
            return BrownForsythe(0.0, df1, df2, 1.0, tuple(means))
        return BrownForsythe(math.inf, df1, df2, 0.0, tuple(means))
    w = (df2 / df1) * between / within
    from scipy.stats import f

    return BrownForsythe(w, df1, df2, float(f.sf(w, df1, df2)), tuple(means))


# ---------------------------------------------------------------------------------------------
# Power and runs needed


def welch_power(n: int, delta: float, sd_a: float, sd_b: float, alpha: float = 0.05) -> float:
    """Approximate power of the two-sided Welch test with n runs per side to detect a true mean
    difference delta when the true sds are sd_a and sd_b (noncentral t with the
    Welch-Satterthwaite df; see the module docstring)."""
    if n < 2:
        raise ValueError(f"power needs at least 2 runs per side, got {n}")
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must be between 0 and 1, got {alpha}")
    va, vb = sd_a * sd_a, sd_b * sd_b
    if va + vb == 0.0:
        return 1.0 if delta != 0.0 else alpha
    df = (n - 1) * (va + vb) ** 2 / (va * va + vb * vb)
    ncp = abs(delta) / math.sqrt((va + vb) / n)
    from scipy.stats import nct, norm, t

    crit = float(t.ppf(1.0 - alpha / 2.0, df))
    upper, lower = float(nct.sf(crit, df, ncp)), float(nct.cdf(-crit, df, ncp))
    # scipy's noncentral t gives NaN far out in a tail (e.g. the lower tail at ncp 10, df 300);
    # there the normal approximation of that tail is as good as exact and is about zero or one.
    if not math.isfinite(upper):
        upper = float(norm.sf(crit - ncp))
    if not math.isfinite(lower):
        lower = float(norm.cdf(-crit - ncp))
    return min(1.0, upper + lower)


def runs_needed(delta: float, sd_a: float, sd_b: float, alpha: float = 0.05, power: float = POWER,
                n_max: int = MAX_RUNS) -> int | None:
    """The fewest runs per side (equal on both) with which Welch's test detects a mean
    difference delta with the given power; None when even n_max runs per side would not (a
    difference of zero is never detected)."""
    if not 0.0 < power < 1.0:
        raise ValueError(f"power must be between 0 and 1, got {power}")
    if delta == 0.0 or not math.isfinite(delta):
        return None
    if welch_power(2, delta, sd_a, sd_b, alpha) >= power:
        return 2
    # Doubling, then bisection: power grows with n, so power(low) < target <= power(high).
    low, high = 2, 4
    while welch_power(high, delta, sd_a, sd_b, alpha) < power:
        if high >= n_max:
            return None
        low, high = high, min(2 * high, n_max)
    while high - low > 1:
        mid = (low + high) // 2
        if welch_power(mid, delta, sd_a, sd_b, alpha) >= power:
            high = mid
        else:
            low = mid
    return high


# ---------------------------------------------------------------------------------------------
# Direction: what "better" means for a metric


def is_error_like(metric: str) -> bool:
    """Names whose magnitude is a miss: angle_error_deg, error_rms_pct, heading_drift_deg, ..."""
    words = metric.lower().split("_")
    return "sd" in words or any(word in metric.lower() for word in _ERROR_WORDS)


def mean_goal(metric: str, checks: Mapping[str, Any]) -> tuple[str, float] | None:
    """How a mean is scored (lower score is better), from the metric's expectations and name:
    ("middle", m) closer to m; ("abs", 0) smaller |mean|; ("low", 0) smaller; ("high", 0)
    larger; None when no direction is known. Rules in the module docstring."""
    for key in ("mean_within", "ci_within"):
        window = checks.get(key)
        if isinstance(window, (list, tuple)) and len(window) == 2:
            return ("middle", (float(window[0]) + float(window[1])) / 2.0)
    if "min" in checks and "max" in checks:
        return ("middle", (float(checks["min"]) + float(checks["max"])) / 2.0)
    if "mean_abs_max" in checks or is_error_like(metric):
        return ("abs", 0.0)
    if "max" in checks:
        return ("low", 0.0)
    if "min" in checks:
        return ("high", 0.0)
    return None


def _score(goal: tuple[str, float], mean: float) -> float:
    kind, target = goal
    if kind == "middle":
        return abs(mean - target)
    if kind == "abs":
        return abs(mean)
    return mean if kind == "low" else -mean


def _direction(goal: tuple[str, float] | None, before: float, after: float) -> Verdict:
    """better/worse by the goal's score; "changed" with no goal or an exact tie."""
    if goal is None:
        return "changed"
    a, b = _score(goal, before), _score(goal, after)
    return "better" if b < a else "worse" if b > a else "changed"


def deciding_metrics(expect: Mapping[str, Any], metrics: Sequence[str]) -> list[str]:
    """The metrics that decide a case (see the module docstring): those with expectations
    (spread expectations count for their base metric) and the error-like ones; all of them when
    none qualifies."""
    named: set[str] = set()
    for name in expect:
        named.add(name)
        for suffix, base in (("_spread_2d_mm", None), ("_spread_mm", "_mm"), ("_spread_deg", "_deg")):
            if name.endswith(suffix):
                stem = name[: -len(suffix)]
                named.update([stem + "_x_mm", stem + "_y_mm"] if base is None else [stem + base])
                break
    chosen = [m for m in metrics if m in named or is_error_like(m)]
    return chosen if chosen else list(metrics)


# ---------------------------------------------------------------------------------------------
# One metric, one case


def holm_adjust(pvalues: Sequence[float]) -> list[float]:
    """Holm's step-down adjusted p-values (Holm 1979, Scandinavian Journal of Statistics
    6(2):65-70): with the m p-values sorted, p_adj(i) = max over j <= i of min(1, (m - j + 1) p(j)).
    Rejecting where p_adj < alpha keeps the chance of any false finding in the family below
    alpha, whatever the dependence between the tests."""
    order = sorted(range(len(pvalues)), key=lambda k: pvalues[k])
    m = len(pvalues)
    adjusted = [1.0] * m
    running = 0.0
    for rank, k in enumerate(order):
        running = max(running, min(1.0, (m - rank) * pvalues[k]))
        adjusted[k] = running
    return adjusted


@dataclass(frozen=True)
class PartComparison:
    """One test (mean or spread) of one metric: its verdict and the numbers behind it.

    p            the test's own p-value; p_adjusted the one that decided (Holm-adjusted within
                 its family, or p itself for a metric compared alone)
    runs_needed  runs per side that would settle it (None: unknown or more than MAX_RUNS);
                 set when the verdict is "not enough runs" or "same"
    more_runs    (baseline, current) runs still to make to reach runs_needed; None when unknown
    why          one line saying what decided it
    power_alpha  the alpha runs_needed is planned at: alpha/m for a family of m tests (None when
                 no runs were planned)
    """

    verdict: Verdict
    p: float | None
    p_adjusted: float | None
    runs_needed: int | None
    more_runs: tuple[int, int] | None
    why: str
    power_alpha: float | None = None


@dataclass(frozen=True)
class MetricTests:
    """The numbers of one metric's comparison before any verdict: summaries, both tests, effect
    sizes (diff = current - baseline, its Welch 95 % CI; sd ratio current / baseline, None when
    the baseline sd is 0; sd difference). A test is None when there are too few runs for it."""

    name: str
    baseline: NDArray[np.float64]
    current: NDArray[np.float64]
    goal: tuple[str, float] | None
    n: tuple[int, int]
    mean: tuple[float, float]
    sd: tuple[float, float]  # NaN when n < 2
    diff: float
    diff_ci95: tuple[float, float] | None
    welch: Welch | None
    sd_ratio: float | None
    sd_diff: float | None
    brown_forsythe: BrownForsythe | None

    @property
    def pvalues(self) -> tuple[float | None, float | None]:
        return (self.welch.p if self.welch else None,
                self.brown_forsythe.p if self.brown_forsythe else None)


@dataclass(frozen=True)
class MetricComparison:
    tests: MetricTests
    mean_part: PartComparison
    spread_part: PartComparison
    verdict: Verdict

    @property
    def name(self) -> str:
        return self.tests.name


def worst_verdict(verdicts: Sequence[Verdict]) -> Verdict:
    """The combined verdict: worse > better > not enough runs > changed > same ("same" if empty)."""
    for v in VERDICTS:
        if v in verdicts:
            return v  # type: ignore[return-value]
    return "same"


def _more(needed: int | None, n_a: int, n_b: int) -> tuple[int, int] | None:
    return None if needed is None else (max(0, needed - n_a), max(0, needed - n_b))


def _p_text(p: float, p_adj: float) -> str:
    return f"p = {p:.3g}" if p_adj == p else f"p = {p:.3g}, {p_adj:.3g} after Holm's correction"


def _power_text(alpha: float, family_size: int) -> str:
    """At which alpha the runs were planned, e.g. "80 % power at alpha/26 = 0.00192"."""
    if family_size == 1:
        return f"{POWER:.0%} power at alpha {alpha:.3g}"
    return f"{POWER:.0%} power at alpha/{family_size} = {alpha / family_size:.3g} for {family_size} tests"


def _undecided(p: float, p_adj: float, needed: int | None, n_a: int, n_b: int, what: str,
               alpha: float, family_size: int) -> PartComparison:
    """A non-significant test: "same" if the runs were enough for a change that matters (planned
    at alpha/family_size, see the module docstring)."""
    ps, power = _p_text(p, p_adj), _power_text(alpha, family_size)
    at = alpha / family_size
    if needed is not None and min(n_a, n_b) >= needed:
        return PartComparison("same", p, p_adj, needed, (0, 0),
                              f"{what}: no significant change ({ps}), and {needed} runs per side were "
                              f"enough to see one that matters ({power})", at)
    if needed is None:
        return PartComparison("not enough runs", p, p_adj, None, None,
                              f"{what}: no significant change ({ps}); more than {MAX_RUNS} runs per side "
                              f"would be needed to tell ({power})", at)
    return PartComparison("not enough runs", p, p_adj, needed, _more(needed, n_a, n_b),
                          f"{what}: no significant change ({ps}); {needed} runs per side would settle it "
                          f"({power})", at)


def _mean_part(t: MetricTests, p_adj: float | None, alpha: float, family_size: int) -> PartComparison:
    n_a, n_b = t.n
    w = t.welch
    if w is None or p_adj is None:
        return PartComparison("not enough runs", None, None, None, (max(0, 2 - n_a), max(0, 2 - n_b)),
                              "mean: needs at least 2 finished runs on each side")
    if p_adj < alpha:
        verdict = _direction(t.goal, t.mean[0], t.mean[1])
        return PartComparison(verdict, w.p, p_adj, None, None, f"mean moved (Welch {_p_text(w.p, p_adj)})")
    sd_a, sd_b = t.sd
    margin = SAME_MEAN_SD * math.sqrt((sd_a * sd_a + sd_b * sd_b) / 2.0)
    if margin == 0.0 and w.diff == 0.0:  # two identical constant samples
        return PartComparison("same", w.p, p_adj, None, (0, 0), "mean: both sides constant and equal")
    needed = runs_needed(max(abs(w.diff), margin), sd_a, sd_b, alpha / family_size)
    return _undecided(w.p, p_adj, needed, n_a, n_b, "mean", alpha, family_size)


def _spread_part(t: MetricTests, p_adj: float | None, alpha: float, family_size: int) -> PartComparison:
    n_a, n_b = t.n
    bf = t.brown_forsythe
    if bf is None or p_adj is None:
        # With 2 runs both deviations from the median are equal: there is no scatter to compare.
        return PartComparison("not enough runs", None, None, None, (max(0, 3 - n_a), max(0, 3 - n_b)),
                              "spread: needs at least 3 finished runs on each side")
    z_a, z_b = bf.mean_abs_dev
    if p_adj < alpha:
        verdict: Verdict = "worse" if z_b > z_a else "better"
        return PartComparison(verdict, bf.p, p_adj, None, None,
                              f"spread changed (Brown-Forsythe {_p_text(bf.p, p_adj)})")
    za, zb = abs_dev_from_median(t.baseline), abs_dev_from_median(t.current)
    margin = (SAME_SD_RATIO - 1.0) * min(z_a, z_b)
    effect = max(abs(z_b - z_a), margin)
    if effect == 0.0:  # no scatter on either side
        return PartComparison("same", bf.p, p_adj, None, (0, 0), "spread: no scatter on either side")
    needed = runs_needed(effect, float(np.std(za, ddof=1)), float(np.std(zb, ddof=1)), alpha / family_size)
    return _undecided(bf.p, p_adj, needed, n_a, n_b, "spread", alpha, family_size)


def metric_tests(name: str, baseline: ArrayLike, current: ArrayLike,
                 checks: Mapping[str, Any] | None = None) -> MetricTests:
    """Both tests and the effect sizes of one metric's per-run values (finite; runs that did not
    measure it left out). checks are the suite's expectations on this metric (e.g.
    {"mean_within": [76, 88]}); they decide what "better" means."""
    base, cur = _finite(baseline, f"{name} baseline"), _finite(current, f"{name} current")
    if base.size == 0 or cur.size == 0:
        raise ValueError(f"{name}: no values on one side (baseline {base.size}, current {cur.size})")
    n = (int(base.size), int(cur.size))
    mean = (float(np.mean(base)), float(np.mean(cur)))
    sd_a, sd_b = (float(np.std(x, ddof=1)) if x.size >= 2 else math.nan for x in (base, cur))
    w = welch_test(cur, base) if min(n) >= 2 else None
    return MetricTests(
        name, base, cur, mean_goal(name, checks or {}), n, mean, (sd_a, sd_b), mean[1] - mean[0],
        mean_difference_ci(w) if w is not None else None, w,
        sd_b / sd_a if min(n) >= 2 and sd_a > 0 else None,
        sd_b - sd_a if min(n) >= 2 else None,
        brown_forsythe(base, cur) if min(n) >= 3 else None,
    )


def judge_metric(t: MetricTests, alpha: float = 0.05,
                 p_adjusted: tuple[float | None, float | None] | None = None,
                 family_size: int = 1) -> MetricComparison:
    """Verdicts of one metric's two tests, decided on p_adjusted (mean, spread) when given, else
    on the tests' own p-values. family_size is the number of tests those p-values were adjusted
    over: the runs needed are planned at alpha/family_size (module docstring, "Many tests")."""
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must be between 0 and 1, got {alpha}")
    if family_size < 1:
        raise ValueError(f"a family has at least 1 test, got {family_size}")
    p_mean, p_spread = p_adjusted if p_adjusted is not None else t.pvalues
    mean_part = _mean_part(t, p_mean, alpha, family_size)
    spread_part = _spread_part(t, p_spread, alpha, family_size)
    return MetricComparison(t, mean_part, spread_part, worst_verdict([mean_part.verdict, spread_part.verdict]))


def compare_metric(name: str, baseline: ArrayLike, current: ArrayLike,
                   checks: Mapping[str, Any] | None = None, alpha: float = 0.05) -> MetricComparison:
    """One metric compared on its own (each test at alpha, no correction)."""
    return judge_metric(metric_tests(name, baseline, current, checks), alpha)


def judge_family(family: Sequence[MetricTests], alpha: float = 0.05) -> list[MetricComparison]:
    """Verdicts of several metrics whose tests form one family: every mean and spread test's p is
    Holm-adjusted over all the family's m tests, so the chance that any of them reports a change
    that is not there stays below alpha; the runs needed are planned at alpha/m to match."""
    raw = [(k, j, p) for k, t in enumerate(family) for j, p in enumerate(t.pvalues) if p is not None]
    adjusted = holm_adjust([p for _, _, p in raw])
    per_metric: list[list[float | None]] = [[None, None] for _ in family]
    for (k, j, _), p_adj in zip(raw, adjusted):
        per_metric[k][j] = p_adj
    size = max(1, len(raw))
    return [judge_metric(t, alpha, (p[0], p[1]), size) for t, p in zip(family, per_metric)]


def case_verdict(metrics: Sequence[MetricComparison], deciding: Sequence[str]) -> tuple[Verdict, tuple[int, int] | None]:
    """A case's verdict from its deciding metrics, and for "not enough runs" the most runs still
    needed per side to settle every deciding metric (None when one of them cannot say)."""
    chosen = [m for m in metrics if m.name in deciding]
    if not chosen:
        return "not enough runs", None
    verdict = worst_verdict([m.verdict for m in chosen])
    if verdict != "not enough runs":
        return verdict, None
    more = [p.more_runs for m in chosen for p in (m.mean_part, m.spread_part) if p.verdict == "not enough runs"]
    if any(m is None for m in more):
        return verdict, None
    return verdict, (max(m[0] for m in more), max(m[1] for m in more))  # type: ignore[index]
