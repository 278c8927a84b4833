"""Deciding a suite's expectations from per-run measurements.

A suite states expectations as a nested table, metric name -> check name -> limit::

    {"stop_spread_mm": {"max": 6.0},
     "stop_mm": {"mean_within": [75, 85], "sd_max": 2.0},
     "angle_error_deg": {"mean_abs_max": 1.5, "sd_max": 1.0},
     "error_rms_pct": {"max": 12}}

Measurements are one value per finished run (the caller leaves out runs that did not finish).
Each check becomes a `Check` whose text carries the numbers that decided it, so a failed verdict
can be read without opening the data.

Spread metrics are derived, not measured: `<base>_spread_mm` / `<base>_spread_deg` is the
ISO 9283-style repeatability of the per-run values of `<base>_mm` / `<base>_deg` (position RP
l_bar + 3 S_l for millimetres, orientation RP 3 S with wrap-around for degrees), and
`<base>_spread_2d_mm` is the 2-D position RP of the (n, 2) points in `<base>_xy_mm`. When the base
is absent but the spread name itself was measured, its per-run values are checked as usual.

Nothing here raises on a bad suite or bad data: `validate_expectations` lists problems for the
suite loader, and `evaluate` turns anything it cannot decide into a failed check that says why,
so a session of twenty runs never ends in a traceback at the verdict.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass
from numbers import Real
from typing import Any, Literal

import numpy as np

from .stats import Summary, iso9283_rp, orientation_rp, summarize

__all__ = ["CHECK_KINDS", "Check", "evaluate", "validate_expectations", "verdict", "unit_of"]

# check name -> what its limit is: "number" or "interval" ([low, high]).
CHECK_KINDS: dict[str, str] = {
    "max": "number",
    "min": "number",
    "mean_within": "interval",
    "mean_abs_max": "number",
    "sd_max": "number",
    "range_max": "number",
    "ci_within": "interval",
}
_NEVER_NEGATIVE = {"mean_abs_max": "|mean|", "sd_max": "an sd", "range_max": "a range"}
_NON_NEGATIVE = set(_NEVER_NEGATIVE)
_NEEDS_TWO = {"sd_max", "ci_within", "range_max"}
_SPREAD_CHECKS = {"max", "min"}

# Checks that bound one number from the summary: (how the text names it, how to get it).
_UPPER_BOUNDS: dict[str, tuple[str, Callable[[Summary], float]]] = {
    "mean_abs_max": ("|mean|", lambda s: abs(s.mean)),
    "sd_max": ("sd", lambda s: s.sd),
}

_UNITS = (("_mm", "mm"), ("_deg", "deg"), ("_pct", "%"), ("_s", "s"))


def unit_of(metric: str) -> str:
    """Unit from the name's suffix (names carry their unit: stop_mm, turn_deg, error_rms_pct)."""
    for suffix, unit in _UNITS:
        if metric.endswith(suffix):
            return unit
    return ""


@dataclass(frozen=True)
class Check:
    """One decided expectation.

    expectation  "metric.check", e.g. "stop_mm.mean_within"
    passed       the verdict of this check
    measured     the deciding number (a [low, high] list for ci_within), None when nothing was
                 measured
    limit        the suite's limit as given (a number or [low, high])
    text         one line with the deciding numbers, for terminal and reports
    n            how many runs' values it was decided on
    """

    expectation: str
    passed: bool
    measured: float | list[float] | None
    limit: Any
    text: str
    n: int = 0

    def as_dict(self) -> dict[str, Any]:
        """Plain dict for JSON (NaN cannot occur in measured: undecidable checks carry None)."""
        return asdict(self)


# ---------------------------------------------------------------------------------------------
# Spread metrics


def _spread_base(metric: str) -> tuple[str, Callable[[np.ndarray], float], str] | None:
    """(base metric, RP function, label) for a spread metric name, else None."""
    if metric.endswith("_spread_2d_mm"):
        return metric[: -len("_spread_2d_mm")] + "_xy_mm", iso9283_rp, "2-D RP"
    if metric.endswith("_spread_mm"):
        return metric[: -len("_spread_mm")] + "_mm", iso9283_rp, "RP"
    if metric.endswith("_spread_deg"):
        return metric[: -len("_spread_deg")] + "_deg", orientation_rp, "RP"
    return None


def _is_spread_name(metric: str) -> bool:
    return _spread_base(metric) is not None


# Every metric harness.measure gives a built-in action's run (routines add their own), and the
# 2-D stop position the statistics build from stop_x_mm and stop_y_mm.
MEASURED_METRICS = ("stop_mm", "edge_mm", "overrun_mm", "turn_deg", "angle_error_deg", "angle_error_abs_deg",
                    "distance_mm", "heading_drift_deg", "error_rms_pct", "duration_s", "stop_x_mm",
                    "stop_y_mm", "stop_xy_mm")


def metric_base(metric: str) -> str:
    """The measured metric an expectation reads: itself, or a spread's base (stop_spread_mm -> stop_mm)."""
    spread = _spread_base(metric)
    return spread[0] if spread is not None else metric


# ---------------------------------------------------------------------------------------------
# Validation


def _is_number(v: Any) -> bool:
    return isinstance(v, Real) and not isinstance(v, bool) and math.isfinite(float(v))


def _limit_problem(metric: str, check: str, limit: Any) -> str | None:
    """Why this one limit is unusable, or None."""
    if check not in CHECK_KINDS:
        return f"unknown check {check!r} (expected one of {', '.join(CHECK_KINDS)})"
    spread = _is_spread_name(metric)
    if spread and check not in _SPREAD_CHECKS:
        base = _spread_base(metric)
        return (f"{check} does not apply to a spread (one value per case); "
                f"use max or min here, or put {check} on {base[0] if base else metric}")
    if CHECK_KINDS[check] == "number":
        if not _is_number(limit):
            return f"expected a finite number, got {limit!r}"
        if float(limit) < 0 and (check in _NON_NEGATIVE or spread):
            what = "a spread" if spread else _NEVER_NEGATIVE[check]
            return f"expected a limit >= 0 ({what} is never negative), got {limit!r}"
        return None
    if (not isinstance(limit, (list, tuple)) or len(limit) != 2
            or not all(_is_number(v) for v in limit)):
        return f"expected [low, high] (two finite numbers), got {limit!r}"
    if float(limit[0]) > float(limit[1]):
        return f"expected low <= high, got [{_g(limit[0])}, {_g(limit[1])}]"
    return None


def validate_expectations(expectations: Any, prefix: str = "") -> list[str]:
    """Problems in a suite's expectation table, each naming its key path; empty when usable.

    Returns messages instead of raising so the suite loader can report every problem at once
    with the file name. `prefix` is prepended to key paths (e.g. "cases.turn90.expect").
    """
    def path(*keys: str) -> str:
        return ".".join(k for k in (prefix, *keys) if k)

    if not isinstance(expectations, Mapping):
        where = prefix or "expectations"
        return [f"{where}: expected a table of metric -> checks, got {type(expectations).__name__}"]
    problems: list[str] = []
    for metric, checks in expectations.items():
        if not isinstance(metric, str) or not metric:
            problems.append(f"{path(str(metric))}: expected a metric name")
            continue
        if not isinstance(checks, Mapping):
            problems.append(f"{path(metric)}: expected a table of checks such as "
                            f"{{max = 6.0}}, got {checks!r}")
            continue
        for check, limit in checks.items():
            problem = _limit_problem(metric, str(check), limit)
            if problem:
                problems.append(f"{path(metric, str(check))}: {problem}")
        lo, hi = checks.get("min"), checks.get("max")
        if _is_number(lo) and _is_number(hi) and float(lo) > float(hi):
            problems.append(f"{path(metric)}: min {_g(lo)} is greater than max {_g(hi)}; "
                            f"no run can pass both")
    return problems


# ---------------------------------------------------------------------------------------------
# Evaluation


def _g(v: Any) -> str:
    """A limit as the user wrote it: 6.0 -> 6, 1.5 -> 1.5."""
    return f"{float(v):g}"


def _limit_text(limit: Any) -> str:
    if isinstance(limit, (list, tuple)):
        return "[" + ", ".join(_g(v) if _is_number(v) else repr(v) for v in limit) + "]"
    return _g(limit) if _is_number(limit) else repr(limit)


def _cmp(a: float, b: float) -> int:
    return (a > b) - (a < b)


def _fmt(x: float, *limits: float) -> str:
    """A measured value, with enough digits that it never seems to sit on the wrong side of a
    limit (sd 0.504 against 0.5 must not print as "0.50 exceeds it")."""
    if x == 0 or not math.isfinite(x):
        return f"{x:.2f}"
    decimals = 2 if abs(x) >= 0.1 else min(12, 1 - math.floor(math.log10(abs(x))))
    while True:
        s = f"{x:.{decimals}f}"
        if decimals >= 12 or all(_cmp(float(s), float(lim)) == _cmp(x, float(lim))
                                 for lim in limits):
            return s
        decimals += 1


def _with_unit(s: str, unit: str) -> str:
    return f"{s} {unit}" if unit else s


def _decide(metric: str, check: str, limit: Any, values: np.ndarray,
            rp: tuple[str, Callable[[np.ndarray], float], str] | None) -> Check:
    """One check on values that are known finite, 1-D (or (n, k) for a 2-D spread) and n >= 1."""
    name = f"{metric}.{check}"
    head = f"{name} {_limit_text(limit)}"
    unit = unit_of(metric)
    n = int(values.shape[0])
    tag = f"(n={n})"

    if rp is not None:  # derived spread: only max and min reach here
        base, fn, label = rp
        value = fn(values)
        lim = float(limit)
        ok = value <= lim if check == "max" else value >= lim
        side = "is within" if ok else ("exceeds it" if check == "max" else "is below it")
        text = f"{head}: {label} {_with_unit(_fmt(value, lim), unit)} of {base} {tag} {side}"
        return Check(name, ok, value, limit, text, n)

    s = summarize(values)
    if check in ("max", "min"):
        lim = float(limit)
        if check == "max":
            value, outside = s.max, int(np.count_nonzero(values > lim))
            word, side = "largest", "exceeds it"
            extra = f", {outside} above" if outside else ""
        else:
            value, outside = s.min, int(np.count_nonzero(values < lim))
            word, side = "smallest", "is below it"
            extra = f", {outside} below" if outside else ""
        ok = outside == 0
        text = (f"{head}: {word} {_with_unit(_fmt(value, lim), unit)} (n={n}{extra}) "
                f"{'is within' if ok else side}")
        return Check(name, ok, value, limit, text, n)
    if check == "mean_within":
        low, high = float(limit[0]), float(limit[1])
        ok = low <= s.mean <= high
        text = (f"{head}: mean {_with_unit(_fmt(s.mean, low, high), unit)} {tag} "
                f"{'is inside' if ok else 'is outside'}")
        return Check(name, ok, s.mean, limit, text, n)
    if check in _UPPER_BOUNDS:
        label, pick = _UPPER_BOUNDS[check]
        lim, value = float(limit), pick(s)
        ok = value <= lim
        text = (f"{head}: {label} {_with_unit(_fmt(value, lim), unit)} {tag} "
                f"{'is within' if ok else 'exceeds it'}")
        return Check(name, ok, value, limit, text, n)
    if check == "range_max":
        lim = float(limit)
        ok = s.range <= lim
        text = (f"{head}: range {_with_unit(_fmt(s.range, lim), unit)} "
                f"({_fmt(s.min)} to {_fmt(s.max)}, n={n}) {'is within' if ok else 'exceeds it'}")
        return Check(name, ok, s.range, limit, text, n)
    if check == "ci_within":
        low, high = float(limit[0]), float(limit[1])
        ok = low <= s.ci95_low and s.ci95_high <= high
        ci = f"[{_fmt(s.ci95_low, low, high)}, {_fmt(s.ci95_high, low, high)}]"
        text = (f"{head}: 95% CI of the mean {_with_unit(ci, unit)} (mean {_fmt(s.mean)}, n={n}) "
                f"{'is inside' if ok else 'is not inside'}")
        return Check(name, ok, [s.ci95_low, s.ci95_high], limit, text, n)
    raise AssertionError(check)  # unreachable: validated before


def _failed(metric: str, check: str, limit: Any, why: str, n: int = 0) -> Check:
    name = f"{metric}.{check}"
    return Check(name, False, None, limit, f"{name} {_limit_text(limit)}: {why}", n)


def _evaluate_one(metric: str, check: str, limit: Any,
                  measurements: Mapping[str, Any]) -> Check:
    problem = _limit_problem(metric, check, limit)
    if problem:
        return _failed(metric, check, limit, f"invalid expectation: {problem}")

    rp = _spread_base(metric)
    if rp is not None and rp[0] not in measurements and metric in measurements:
        rp = None  # the spread itself was measured per run: check those values
    source = rp[0] if rp is not None else metric
    if source not in measurements or measurements[source] is None:
        need = f" (needed for {metric})" if source != metric else ""
        return _failed(metric, check, limit, f"no finished runs measured {source}{need}")

    try:
        values = np.asarray(measurements[source], dtype=np.float64)
    except (TypeError, ValueError):
        return _failed(metric, check, limit, f"{source} is not numeric")
    want_2d = rp is not None and rp[0].endswith("_xy_mm")
    if want_2d:
        if values.ndim != 2 or values.shape[1] != 2:
            return _failed(metric, check, limit,
                           f"{source} must be (n, 2) points, got shape {values.shape}")
    elif values.ndim != 1:
        return _failed(metric, check, limit,
                       f"{source} must be one value per run, got shape {values.shape}")
    n = int(values.shape[0])
    if n == 0:
        need = f" (needed for {metric})" if source != metric else ""
        return _failed(metric, check, limit, f"no finished runs measured {source}{need}")
    bad = int(np.count_nonzero(~np.isfinite(values).reshape(n, -1).all(axis=1)))
    if bad:
        return _failed(metric, check, limit,
                       f"{source} has {bad} NaN or infinite value(s) among {n} runs; "
                       f"leave out runs that were not measured", n)
    if n < 2 and (rp is not None or check in _NEEDS_TWO):
        what = "a spread" if rp is not None else check
        return _failed(metric, check, limit,
                       f"{what} needs at least 2 finished runs of {source}, got {n}", n)
    return _decide(metric, check, limit, values, rp)


def evaluate(expectations: Mapping[str, Mapping[str, Any]],
             measurements: Mapping[str, Any]) -> list[Check]:
    """Decide every expectation, in the suite's order.

    measurements maps a metric name to one value per finished run (an (n, 2) array for
    `<base>_xy_mm`). Missing data, too few runs, non-finite values and invalid expectations all
    become failed checks whose text says what is missing, never exceptions.
    """
    if not isinstance(expectations, Mapping):
        return [Check("expectations", False, None, None, validate_expectations(expectations)[0])]
    checks: list[Check] = []
    for metric, table in expectations.items():
        if not isinstance(table, Mapping):
            checks.append(Check(str(metric), False, None, table,
                                f"{metric}: invalid expectation: expected a table of checks, "
                                f"got {table!r}"))
            continue
        for check, limit in table.items():
            checks.append(_evaluate_one(str(metric), str(check), limit, measurements))
    return checks


def verdict(checks: list[Check]) -> Literal["pass", "fail"]:
    """"fail" if any check failed, else "pass" (also with no checks: the caller fails cases whose
    runs did not finish, which checks cannot see)."""
    return "fail" if any(not c.passed for c in checks) else "pass"
