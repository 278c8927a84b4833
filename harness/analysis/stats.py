"""Repeatability statistics: summaries, ISO 9283-style repeatability, heading errors.

Small pure functions on numpy arrays; no I/O. Every function refuses NaN and infinity with a
ValueError rather than skipping them: a run that produced no number must be excluded by the caller
on purpose, never averaged away here.

scipy.stats is imported inside the functions that need it, because importing it costs about a
second and most CLI commands never compute a confidence interval.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "Summary",
    "summarize",
    "iso9283_rp",
    "iso9283_ap",
    "orientation_rp",
    "wrap_deg",
    "angle_errors",
    "angle_error_stats",
    "rms",
]

_NAN = float("nan")


def _finite_array(values: ArrayLike, what: str = "values") -> NDArray[np.float64]:
    """As a float64 array, refusing NaN/inf so that bad data cannot be averaged silently."""
    arr = np.asarray(values, dtype=np.float64)
    if not np.all(np.isfinite(arr)):
        bad = int(np.count_nonzero(~np.isfinite(arr)))
        raise ValueError(f"{what}: {bad} of {arr.size} are NaN or infinite")
    return arr


@dataclass(frozen=True)
class Summary:
    """n, mean, sample sd, extremes and the 95 % confidence interval of the mean.

    sd uses n - 1 (the sample standard deviation every published repeatability figure uses).
    sd and the interval are NaN when n < 2; everything is NaN when n == 0.
    """

    n: int
    mean: float
    sd: float
    min: float
    max: float
    range: float
    ci95_low: float
    ci95_high: float

    def as_dict(self) -> dict[str, Any]:
        """Plain dict for JSON: NaN becomes None (JSON has no NaN)."""
        return {k: (None if isinstance(v, float) and math.isnan(v) else v)
                for k, v in asdict(self).items()}


def summarize(values: ArrayLike) -> Summary:
    """Summary of one value per run.

    The variance uses the corrected two-pass algorithm (sum of squared deviations from the mean,
    minus the rounding correction (sum of deviations)^2 / n), on deviations scaled by the
    largest one. The one-pass textbook formula
    (sum x^2 - n mean^2) loses every digit when the values share a large offset: on NIST StRD
    NumAcc4 it gives 0.178885 instead of 0.1.
    """
    x = _finite_array(values).ravel()
    n = int(x.size)
    if n == 0:
        return Summary(0, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN)
    lo, hi = float(x.min()), float(x.max())
    mean = float(np.mean(x))
    d = x - mean
    # One refinement step: the deviations' own mean is the rounding error of the first mean.
    mean += float(np.mean(d))
    mean = min(max(mean, lo), hi)  # rounding must never put the mean outside the data
    if n < 2:
        return Summary(1, mean, _NAN, lo, hi, 0.0, _NAN, _NAN)
    d = x - mean
    # Deviations are scaled by the largest one so that squaring neither overflows nor underflows.
    scale = float(np.max(np.abs(d)))
    if scale > 0.0:
        d = d / scale
    ss = float(np.dot(d, d)) - float(np.sum(d)) ** 2 / n
    sd = scale * math.sqrt(max(ss, 0.0) / (n - 1))
    from scipy.stats import t

    half = float(t.ppf(0.975, n - 1)) * sd / math.sqrt(n)
    return Summary(n, mean, sd, lo, hi, hi - lo, mean - half, mean + half)


def _points(points: ArrayLike) -> NDArray[np.float64]:
    """Attained points as an (n, k) array, k = 1, 2 or 3 (a 1-D input is one coordinate)."""
    p = _finite_array(points, "points")
    if p.ndim == 1:
        p = p.reshape(-1, 1)
    if p.ndim != 2 or not 1 <= p.shape[1] <= 3:
        raise ValueError(f"points: expected shape (n,), (n, 2) or (n, 3), got {p.shape}")
    return p


def iso9283_rp(points: ArrayLike) -> float:
    """ISO 9283-style position repeatability RP = l_bar + 3 S_l (formula from memory, see
    REFERENCES.md section 1).

    l_j is the distance of attained point j from the barycentre of all attained points, l_bar
    their mean and S_l their sample (n - 1) standard deviation: RP is the radius of the circle
    (sphere) around the barycentre that holds practically every stop. For 1-D input l_j is
    |x_j - mean|, so RP is about 2.6 sd for normal data, not 3 sd. NaN when n < 2. Call it
    "ISO 9283-style": the standard asks for 30 cycles over five poses.
    """
    p = _points(points)
    if p.shape[0] < 2:
        return _NAN
    centre = p.mean(axis=0)
    dist = np.sqrt(np.sum((p - centre) ** 2, axis=1))
    return float(dist.mean() + 3.0 * dist.std(ddof=1))


def iso9283_ap(points: ArrayLike, commanded: ArrayLike) -> float:
    """ISO 9283-style position accuracy AP: distance of the barycentre from the commanded point.

    Accuracy (where the robot stops on average) is kept apart from repeatability (how tightly it
    stops there), because a correction factor fixes the first and nothing but hardware fixes the
    second. NaN when there are no points.
    """
    p = _points(points)
    c = _finite_array(commanded, "commanded").ravel()
    if c.size != p.shape[1]:
        raise ValueError(f"commanded: expected {p.shape[1]} coordinate(s), got {c.size}")
    if p.shape[0] == 0:
        return _NAN
    return float(np.sqrt(np.sum((p.mean(axis=0) - c) ** 2)))


def wrap_deg(a: ArrayLike) -> Any:
    """Wrap angles into (-180, 180] degrees; a float for a scalar input, else an array.

    Headings and turn errors are only meaningful modulo 360: without wrapping, 179 and -179
    are 358 degrees apart instead of 2.
    """
    x = _finite_array(a, "angles")
    r = 180.0 - np.mod(180.0 - x, 360.0)
    # np.mod can round a tiny negative up to 360.0, which would land exactly on -180.
    r = np.where(r <= -180.0, r + 360.0, r)
    return float(r) if r.ndim == 0 else r


def _circmean_deg(a: NDArray[np.float64]) -> float:
    from scipy.stats import circmean

    return float(wrap_deg(float(circmean(a, high=180.0, low=-180.0))))


def orientation_rp(angles_deg: ArrayLike) -> float:
    """ISO 9283-style orientation repeatability RP_a = 3 S_a (formula from memory; reported as
    +/- this value), S_a the sample (n - 1) sd of the angles.

    The deviations are taken from the circular mean and wrapped into (-180, 180] first, so that
    headings straddling +/-180 (179, -179, 178) spread by 1 degree, not by 200. NaN when n < 2.
    """
    a = _finite_array(angles_deg, "angles").ravel()
    if a.size < 2:
        return _NAN
    dev = wrap_deg(a - _circmean_deg(a))
    return float(3.0 * np.std(dev, ddof=1))


def angle_errors(measured_deg: ArrayLike, commanded_deg: ArrayLike) -> NDArray[np.float64]:
    """Signed turn errors measured - commanded, wrapped into (-180, 180] (broadcasts).

    Positive means the robot turned further clockwise than commanded (angles are positive
    clockwise seen from above).
    """
    m = _finite_array(measured_deg, "measured_deg")
    c = _finite_array(commanded_deg, "commanded_deg")
    return np.asarray(wrap_deg(m - c), dtype=np.float64)


def angle_error_stats(errors: ArrayLike) -> dict[str, Any]:
    """Statistics of signed angle errors (they are wrapped again, which is harmless).

    Keys:
      signed    Summary of the signed errors: mean is the bias a correction factor can remove,
                sd the scatter it cannot.
      abs       Summary of |error|: abs.mean is the typical miss regardless of direction.
      mean_abs  |mean of the signed errors| (the bias size, what `mean_abs_max` checks);
                NOT the mean of |error|, which is abs.mean.
      rms       root mean square of the errors (bias and scatter together).
      rp        ISO 9283-style orientation repeatability 3 * signed.sd (NaN when n < 2).
    """
    e = np.asarray(wrap_deg(np.asarray(errors, dtype=np.float64).ravel()), dtype=np.float64)
    signed = summarize(e)
    return {
        "signed": signed,
        "abs": summarize(np.abs(e)),
        "mean_abs": abs(signed.mean),
        "rms": rms(e),
        "rp": 3.0 * signed.sd,
    }


def rms(values: ArrayLike) -> float:
    """Root mean square, e.g. of the line follower's controller error over one run.

    Unlike the sd it keeps a constant offset (a robot riding beside the edge is not tracking
    well). Scaled by the largest magnitude so that squaring cannot overflow. NaN when empty.
    """
    x = _finite_array(values).ravel()
    if x.size == 0:
        return _NAN
    m = float(np.max(np.abs(x)))
    if m == 0.0:
        return 0.0
    return m * math.sqrt(float(np.mean((x / m) ** 2)))
