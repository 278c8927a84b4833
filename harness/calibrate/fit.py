"""Straight-line least-squares fits with t-based confidence intervals, for calibration.

Ordinary least squares, textbook formulas (any regression text; the tests check them against
scipy.stats.linregress, numpy.polyfit and scipy.optimize.curve_fit):

    through the origin   y = b x          b = Sxy0 / Sxx0 (sums of x y and x^2), n - 1 dof,
                                          se(b) = s / sqrt(Sxx0)
    with an intercept    y = a + b x      b = Sxy / Sxx (centred sums), a = ybar - b xbar, n - 2 dof,
                                          se(b) = s / sqrt(Sxx), se(a) = s sqrt(1/n + xbar^2 / Sxx)

s^2 is the residual sum of squares over the degrees of freedom; intervals are estimate
+- t(1 - alpha/2, dof) se. Whether the data ask for an intercept is decided by the two-sided t-test
of a = 0.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray


@dataclass(frozen=True)
class LineFit:
    slope: float
    slope_se: float
    slope_ci: tuple[float, float]
    intercept: float  # 0.0 for a fit through the origin
    intercept_se: float | None  # None for a fit through the origin
    intercept_ci: tuple[float, float] | None
    intercept_p: float | None  # two-sided p of the t-test a = 0
    n: int
    dof: int
    residual_sd: float
    residuals: NDArray[np.float64]
    confidence: float

    @property
    def through_origin(self) -> bool:
        return self.intercept_se is None

    def as_dict(self) -> dict[str, Any]:
        return {
            "model": "y = b x" if self.through_origin else "y = a + b x",
            "slope": self.slope, "slope_se": self.slope_se, "slope_ci": list(self.slope_ci),
            "intercept": self.intercept, "intercept_se": self.intercept_se,
            "intercept_ci": list(self.intercept_ci) if self.intercept_ci else None,
            "intercept_p": self.intercept_p, "n": self.n, "dof": self.dof,
            "residual_sd": self.residual_sd, "confidence": self.confidence,
        }


def _xy(x: ArrayLike, y: ArrayLike, need: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    xa = np.asarray(x, dtype=np.float64).ravel()
    ya = np.asarray(y, dtype=np.float64).ravel()
    if xa.size != ya.size:
        raise ValueError(f"x and y differ in length ({xa.size} and {ya.size})")
    if not (np.all(np.isfinite(xa)) and np.all(np.isfinite(ya))):
        raise ValueError("x and y must be finite numbers")
    if xa.size < need:
        raise ValueError(f"need at least {need} points for this fit, got {xa.size}")
    return xa, ya


def _t(confidence: float, dof: int) -> float:
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be between 0 and 1, got {confidence}")
    from scipy.stats import t  # costly import, only when a fit is made

    return float(t.ppf(0.5 + confidence / 2.0, dof))


def fit_through_origin(x: ArrayLike, y: ArrayLike, confidence: float = 0.95) -> LineFit:
    """y = b x by least squares: the right model when zero input must give zero output."""
    xa, ya = _xy(x, y, 2)
    sxx = float(np.dot(xa, xa))
    if sxx == 0.0:
        raise ValueError("all x are zero: the slope is undefined")
    b = float(np.dot(xa, ya)) / sxx
    res = ya - b * xa
    dof = xa.size - 1
    s = math.sqrt(float(np.dot(res, res)) / dof)
    se = s / math.sqrt(sxx)
    half = _t(confidence, dof) * se
    return LineFit(b, se, (b - half, b + half), 0.0, None, None, None, int(xa.size), dof, s, res, confidence)


def fit_line(x: ArrayLike, y: ArrayLike, confidence: float = 0.95) -> LineFit:
    """y = a + b x by least squares, with the t-test of a = 0."""
    xa, ya = _xy(x, y, 3)
    n = xa.size
    xbar, ybar = float(np.mean(xa)), float(np.mean(ya))
    dx = xa - xbar  # centred sums: no cancellation when x sits far from zero
    sxx = float(np.dot(dx, dx))
    if sxx == 0.0:
        raise ValueError("all x are equal: a slope needs at least two different x values")
    b = float(np.dot(dx, ya - ybar)) / sxx
    a = ybar - b * xbar
    res = ya - (a + b * xa)
    dof = n - 2
    s = math.sqrt(float(np.dot(res, res)) / dof)
    se_b = s / math.sqrt(sxx)
    se_a = s * math.sqrt(1.0 / n + xbar * xbar / sxx)
    tq = _t(confidence, dof)
    if se_a > 0.0:
        from scipy.stats import t

        p = float(2.0 * t.sf(abs(a) / se_a, dof))
    else:
        p = 0.0 if a != 0.0 else 1.0
    return LineFit(b, se_b, (b - tq * se_b, b + tq * se_b), a, se_a, (a - tq * se_a, a + tq * se_a), p,
                   int(n), dof, s, res, confidence)


def fit_with_offset_if_needed(x: ArrayLike, y: ArrayLike, alpha: float = 0.05,
                              confidence: float = 0.95) -> tuple[LineFit, LineFit]:
    """(chosen, with_intercept): the line with an intercept when the t-test finds the intercept
    significant at level alpha, else the line through the origin."""
    with_intercept = fit_line(x, y, confidence)
    if with_intercept.intercept_p is not None and with_intercept.intercept_p < alpha:
        return with_intercept, with_intercept
    return fit_through_origin(x, y, confidence), with_intercept
