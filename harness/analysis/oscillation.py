"""Oscillation in a sampled signal (a line follower's controller error): half-cycles cut by zero
crossings with hysteresis, the period from the crossings and from the spectrum's peak, and the
growth per cycle from the peak amplitudes early and late. Pure functions on numpy arrays.

How a record is read (oscillation_of): after the first `skip_s` the signal less its median is cut
into half-cycles; the period comes from the crossings (and, as a cross-check, from the spectrum's
peak); growth per cycle from the mean |peak| in the first and last thirds of the half-cycles.

Taking the median off hides a signal held to one side, and a signal that leaves the hysteresis
band only now and then yields few half-cycles: so the result also carries the median itself
(`offset`), the spread about it late in the record (`spread_rms`) and how much of the analysed
time the half-cycles fill at the measured period (`coverage`), for a judge to tell "settled"
from "something else".
What cannot be measured is NaN, not 0.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np


def half_cycles(e: np.ndarray, hysteresis: float) -> tuple[list[int], list[int]]:
    """Split a zero-mean signal into half-cycles: a half-cycle starts when the signal passes
    +hysteresis or -hysteresis on the side opposite the last one. Returns (indices where each new
    half-cycle starts, index of the largest |value| of each completed half-cycle)."""
    starts: list[int] = []
    peaks: list[int] = []
    side = 0
    peak = -1
    for i, v in enumerate(e):
        s = 1 if v > hysteresis else -1 if v < -hysteresis else 0
        if s and s != side:
            if side != 0:
                peaks.append(peak)
            starts.append(i)
            side, peak = s, i
        elif s and s == side and abs(v) > abs(e[peak]):
            peak = i
    return starts, peaks


def crossing_times(t: np.ndarray, e: np.ndarray, starts: list[int]) -> np.ndarray:
    """For each half-cycle start after the first, when the signal crossed zero on the way:
    linear interpolation between the last two samples of opposite sign before it."""
    times = []
    for i in starts[1:]:
        j = i
        sign = np.sign(e[i])
        while j > 0 and np.sign(e[j - 1]) == sign:
            j -= 1
        if j == 0:
            continue
        a, b = e[j - 1], e[j]
        frac = a / (a - b) if a != b else 0.0
        times.append(t[j - 1] + frac * (t[j] - t[j - 1]))
    return np.asarray(times, dtype=float)


def zero_crossing_period(t: np.ndarray, e: np.ndarray, hysteresis: float) -> float:
    """Period from the mean spacing of zero crossings (two per cycle); NaN with fewer than three.

    A half-cycle too small to pass the hysteresis hides two crossings and leaves a gap of about
    three half-periods: spacings far from the median are left out."""
    starts, _ = half_cycles(e, hysteresis)
    times = crossing_times(t, e, starts)
    if len(times) < 3:
        return math.nan
    gaps = np.diff(times)
    middle = float(np.median(gaps))
    kept = gaps[(gaps > 0.6 * middle) & (gaps < 1.4 * middle)]
    return 2.0 * float(np.mean(kept)) if len(kept) else math.nan


def spectrum_period(t: np.ndarray, e: np.ndarray, min_period_s: float = 0.0) -> float:
    """Period of the strongest spectral line: Hann window, zero padding, and a parabola through
    the peak bin and its neighbours on the log magnitude (common practice for spectral peaks).
    Samples are taken as evenly spaced at their mean interval. NaN for a flat signal."""
    n = len(e)
    if n < 8:
        return math.nan
    dt = float(t[-1] - t[0]) / (n - 1)
    x = (e - np.mean(e)) * np.hanning(n)
    nfft = 1 << int(math.ceil(math.log2(n * 8)))
    mag = np.abs(np.fft.rfft(x, nfft))
    freqs = np.fft.rfftfreq(nfft, dt)
    usable = freqs > 0
    if min_period_s > 0:
        usable &= freqs < 1.0 / min_period_s
    if not usable.any() or mag[usable].max() <= 0:
        return math.nan
    k = int(np.flatnonzero(usable)[np.argmax(mag[usable])])
    if 0 < k < len(mag) - 1 and mag[k - 1] > 0 and mag[k + 1] > 0:
        a, b, c = np.log(mag[k - 1 : k + 2])
        denom = a - 2 * b + c
        shift = 0.5 * (a - c) / denom if denom else 0.0
    else:
        shift = 0.0
    return 1.0 / ((k + shift) * (freqs[1] - freqs[0]))


@dataclass(frozen=True)
class Oscillation:
    period_s: float  # from zero crossings
    spectrum_period_s: float
    half_cycles: int
    amplitude_early: float  # mean |peak| in the first third of the analysed window
    amplitude_late: float  # and in the last third
    growth_per_cycle: float  # late over early amplitude, per period (1 = steady)
    peak_t_s: tuple[float, ...] = ()
    peak_abs: tuple[float, ...] = ()
    window_s: float = 0.0  # length of the analysed window (after skip_s)
    offset: float = math.nan  # median of the analysed signal, taken off before cutting half-cycles
    spread_rms: float = math.nan  # RMS about that median over the second half of the window
    coverage: float = math.nan  # half-cycles x half the period / window_s: near 1 for a steady oscillation

    def as_dict(self) -> dict[str, Any]:
        return {"period_s": self.period_s, "spectrum_period_s": self.spectrum_period_s,
                "half_cycles": self.half_cycles, "amplitude_early": self.amplitude_early,
                "amplitude_late": self.amplitude_late, "growth_per_cycle": self.growth_per_cycle,
                "window_s": self.window_s, "offset": self.offset, "spread_rms": self.spread_rms,
                "coverage": self.coverage}


def oscillation_of(t: np.ndarray, e: np.ndarray, *, skip_s: float = 0.5, hysteresis: float = 3.0) -> Oscillation:
    """Period and growth of the oscillation in a controller-error record (see the module text)."""
    t = np.asarray(t, dtype=float)
    e = np.asarray(e, dtype=float)
    keep = t >= (t[0] if len(t) else 0.0) + skip_s
    t, e = t[keep], e[keep]
    nan = math.nan
    if len(e) < 8:
        return Oscillation(nan, nan, 0, nan, nan, nan)
    window_s = float(t[-1] - t[0])
    offset = float(np.median(e))
    e = e - offset  # a steady offset (sensors not quite symmetric) is not oscillation
    second_half = e[t >= t[0] + window_s / 2]  # a slow start swing still dying out is not what is left
    spread = float(np.sqrt(np.mean(second_half * second_half)))
    starts, peaks = half_cycles(e, hysteresis)
    period = zero_crossing_period(t, e, hysteresis)
    spec = spectrum_period(t, e)
    peak_t = t[peaks]
    peak_abs = np.abs(e[peaks])
    coverage = len(peaks) * period / 2.0 / window_s if math.isfinite(period) and window_s > 0 else nan
    shape = {"window_s": window_s, "offset": offset, "spread_rms": spread, "coverage": coverage}
    third = len(peaks) // 3
    if third < 1 or not math.isfinite(period):
        return Oscillation(period, spec, len(peaks), nan, nan, nan, tuple(peak_t), tuple(peak_abs), **shape)
    early, late = peak_abs[:third], peak_abs[-third:]
    span_s = float(np.mean(peak_t[-third:]) - np.mean(peak_t[:third]))
    growth = (float(np.mean(late)) / float(np.mean(early))) ** (period / span_s) if span_s > 0 else nan
    return Oscillation(period, spec, len(peaks), float(np.mean(early)), float(np.mean(late)), growth,
                       tuple(peak_t), tuple(peak_abs), **shape)
