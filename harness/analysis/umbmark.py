"""UMBmark: systematic odometry errors from a bidirectional square test.

Source: J. Borenstein, L. Feng, "Measurement and Correction of Systematic Odometry Errors in
Mobile Robots", IEEE Trans. Robotics and Automation 12(6), 1996, pp. 869-880, and J. Borenstein,
H. R. Everett, L. Feng, "Where am I?", Univ. of Michigan report, 1996, pp. 140-141. The formulas
below follow REFERENCES.md section 2 (marked there as recalled, not read from the paper, and
cross-checked by an exact simulation of the square; tests/test_odometry.py repeats that check).

Conventions (the formulas' signs depend on them):
- the robot starts at the origin facing +x, y to its left;
- the clockwise run turns right (the square lies in y < 0), the counter-clockwise run turns left;
- a return error is actual final position minus the odometry's final position;
- E_d = D_R / D_L (right over left wheel diameter), E_b = b_actual / b_nominal (track width).

Alpha is the rotation error per nominal 90 degree turn, beta the heading error each straight leg
gains by curving; both in radians. Alpha > 0: the robot under-turns (E_b > 1). Beta > 0: the
"straight" legs curve left (E_d > 1, right wheel larger).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

QUARTER_TURN_RAD = math.pi / 2.0


def centre_of_gravity(errors: np.ndarray) -> tuple[float, float]:
    """Mean return error (x_cg, y_cg) of one direction's runs; errors is an (n, 2) array."""
    errors = np.asarray(errors, dtype=float)
    if errors.ndim != 2 or errors.shape[1] != 2 or errors.shape[0] == 0:
        raise ValueError("expected an (n, 2) array of return errors with n >= 1")
    x_cg, y_cg = errors.mean(axis=0)
    return float(x_cg), float(y_cg)


def e_max_syst(cg_cw: tuple[float, float], cg_ccw: tuple[float, float]) -> float:
    """UMBmark's figure of merit: the larger distance of the two centres of gravity from zero."""
    return max(math.hypot(*cg_cw), math.hypot(*cg_ccw))


def alpha_beta_from_x(cg_cw: tuple[float, float], cg_ccw: tuple[float, float],
                      side: float) -> tuple[float, float]:
    """(alpha, beta) in radians from the x components of the centres of gravity."""
    x_cw, x_ccw = cg_cw[0], cg_ccw[0]
    return (x_cw + x_ccw) / (-4.0 * side), (x_cw - x_ccw) / (-4.0 * side)


def alpha_beta_from_y(cg_cw: tuple[float, float], cg_ccw: tuple[float, float],
                      side: float) -> tuple[float, float]:
    """(alpha, beta) in radians from the y components: a second, independent estimate."""
    y_cw, y_ccw = cg_cw[1], cg_ccw[1]
    return (y_cw - y_ccw) / (-4.0 * side), (y_cw + y_ccw) / (-4.0 * side)


def curvature_radius(side: float, beta: float) -> float:
    """Radius of the arc a "straight" leg of length `side` really drives (inf when beta is 0)."""
    half = math.sin(beta / 2.0)
    return math.inf if half == 0.0 else (side / 2.0) / half


def wheel_diameter_ratio(side: float, beta: float, track: float) -> float:
    """E_d = D_R / D_L = (R + b/2) / (R - b/2), with b the nominal track width (as the paper)."""
    radius = curvature_radius(side, beta)
    if math.isinf(radius):
        return 1.0
    return (radius + track / 2.0) / (radius - track / 2.0)


def track_ratio(alpha: float) -> float:
    """E_b = b_actual / b_nominal = (pi/2) / (pi/2 - alpha), alpha in radians."""
    return QUARTER_TURN_RAD / (QUARTER_TURN_RAD - alpha)


def diameter_corrections(e_d: float) -> tuple[float, float]:
    """(c_L, c_R): factors on the average diameter for each wheel; c_R / c_L = E_d and their
    mean is 1, so the average diameter (and the distance calibration) stays as it was."""
    return 2.0 / (e_d + 1.0), 2.0 / (1.0 / e_d + 1.0)


@dataclass(frozen=True)
class UmbmarkEstimate:
    alpha_rad: float
    beta_rad: float
    e_d: float  # D_R / D_L
    e_b: float  # b_actual / b_nominal

    @classmethod
    def from_alpha_beta(cls, alpha: float, beta: float, side: float, track: float) -> UmbmarkEstimate:
        return cls(alpha, beta, wheel_diameter_ratio(side, beta, track), track_ratio(alpha))

    def as_dict(self) -> dict[str, float]:
        return {"alpha_deg": math.degrees(self.alpha_rad), "beta_deg": math.degrees(self.beta_rad),
                "e_d": self.e_d, "e_b": self.e_b}


@dataclass(frozen=True)
class UmbmarkResult:
    side: float
    track: float
    cg_cw: tuple[float, float]
    cg_ccw: tuple[float, float]
    e_max_syst: float
    from_x: UmbmarkEstimate
    from_y: UmbmarkEstimate
    combined: UmbmarkEstimate  # alpha and beta averaged over the x and y estimates

    @property
    def corrections(self) -> tuple[float, float]:
        return diameter_corrections(self.combined.e_d)

    def as_dict(self) -> dict[str, object]:
        c_l, c_r = self.corrections
        return {"side": self.side, "track": self.track, "cg_cw": list(self.cg_cw),
                "cg_ccw": list(self.cg_ccw), "e_max_syst": self.e_max_syst,
                "from_x": self.from_x.as_dict(), "from_y": self.from_y.as_dict(),
                "combined": self.combined.as_dict(), "c_left": c_l, "c_right": c_r}


def umbmark(cw_errors: np.ndarray, ccw_errors: np.ndarray, side: float, track: float) -> UmbmarkResult:
    """Everything UMBmark derives from the two directions' return errors (any one length unit,
    the same for errors, side and track).

    The combined estimate averages alpha and beta from the x and y components before converting
    them; with the first-order model this halves the error of either alone (REFERENCES section 2,
    worked example: E_d 1.002006 and E_b 1.010217 against the true 1.002 and 1.010).
    """
    if side <= 0 or track <= 0:
        raise ValueError("side and track must be positive")
    cg_cw = centre_of_gravity(cw_errors)
    cg_ccw = centre_of_gravity(ccw_errors)
    ax, bx = alpha_beta_from_x(cg_cw, cg_ccw, side)
    ay, by = alpha_beta_from_y(cg_cw, cg_ccw, side)
    return UmbmarkResult(
        side=side, track=track, cg_cw=cg_cw, cg_ccw=cg_ccw, e_max_syst=e_max_syst(cg_cw, cg_ccw),
        from_x=UmbmarkEstimate.from_alpha_beta(ax, bx, side, track),
        from_y=UmbmarkEstimate.from_alpha_beta(ay, by, side, track),
        combined=UmbmarkEstimate.from_alpha_beta((ax + ay) / 2.0, (bx + by) / 2.0, side, track),
    )


# ------------------------------------------------------------------ odometry from the encoders


def integrate_odometry(left_mm: np.ndarray, right_mm: np.ndarray, track: float,
                       pose: tuple[float, float, float] = (0.0, 0.0, 0.0)) -> tuple[float, float, float]:
    """Dead reckoning of a differential drive from cumulative wheel travel samples.

    Borenstein, Everett & Feng, "Where am I?", p. 20, eqs. 1.2-1.5: centre increment
    (dU_R + dU_L)/2, heading increment (dU_R - dU_L)/b; each step is taken along the mid-step
    heading. Frame: x forward at the start, y to the left, theta counter-clockwise in radians.
    Returns the final (x, y, theta).
    """
    left = np.diff(np.asarray(left_mm, dtype=float), prepend=0.0)
    right = np.diff(np.asarray(right_mm, dtype=float), prepend=0.0)
    x, y, theta = pose
    d_centre = (left + right) / 2.0
    d_theta = (right - left) / track
    headings = theta + np.cumsum(d_theta) - d_theta / 2.0
    x += float(np.sum(d_centre * np.cos(headings)))
    y += float(np.sum(d_centre * np.sin(headings)))
    return x, y, theta + float(np.sum(d_theta))
