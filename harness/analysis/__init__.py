"""Statistics and verdicts on per-run measurements: pure functions on numpy arrays, no I/O.

stats     summaries (n, mean, sample sd, range, 95 % CI), ISO 9283-style repeatability and
          accuracy, heading wrap-around and turn-error statistics, RMS
verdicts  a suite's expectations checked against the measurements, each check with the numbers
          that decided it
"""

from .stats import (
    Summary,
    angle_error_stats,
    angle_errors,
    iso9283_ap,
    iso9283_rp,
    orientation_rp,
    rms,
    summarize,
    wrap_deg,
)
from .verdicts import CHECK_KINDS, Check, evaluate, unit_of, validate_expectations, verdict

__all__ = [
    "CHECK_KINDS",
    "Check",
    "Summary",
    "angle_error_stats",
    "angle_errors",
    "evaluate",
    "iso9283_ap",
    "iso9283_rp",
    "orientation_rp",
    "rms",
    "summarize",
    "unit_of",
    "validate_expectations",
    "verdict",
    "wrap_deg",
]
