"""`trackproof tune`: line-follower gains by the Ziegler-Nichols ultimate-sensitivity method.

Proportional-only following on a straight stretch, at a fixed speed for a fixed time, with Kp
raised in geometric steps until the controller error oscillates steadily; then bisection between
the last steady gain and the first oscillating one gives the ultimate gain Ku, and the oscillation
there its period Tu. Gains follow from the Ziegler-Nichols (1942) table and gentler published
rules beside it, and each candidate is driven several times to see which tracks best.

How a run is judged (harness.analysis.oscillation.oscillation_of): after the first `skip_s` the
error's half-cycles are cut by zero crossings with hysteresis; the period comes from the crossings
(and, as a cross-check, from the spectrum's peak); growth per cycle from the peak amplitudes early
and late in the run. A run oscillates steadily ("sustained") when its peaks no longer shrink
(growth >= 1 - tolerance) and stay above a floor that sensor noise alone does not reach; it
"grows" when they swell, or when the guard stopped the robot.

A run is "unclear" when something other than the follower's own dynamics moved the error, so it
is neither a stable nor an oscillating gain: the telemetry shows a line beside the followed one
(the profile's junction sensors read dark: a junction, spur or crossing) or a bend (the heading
changed), or the error is held to one side, or strays far without swinging from side to side, or
its big swings fill only a small part of the run. The Ku search drives an unclear gain once more
(a bad placement happens) and stops if it is unclear again; in the verification it is not clean.
Without junction sensors a side line shows only in the error, where these checks catch it less
reliably: a clear straight line is still the method's first requirement.

The guard watches the telemetry while the robot runs (through Session.run's on_telemetry hook,
called with each telemetry batch as it arrives) and stops the robot at once when the follower
loses the line (all its sensors light) or when the error swings past a limit on several
half-cycles in a row.
"""

from __future__ import annotations

import argparse
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from harness.analysis.oscillation import Oscillation, oscillation_of
from harness.calibrate.common import add_robot_options, load_robot, whole_number
from harness.errors import InputError, TrackproofError
from harness.links import Link, LinkSpec
from harness.movelog import MoveLog
from harness.operator import Ask, ask_operator, confirm_real
from harness.profile import RobotProfile
from harness.robot import RobotConnector, open_real_link
from harness.session import RunRecord, Session
from harness.sim import SUITES_DIR
from harness.store import Store
from harness.telemetry import decode_batches
from hub_side import motion, wire

TUNING_COURSE = SUITES_DIR / "tuning_straight.toml"
TELEMETRY_HZ = 100


class TuneFailed(TrackproofError):
    """The procedure could not find what it looks for (no oscillation, or one from the start)."""


@dataclass(frozen=True)
class Judgement:
    tolerance: float = 0.015  # growth per cycle within this of 1 counts as steady
    min_amplitude: float = 10.0  # error units (reflectance %); sensor noise alone stays below
    # A steady oscillation fills the run with half-cycles (0.95 and more on the straight tuning
    # course); big swings now and then (a junction, a bump) fill a small part of it.
    min_coverage: float = 0.5

    def verdict(self, osc: Oscillation, guard: str | None, disturbance: str | None = None) -> str:
        return self.judge(osc, guard, disturbance)[0]

    def judge(self, osc: Oscillation, guard: str | None, disturbance: str | None = None) -> tuple[str, str]:
        """(verdict, why). The verdict is damped, sustained, growing, lost (the line lost with no
        oscillation to blame) or unclear: the run says nothing about the loop's own stability
        (something other than the follower moved the error), so it is neither a stable nor an
        oscillating gain. `disturbance`: what the run's telemetry showed besides the line (side
        lines, a bend), None when nothing."""
        floor = self.min_amplitude
        measured = osc.half_cycles >= 4 and math.isfinite(osc.growth_per_cycle)
        oscillating = measured and osc.growth_per_cycle >= 1.0 - self.tolerance
        if disturbance:  # first: it may be what swung the robot or lost it the line
            return "unclear", disturbance
        if guard == "limit":
            return "growing", "stopped by the guard: the error swung past its limit on several half-cycles in a row"
        if guard == "lost":
            if oscillating or osc.amplitude_late >= floor:
                return "growing", "lost the line while swinging"
            return "lost", "lost the line without swinging"
        if not osc.window_s > 0:
            return "unclear", "too short a record to judge"
        if abs(osc.offset) >= 3 * floor:
            return "unclear", (f"error held at {osc.offset:+.1f} to one side (its median): riding on the line's "
                               "edge, too far off for the swings to show (the robot off to one side, or the "
                               "sensors far out of balance)")
        if abs(osc.offset) >= floor and not measured and osc.spread_rms < floor / math.sqrt(2):
            # A proportional loop keeps a steady offset against an imbalance (wheels, sensors),
            # larger the lower the gain; held steadily, on a line with no bend (checked above), it
            # is a stable loop, not a sign of anything else.
            return "damped", (f"settled with a steady offset of {osc.offset:+.1f} (a proportional loop keeps one "
                              f"against an imbalance), error RMS {osc.spread_rms:.1f} about it late in the run")
        if not measured:
            # Too few half-cycles to compare early and late peaks. Small spread late in the run:
            # the start swing died out and only noise is left. Large spread without swings from
            # side to side: excursions to one side, which is no oscillation and no settling either.
            if osc.spread_rms >= floor / math.sqrt(2):  # the RMS of a sine whose peaks reach the floor
                return "unclear", (f"error RMS {osc.spread_rms:.1f} late in the run but too few swings from side "
                                   "to side to judge: excursions to one side, not an oscillation")
            return "damped", (f"no steady swing: the start swing died out (error RMS {osc.spread_rms:.1f} late "
                              "in the run)")
        if not oscillating:
            return "damped", "peaks shrink"
        if not osc.amplitude_late >= floor:
            return "damped", (f"peaks stay below {floor:g}: too small to tell from sensor noise, so not taken "
                              "as an oscillation")
        if not osc.coverage >= self.min_coverage:
            return "unclear", (f"big swings only now and then ({osc.half_cycles} half-cycles fill "
                               f"{osc.coverage:.0%} of the run): not a steady oscillation; something else "
                               "moves the robot (junctions, side lines, bends, bumps)")
        if osc.growth_per_cycle > 1.0 + self.tolerance:
            return "growing", "peaks grow"
        return "sustained", "peaks hold steady"


# ------------------------------------------------------------------ tuning rules


@dataclass(frozen=True)
class Rule:
    """One row of a tuning table, in the standard form Kp (1 + 1/(Ti s) + Td s), as multiples of
    Ku and Tu (None: the row has no such term). `source`: where the row comes from; `checked`:
    how far that was checked, in words for the user (the project says where values come from)."""

    name: str
    kp_ku: float
    ti_tu: float | None
    td_tu: float | None
    source: str
    checked: str

    @property
    def provenance(self) -> str:
        return f"source: {self.source}; {self.checked}"

    def gains(self, ku: float, tu: float) -> dict[str, float | None]:
        kp = self.kp_ku * ku
        ti = None if self.ti_tu is None else self.ti_tu * tu
        td = None if self.td_tu is None else self.td_tu * tu
        return {"kp": kp, "ti_s": ti, "td_s": td, "ki": None if ti is None else kp / ti,
                "kd": 0.0 if td is None else kp * td}


_ZN = "Ziegler & Nichols, Trans. ASME 64 (1942)"
_ZN_SEEN = "values as printed in secondary sources; the paper itself not seen"
_TL = "Tyreus & Luyben, Ind. Eng. Chem. Res. 31 (1992)"
_TL_SEEN = "values from a secondary table; the paper cited from memory, not checked"

# Provenance as in REFERENCES.md section 3 (its tags there: [S] seen in a source, [M] from memory).
# Ziegler & Nichols, "Optimum settings for automatic controllers", Trans. ASME 64 (1942) 759-768:
# the P, PI and PID rows are those of the secondary sources listed there (the paper itself not
# seen; the PI row confirmed by the Feedback Systems errata). The PD row was seen only in code;
# the "no overshoot" row has no primary source and its values are from memory.
RULES: tuple[Rule, ...] = (
    Rule("ZN P", 0.5, None, None, _ZN, _ZN_SEEN),
    Rule("ZN PI", 0.45, 1 / 1.2, None, _ZN, "values confirmed by the errata to Astrom & Murray, Feedback Systems"),
    Rule("ZN PID", 0.6, 0.5, 0.125, _ZN, _ZN_SEEN),
    Rule("ZN PD", 0.8, None, 0.125, "published code only", "no primary paper found"),
    Rule("Tyreus-Luyben PI", 1 / 3.2, 2.2, None, _TL, _TL_SEEN),
    Rule("Tyreus-Luyben PID", 1 / 2.2, 2.2, 1 / 6.3, _TL, _TL_SEEN),
    Rule("no overshoot", 0.2, 0.5, 1 / 3, "a rule of thumb, no primary source found",
         "values cited from memory, not checked"),
)

# What the hub's follow_line can run: kp * e + kd * de/dt (no integral term).
HUB_ROWS = ("ZN P", "ZN PD", "ZN PID", "Tyreus-Luyben PID", "no overshoot")
PD_ONLY = ("the hub's follower is PD: the integral term is dropped; on curves a steady offset may "
           "remain")


@dataclass(frozen=True)
class Candidate:
    name: str
    kp: float
    kd: float
    note: str

    def as_dict(self) -> dict[str, Any]:
        return {"name": self.name, "kp": self.kp, "kd": self.kd, "note": self.note}


def rule_table(ku: float, tu: float) -> list[dict[str, Any]]:
    """Every row with its gains (for the report)."""
    return [dict(rule=r.name, source=r.source, checked=r.checked, **r.gains(ku, tu)) for r in RULES]


def hub_candidates(ku: float, tu: float) -> list[Candidate]:
    """The rows the hub's PD follower can run. Its derivative term is kd * de/dt with de/dt per
    second, so kd = Kp * Td. A row with an integral term runs without it, and says so in its
    name ("... without I") and note: that is no longer the published rule."""
    out = []
    for rule in RULES:
        if rule.name not in HUB_ROWS:
            continue
        g = rule.gains(ku, tu)
        name, note = rule.name, rule.provenance
        if g["ti_s"] is not None:
            name = f"{rule.name} without I"
            note = f"{PD_ONLY} (Ti = {g['ti_s']:.3f} s); {note}"
        out.append(Candidate(name, float(g["kp"]), float(g["kd"]), note))
    return out


def candidate_count() -> int:
    """How many gains tune() verifies: the current ones and every hub-runnable row."""
    return 1 + sum(rule.name in HUB_ROWS for rule in RULES)


# ------------------------------------------------------------------ the guard


class Guard:
    """Decides, sample by sample, when to stop the robot: the line lost (every follow sensor
    light for lost_s), or the oscillation grown past the limit: `limit_half_cycles` half-cycles
    in a row peaking above it, the last no smaller than the first (a start-up swing that is
    already dying out is left alone)."""

    def __init__(self, sensor_columns: list[int], light_pct: float, limit: float, *,
                 lost_s: float = 0.1, limit_half_cycles: int = 4, hysteresis: float = 3.0) -> None:
        self.columns = sensor_columns
        self.light_pct = light_pct
        self.limit = limit
        self.lost_s = lost_s
        self.limit_half_cycles = limit_half_cycles
        self.hysteresis = hysteresis
        self.reason: str | None = None
        self.tripped_at_s: float | None = None
        self._light_since: float | None = None
        self._side = 0
        self._peak = 0.0
        self._big: list[float] = []  # peaks of the latest half-cycles in a row above the limit

    def feed(self, t_s: np.ndarray, error: np.ndarray, reflectance: np.ndarray) -> str | None:
        for k in range(len(t_s)):
            if self.reason is not None:
                break
            t = float(t_s[k])
            if all(reflectance[k, c] >= self.light_pct for c in self.columns):
                self._light_since = t if self._light_since is None else self._light_since
                if t - self._light_since >= self.lost_s:
                    self._trip("lost", t)
                    continue
            else:
                self._light_since = None
            v = float(error[k])
            s = 1 if v > self.hysteresis else -1 if v < -self.hysteresis else 0
            if s and s != self._side:
                if self._side != 0:  # a half-cycle just ended: was its peak past the limit?
                    if self._peak >= self.limit:
                        self._big = (self._big + [self._peak])[-self.limit_half_cycles:]
                    else:
                        self._big = []
                    if len(self._big) >= self.limit_half_cycles and self._big[-1] >= self._big[0]:
                        self._trip("limit", t)
                        continue
                self._side, self._peak = s, abs(v)
            elif s == self._side and s:
                self._peak = max(self._peak, abs(v))
        return self.reason

    def _trip(self, reason: str, t: float) -> None:
        self.reason = reason
        self.tripped_at_s = t


def guarded_run(session: Session, params: dict[str, Any], guard: Guard, log: MoveLog | None = None,
                case: str = "") -> RunRecord:
    """follow_line with the guard watching each telemetry batch as it arrives; when it trips the
    robot is told to stop there and then, and the run ends with status "stopped". With a log,
    the run is stored as a run of `case`."""
    assert session.hub is not None
    sensors = session.hub.sensors

    def watch(body: bytes) -> None:
        if guard.reason is not None:
            return
        try:
            batch = decode_batches([body], sensors)
        except wire.FrameError:
            return
        if guard.feed(np.asarray(batch.t_s), np.asarray(batch.error_pct), np.asarray(batch.reflectance_pct)):
            session.stop_robot()

    return (log or MoveLog()).run(session, case, "follow_line", params, telemetry_hz=TELEMETRY_HZ,
                                  on_telemetry=watch, explain=lambda record: (
                                      f"stopped by the guard: {guard.reason}" if guard.reason else ""))


# ------------------------------------------------------------------ the procedure


@dataclass(frozen=True)
class TuneSettings:
    direction: str = "forward"
    speed_pct: float = 40.0
    time_s: float = 5.0
    kp_start: float = 0.1
    step: float = 1.5
    kp_max: float = 100.0  # the hub's own limit for kp
    bisections: int = 4
    verify_runs: int = 5
    skip_s: float = 0.5
    limit: float | None = None  # |error| for the guard; None: from the sensor count
    judgement: Judgement = field(default_factory=Judgement)


@dataclass(frozen=True)
class Trial:
    kp: float
    kd: float
    status: str
    guard: str | None
    guard_at_s: float | None
    duration_s: float
    oscillation: Oscillation
    verdict: str
    error_rms: float  # over the whole run, the start swing included
    reason: str = ""  # why the verdict, in words
    travel_mm: float = math.nan  # from the wheel encoders

    @property
    def unstable(self) -> bool:
        return self.verdict in ("sustained", "growing")

    def as_dict(self) -> dict[str, Any]:
        return {"kp": self.kp, "kd": self.kd, "status": self.status, "guard": self.guard,
                "guard_at_s": self.guard_at_s, "duration_s": self.duration_s, "verdict": self.verdict,
                "reason": self.reason, "error_rms": self.error_rms, "travel_mm": self.travel_mm,
                "oscillation": self.oscillation.as_dict()}


@dataclass(frozen=True)
class Ultimate:
    ku: float  # geometric middle of the final bracket
    kp_stable: float  # highest gain seen steady
    kp_oscillating: float  # lowest gain seen oscillating
    tu_s: float  # period at kp_oscillating, from zero crossings
    tu_spectrum_s: float
    trials: tuple[Trial, ...]

    def as_dict(self) -> dict[str, Any]:
        return {"ku": self.ku, "kp_stable": self.kp_stable, "kp_oscillating": self.kp_oscillating,
                "tu_s": self.tu_s, "tu_spectrum_s": self.tu_spectrum_s,
                "trials": [t.as_dict() for t in self.trials]}


@dataclass(frozen=True)
class Verification:
    candidate: Candidate
    rms: tuple[float, ...]
    verdicts: tuple[str, ...]

    @property
    def mean(self) -> float:
        return float(np.mean(self.rms))

    @property
    def sd(self) -> float:
        return float(np.std(self.rms, ddof=1)) if len(self.rms) > 1 else math.nan

    @property
    def clean(self) -> bool:
        """Every run finished on the line without steady oscillation."""
        return all(v == "damped" for v in self.verdicts)

    def as_dict(self) -> dict[str, Any]:
        return {**self.candidate.as_dict(), "rms": list(self.rms), "mean_rms": self.mean, "sd_rms": self.sd,
                "verdicts": list(self.verdicts), "clean": self.clean}


def error_rms(record: RunRecord) -> float:
    e = np.asarray(record.telemetry.error_pct, dtype=float)
    return float(np.sqrt(np.mean(e * e))) if len(e) else math.nan


def dark_runs(t_s: np.ndarray, x_mm: np.ndarray, reflectance: np.ndarray, dark_pct: float,
              min_samples: int = 2) -> list[tuple[float, float]]:
    """(time, travel) where each stretch of at least `min_samples` readings below dark_pct starts."""
    dark = np.asarray(reflectance) < dark_pct
    out = []
    i, n = 0, len(dark)
    while i < n:
        if dark[i]:
            j = i
            while j < n and dark[j]:
                j += 1
            if j - i >= min_samples:
                out.append((float(t_s[i]), float(x_mm[i])))
            i = j
        else:
            i += 1
    return out


def off_the_straight(t_s: np.ndarray, x_mm: np.ndarray, heading_deg: np.ndarray,
                     side_sensors: dict[str, np.ndarray], dark_pct: float, heading_from: str,
                     max_turn_deg: float = 20.0) -> str | None:
    """What a run's telemetry shows that a clear straight line would not, in words; None if
    nothing. Side lines: a sensor beside the followed ones (the profile's junction sensors) read
    dark, so the robot passed a junction, a spur or a crossing and the follow sensors saw it too.
    A bend: the heading at the end (its median over the last half second, which averages the
    swings) differs from the start's by max_turn_deg or more. On the straight tuning course the
    heading changes by under 5 degrees from the gyro, and by about 4 from the encoders of the
    uncalibrated demo profile."""
    found = []
    seen = sorted((x, t, name) for name, refl in side_sensors.items() for t, x in dark_runs(t_s, x_mm, refl, dark_pct))
    if seen:
        listed = [f"{name} dark at {x:.0f} mm ({t:.2f} s)" for x, t, name in seen[:4]]
        more = f" and {len(seen) - 4} more" if len(seen) > 4 else ""
        found.append("passed a line beside the followed one: " + ", ".join(listed) + more)
    if len(t_s):
        end = np.asarray(t_s) >= t_s[-1] - 0.5
        turned = float(np.median(np.asarray(heading_deg)[end]) - heading_deg[0])
        if abs(turned) >= max_turn_deg:
            found.append(f"turned {turned:+.0f} degrees during the run ({heading_from}): the line bends")
    return "; ".join(found) or None


def climb_gains(s: TuneSettings) -> list[float]:
    """The Kp steps while looking for oscillation: kp_start times step, step^2, ..., ending at kp_max."""
    gains = [s.kp_start]
    while gains[-1] < s.kp_max:
        gains.append(min(gains[-1] * s.step, s.kp_max))
    return gains


def plan_text(profile_id: str, link_name: str, s: TuneSettings) -> str:
    """What the robot is about to do, with the run counts the procedure will really use."""
    climb = len(climb_gains(s))
    n = candidate_count()
    verify = n * s.verify_runs
    return (f"About to tune {profile_id} over {link_name}: follow_line at {s.speed_pct:g} % for {s.time_s:g} s "
            f"per run. Kp is raised from {s.kp_start:g} by x{s.step:g} until the robot oscillates (up to "
            f"{climb} runs), then {s.bisections} runs narrow it down, then {s.verify_runs} runs each for {n} "
            f"gains (the current ones and {n - 1} from the tables): {verify} runs; up to "
            f"{climb + s.bisections + verify} runs in all. Put it on a straight line at least 1.5 m long, a "
            "little (about 5 mm) to one side of the line. It stops by itself when it loses the line.")


class Tuner:
    """Runs the trials on one robot. On the simulator each run starts from the course's start
    (re-placed, with its placement error); on a real robot the operator puts it back."""

    def __init__(self, connector: RobotConnector, settings: TuneSettings, ask: Ask = ask_operator,
                 on_trial: Callable[[Trial], None] | None = None, log: MoveLog | None = None) -> None:
        profile = connector.profile
        follow = profile.follow.get(settings.direction)
        if follow is None:
            raise InputError(f"the profile has no [follow.{settings.direction}] table to tune",
                             file=profile.source or None, key=f"follow.{settings.direction}")
        if settings.limit is not None and not (math.isfinite(settings.limit) and settings.limit > 0):
            # NaN would never trip the guard and 0 would trip it on every run.
            raise InputError(f"the guard's limit must be a number above 0, got {settings.limit}", key="limit")
        self.connector = connector
        self.profile = profile
        self.follow = follow
        self.settings = settings
        self.ask = ask
        self.on_trial = on_trial
        self.log = log or MoveLog()
        self.session: Session | None = None
        self.runs = 0

    # A pair straddling the line can swing its error over the whole white-black span (about 60 %
    # on a usual mat); one sensor on an edge about half of it.
    def limit(self) -> float:
        if self.settings.limit is not None:
            return self.settings.limit
        return 45.0 if len(self.follow.sensors) == 2 else 25.0

    def params(self, kp: float, kd: float) -> dict[str, Any]:
        s = self.settings
        return self.profile.action_defaults("follow_line", {
            "direction": s.direction, "kp": kp, "kd": kd, "speed_pct": s.speed_pct, "time_s": s.time_s,
            "timeout_s": s.time_s + 10.0})

    def trial(self, kp: float, kd: float = 0.0) -> Trial:
        assert self.session is not None and self.session.hub is not None
        if self.connector.sim is not None or self.runs:
            self.connector.place_at_start(self.session, self.ask, "Put the robot back at the start of the straight, "
                                          f"a little (about 5 mm) to one side of the line, to run kp={kp:.3f} kd={kd:.4f}")
        self.runs += 1
        sensors = list(self.session.hub.sensors)
        columns = [sensors.index(name) for name in self.follow.sensors]
        light = min(99.0, self.profile.threshold_pct + 15.0)
        # A pair cannot both read light while on the line; one edge sensor can, for a moment,
        # before the follower finds its edge.
        lost_s = 0.1 if len(columns) == 2 else 0.5
        guard = Guard(columns, light, self.limit(), lost_s=lost_s,
                      hysteresis=self.settings.judgement.min_amplitude / 3)
        record = guarded_run(self.session, self.params(kp, kd), guard, self.log, f"kp {kp:.4f} kd {kd:.5f}")
        if record.status not in ("done", "stopped"):
            raise TuneFailed(f"follow_line at kp={kp:.3f} ended {record.status!r}: {record.result}")
        if record.status == "stopped" and guard.reason is None:
            raise TuneFailed("the robot was stopped (its button or the hub) during a tuning run; nothing concluded")
        tel = record.telemetry
        # A run the guard cut short is analysed whole: its start is all there is.
        skip_s = 0.0 if guard.reason else self.settings.skip_s
        osc = oscillation_of(np.asarray(tel.t_s), np.asarray(tel.error_pct), skip_s=skip_s,
                             hysteresis=self.settings.judgement.min_amplitude / 3)
        x_mm, disturbance = self.course_check(tel, sensors)
        verdict, reason = self.settings.judgement.judge(osc, guard.reason, disturbance)
        duration = float(record.result.get("duration_s", tel.t_s[-1] if len(tel) else 0.0))
        out = Trial(kp, kd, record.status, guard.reason, guard.tripped_at_s, duration, osc, verdict,
                    error_rms(record), reason, float(x_mm[-1]) if len(x_mm) else math.nan)
        if self.on_trial is not None:
            self.on_trial(out)
        return out

    def course_check(self, tel: Any, sensors: list[str]) -> tuple[np.ndarray, str | None]:
        """The run's travel (mm, from the encoders) and what its telemetry shows besides a clear
        straight line (off_the_straight). Side lines are looked for with the profile's junction
        sensors that are not follow sensors; the heading comes from the gyro when the hub has one,
        else from the encoders and the profile's geometry."""
        geometry = self.profile.geometry()
        left = np.asarray(tel.enc_left_deg, dtype=float)
        right = np.asarray(tel.enc_right_deg, dtype=float)
        # How far along the line, whichever way it follows (backward runs count down).
        x_mm = np.abs(np.asarray(motion.travel_mm(left, right, geometry), dtype=float))
        assert self.session is not None and self.session.hub is not None
        if self.session.hub.board.get("gyro"):
            heading, heading_from = np.asarray(tel.heading_deg, dtype=float), "gyro"
        else:
            heading, heading_from = np.asarray(motion.encoder_heading_deg(left, right, geometry)), "wheel encoders"
        refl = np.asarray(tel.reflectance_pct)
        # Only junction sensors at the follow sensors' end of the robot: at the other end they
        # swing across the followed line itself whenever the robot steers.
        places = self.profile.sensors
        ahead = places[self.follow.sensors[0]].forward_mm >= 0 if self.follow.sensors[0] in places else True
        side = {name: refl[:, sensors.index(name)]
                for name in dict.fromkeys((self.profile.junction_left, self.profile.junction_right))
                if name and name in sensors and name not in self.follow.sensors
                and (places[name].forward_mm >= 0 if name in places else True) == ahead}
        return x_mm, off_the_straight(np.asarray(tel.t_s), x_mm, heading, side, self.profile.threshold_pct,
                                      heading_from)

    def judged_trial(self, kp: float, trials: list[Trial]) -> Trial:
        """A trial that says something about the loop. An unclear run is driven once more (one
        bad placement happens); unclear twice, the course or the robot is the trouble, and the
        Ku search stops rather than take it as a stable or an oscillating gain."""
        for _ in range(2):
            t = self.trial(kp)
            trials.append(t)
            if t.verdict != "unclear":
                return t
        travel = f" (a run drives about {t.travel_mm:.0f} mm)" if math.isfinite(t.travel_mm) else ""
        raise TuneFailed(f"kp={kp:.3f}, twice: {t.reason}. Neither a stable nor an oscillating gain, so nothing "
                         "concluded. The ultimate-gain method needs the robot on a clear straight line: no "
                         f"junctions, side lines or bends ahead{travel}, the robot a little (about 5 mm) to one "
                         "side of the line" + ("; on the simulator, the bundled straight course (leave out --course)"
                                               if self.connector.sim is not None else ""))

    def find_ultimate(self) -> Ultimate:
        s = self.settings
        trials: list[Trial] = []
        stable, oscillating = None, None
        for kp in climb_gains(s):
            t = self.judged_trial(kp, trials)
            if t.verdict == "lost":
                raise TuneFailed(f"the robot lost the line at kp={kp:.3f} without oscillating: check the "
                                 "start (on the line, a little to one side) or start higher with --kp-start")
            if t.unstable:
                oscillating = t
                break
            stable = t
        if oscillating is None:
            raise TuneFailed(f"no sustained oscillation up to kp={s.kp_max:g}: the loop stays damped at "
                             f"{s.speed_pct:g} % speed; try a higher --speed-pct")
        if stable is None:
            raise TuneFailed(f"already oscillating at the first gain, kp={s.kp_start:g}: start lower with --kp-start")
        for _ in range(s.bisections):
            mid = math.sqrt(stable.kp * oscillating.kp)
            t = self.judged_trial(mid, trials)
            if t.unstable:
                oscillating = t
            else:
                stable = t
        # Tu from the oscillating run nearest Ku whose period could be measured (a run the guard
        # stopped early may be too short).
        timed = sorted((t for t in trials if t.unstable and math.isfinite(t.oscillation.period_s)),
                       key=lambda t: t.kp)
        tu, tu_spec = ((timed[0].oscillation.period_s, timed[0].oscillation.spectrum_period_s) if timed
                       else (math.nan, math.nan))
        return Ultimate(math.sqrt(stable.kp * oscillating.kp), stable.kp, oscillating.kp, tu, tu_spec, tuple(trials))

    def verify(self, candidates: list[Candidate]) -> list[Verification]:
        out = []
        for cand in candidates:
            rms, verdicts = [], []
            for _ in range(self.settings.verify_runs):
                t = self.trial(cand.kp, cand.kd)
                rms.append(t.error_rms)
                verdicts.append(t.verdict)
            out.append(Verification(cand, tuple(rms), tuple(verdicts)))
        return out

    def __enter__(self) -> Tuner:
        self.session = self.connector.connect()
        return self

    def __exit__(self, *exc: object) -> None:
        if self.session is not None:
            self.session.close()
            self.session = None


def standard_error(v: Verification) -> float:
    """Of the mean error RMS; 0 with a single run (nothing to estimate it from)."""
    return v.sd / math.sqrt(len(v.rms)) if len(v.rms) > 1 else 0.0


def best_clean(results: list[Verification]) -> Verification | None:
    """The candidate with the lowest mean error RMS among those whose runs were all clean (a mean
    that is not a number, from a run without telemetry, cannot be ranked)."""
    rows = [v for v in results if v.clean and math.isfinite(v.mean)]
    return min(rows, key=lambda v: v.mean) if rows else None


def best_verified(results: list[Verification]) -> Verification | None:
    """Among the candidates whose runs were all clean (the current gains included), those whose
    mean error RMS is within one standard error of the lowest mean: the "one standard error" rule
    of Breiman, Friedman, Olshen & Stone, Classification and Regression Trees (1984) [from memory].
    A few runs cannot tell them apart, so the current gains are kept if they are among them (no
    change without evidence); otherwise the gentlest row (lowest kp), which amplifies sensor noise
    less. None when nothing ran clean."""
    best = best_clean(results)
    if best is None:
        return None
    limit = best.mean + standard_error(best)
    close = [v for v in results if v.clean and math.isfinite(v.mean) and v.mean <= limit]
    current = [v for v in close if v.candidate.name == "current"]
    return current[0] if current else min(close, key=lambda v: v.candidate.kp)


def _not_clean(v: Verification) -> str:
    """"growing on 2 of 5 runs, unclear on 1": what kept a candidate from being clean."""
    counts = {verdict: v.verdicts.count(verdict) for verdict in sorted(set(v.verdicts) - {"damped"})}
    return ", ".join(f"{verdict} on {n} of {len(v.verdicts)} runs" for verdict, n in counts.items())


def recommendation_text(report: TuneReport) -> str:
    """What best_verified chose and why, in words that hold for the numbers shown: in particular
    why the current gains were not kept (not clean, or more than one standard error worse), and
    a plain warning when the recommendation tracked worse than them."""
    s = report.settings
    rec = report.recommended
    current = next((v for v in report.verification if v.candidate.name == "current"), None)
    if rec is None:
        if not report.verification:
            return ""
        return "Nothing ran clean on every run: no recommendation; keep the current gains."
    best = best_clean(report.verification)
    assert best is not None  # a recommendation is always among the clean candidates
    best_text = (f"{best.candidate.name}, error RMS {best.mean:.2f} with standard error "
                 f"{standard_error(best):.2f}")
    if rec.candidate.name == "current":
        why = ("the lowest error RMS of the gains that ran clean" if rec.candidate == best.candidate else
               f"within one standard error of the best that ran clean ({best_text})")
        return (f"Recommended: keep the current gains (kp {rec.candidate.kp:.4f}, kd {rec.candidate.kd:.5f}; error "
                f"RMS {rec.mean:.2f} sd {rec.sd:.2f}): {why}, at this speed ({s.speed_pct:g} %).")
    text = (f"Recommended: {rec.candidate.name}: kp {rec.candidate.kp:.4f}, kd {rec.candidate.kd:.5f}; error RMS "
            f"{rec.mean:.2f} sd {rec.sd:.2f}. ")
    text += ("The lowest error RMS of the gains that ran clean" if rec.candidate == best.candidate else
             f"The gentlest row within one standard error of the best that ran clean ({best_text})")
    if current is not None:
        if not current.clean:
            text += (f". The current gains (error RMS {current.mean:.2f} sd {current.sd:.2f}) are not kept because "
                     f"they did not run clean: {_not_clean(current)}")
            if current.mean < rec.mean:
                text += (f". WARNING: their error RMS is lower than the recommendation's ({current.mean:.2f} against "
                         f"{rec.mean:.2f}); look at their runs before changing anything")
        elif not math.isfinite(current.mean):
            text += ". The current gains could not be ranked (a run without telemetry)"
        else:
            text += (f". The current gains (error RMS {current.mean:.2f} sd {current.sd:.2f}) are more than one "
                     "standard error worse")
    return text + f". Gains hold for this speed ({s.speed_pct:g} %)."


@dataclass
class TuneReport:
    profile: RobotProfile
    settings: TuneSettings
    ultimate: Ultimate
    table: list[dict[str, Any]]
    verification: list[Verification]
    recommended: Verification | None

    def as_dict(self) -> dict[str, Any]:
        s = self.settings
        return {"robot": self.profile.id, "direction": s.direction, "speed_pct": s.speed_pct, "time_s": s.time_s,
                "ultimate": self.ultimate.as_dict(), "rules": self.table,
                "verification": [v.as_dict() for v in self.verification],
                "recommended": None if self.recommended is None else self.recommended.as_dict()}


def tune(connector: RobotConnector, settings: TuneSettings, ask: Ask = ask_operator,
         on_trial: Callable[[Trial], None] | None = None, log: MoveLog | None = None) -> TuneReport:
    """Find Ku and Tu, then drive the current gains and every hub-runnable row `verify_runs` times."""
    with Tuner(connector, settings, ask, on_trial, log) as tuner:
        assert tuner.session is not None
        confirm_real(tuner.session, plan_text(connector.profile.id, connector.link_name, settings), ask)
        ultimate = tuner.find_ultimate()
        if not math.isfinite(ultimate.tu_s):
            raise TuneFailed(f"kp={ultimate.kp_oscillating:.3f} oscillated but no period could be measured")
        candidates = [Candidate("current", tuner.follow.kp, tuner.follow.kd, "the profile's gains")]
        candidates += hub_candidates(ultimate.ku, ultimate.tu_s)
        verification = tuner.verify(candidates) if settings.verify_runs > 0 else []
    return TuneReport(connector.profile, settings, ultimate, rule_table(ultimate.ku, ultimate.tu_s),
                      verification, best_verified(verification))


# ------------------------------------------------------------------ command line


def _num(value: float, spec: str) -> str:
    """A number for the table, "-" when it could not be measured (NaN)."""
    return format(value, spec) if math.isfinite(value) else "-".rjust(len(format(0.0, spec)))


def trial_line(t: Trial) -> str:
    """One run of the Ku search: verdict, what was measured, and why the verdict."""
    osc = t.oscillation
    guard = f"; stopped by the guard ({t.guard}) at {t.guard_at_s:.2f} s" if t.guard else ""
    return (f"  kp {t.kp:8.4f}: {t.verdict:9} period {_num(osc.period_s, '6.3f')} s, growth/cycle "
            f"{_num(osc.growth_per_cycle, '5.3f')}, peaks {_num(osc.amplitude_early, '5.1f')} -> "
            f"{_num(osc.amplitude_late, '5.1f')}, error RMS {t.error_rms:5.2f}: {t.reason}{guard}")


def print_report(report: TuneReport) -> None:
    u, s = report.ultimate, report.settings
    print(f"Tuning {report.profile.id}, follow {s.direction} at {s.speed_pct:g} % for {s.time_s:g} s per run")
    print(f"Each run is judged after its first {s.skip_s:g} s (the start swing); the error RMS is over the whole run.")
    print("Period, growth per cycle and peaks are of the error's half-cycles (\"-\": too few to measure).")
    for t in u.trials:
        print(trial_line(t))
    print(f"Ultimate gain Ku = {u.ku:.4f} (steady at {u.kp_stable:.4f}, oscillating at {u.kp_oscillating:.4f}); "
          f"period Tu = {u.tu_s:.4f} s (spectrum {u.tu_spectrum_s:.4f} s)")
    print("Rules (standard form Kp, Ti, Td; the hub runs kp and kd = Kp*Td):")
    for row in report.table:
        ti = "-" if row["ti_s"] is None else f"{row['ti_s']:.4f}"
        td = "-" if row["td_s"] is None else f"{row['td_s']:.4f}"
        print(f"  {row['rule']:18} Kp {row['kp']:7.4f}  Ti {ti:>7}  Td {td:>7}  kd {row['kd']:7.5f}")
        print(f"  {'':18} source: {row['source']}; {row['checked']}")
    print(f"  Rows with an integral term run as \"... without I\": {PD_ONLY}.")
    if report.verification:
        print(f"Verification, {s.verify_runs} runs each (error RMS over the run, %):")
        for v in report.verification:
            flag = "" if v.clean else "  not clean: " + _not_clean(v)
            print(f"  {v.candidate.name:27} kp {v.candidate.kp:7.4f} kd {v.candidate.kd:7.5f}: "
                  f"mean {v.mean:6.2f} sd {v.sd:5.2f}{flag}")
    text = recommendation_text(report)
    if text:
        print(text)


def _check_number(value: float | None, key: str, low: float, high: float, *, low_open: bool = False,
                  unit: str = "") -> None:
    """A float option: finite and within [low, high] ((low, high] with low_open); InputError naming it.
    argparse's float() takes "nan" and "inf", which every comparison below would let through or trip on."""
    if value is None:
        return
    inside = low < value <= high if low_open else low <= value <= high
    if not math.isfinite(value) or not inside:
        span = f"({low:g}, {high:g}]" if low_open else f"[{low:g}, {high:g}]"
        raise InputError(f"must be a number in {span}{unit}, got {value:g}", key=key)


def cmd_tune(args: argparse.Namespace, ask: Ask = ask_operator,
             open_link: Callable[[LinkSpec, RobotProfile], Link] = open_real_link) -> int:
    _check_number(args.kp_start, "--kp-start", 0, 100, low_open=True)
    _check_number(args.step, "--step", 1.05, 4)
    _check_number(args.speed_pct, "--speed-pct", 5, 100)
    _check_number(args.time_s, "--time-s", 1, 60, unit=" s")
    # The guard's limit is in error units (reflectance %, at most 100 apart).
    _check_number(args.limit, "--limit", 0, 100, low_open=True)
    course = args.course
    if course is None and args.link == "sim":
        course = TUNING_COURSE
    profile, connector = load_robot(argparse.Namespace(**{**vars(args), "course": course}), open_link)
    follow = profile.follow.get(args.direction)
    if follow is None:
        raise InputError(f"the profile has no [follow.{args.direction}] table to tune", file=profile.source,
                         key=f"follow.{args.direction}")
    settings = TuneSettings(direction=args.direction, speed_pct=args.speed_pct or follow.speed_pct,
                            time_s=args.time_s, kp_start=args.kp_start, step=args.step,
                            bisections=args.bisections, verify_runs=args.verify_runs, limit=args.limit)
    options = {"direction": settings.direction, "speed_pct": settings.speed_pct, "time_s": settings.time_s,
               "kp_start": settings.kp_start, "step": settings.step, "bisections": settings.bisections,
               "verify_runs": settings.verify_runs, "limit": settings.limit}
    with Store(args.db) as store, MoveLog(store, connector, "tune", options) as log:
        report = tune(connector, settings, ask, log=log)
    print_report(report)
    print(log.kept())
    if args.json:
        from harness.jsonout import write_json

        write_json(args.json, {**report.as_dict(), "stored_session": log.uid})
    if args.write:
        rec = report.recommended
        if rec is None:
            print("Nothing written: no recommendation.")
            return 1
        if rec.candidate.name == "current":
            print(f"Nothing written: the current [follow.{args.direction}] gains are within one standard "
                  f"error of the best; {args.robot} is left as it was.")
            return 0
        from harness.calibrate.writeback import write_profile_values

        write_profile_values(args.robot, {"kp": round(rec.candidate.kp, 4), "kd": round(rec.candidate.kd, 5)},
                             f"trackproof tune: {rec.candidate.name} from Ku {report.ultimate.ku:.4f}, "
                             f"Tu {report.ultimate.tu_s:.4f} s at {settings.speed_pct:g} % speed",
                             table=("follow", args.direction))
        print(f"Wrote [follow.{args.direction}] kp and kd to {args.robot}")
    return 0


def add_parser(sub: argparse._SubParsersAction) -> None:
    # "resolve": add_robot_options' --course and --repeat are replaced below by tune's own.
    p = sub.add_parser(
        "tune", help="line-follower gains by the Ziegler-Nichols ultimate-gain method", conflict_handler="resolve",
        description="Raise the line follower's Kp (proportional only) in steps until the controller error "
                    "oscillates steadily, find the ultimate gain Ku and period Tu, recommend gains from the "
                    "Ziegler-Nichols (1942) table and gentler rules, and drive each several times to see which "
                    "tracks best (the current gains are kept when they track as well). The robot is stopped at "
                    "once if it loses the line or swings too far.")
    add_robot_options(p, repeat=5)
    p.add_argument("--course", type=Path, help=f"course for the simulated link (default {TUNING_COURSE.name})")
    p.add_argument("--verify-runs", "--repeat", type=whole_number(0), default=5,
                   help="runs per candidate to verify the gains (default 5; 0 skips)")
    p.add_argument("--direction", choices=("forward", "backward"), default="forward",
                   help="which [follow.*] gains to tune (default forward)")
    p.add_argument("--speed-pct", type=float, help="speed of every run (default: the profile's speed_pct)")
    p.add_argument("--time-s", type=float, default=5.0, help="length of every run (default 5 s)")
    p.add_argument("--kp-start", type=float, default=0.1, help="first Kp (default 0.1)")
    p.add_argument("--step", type=float, default=1.5, help="factor between Kp steps (default 1.5)")
    p.add_argument("--bisections", type=whole_number(0), default=4, help="bisection runs for Ku (default 4)")
    p.add_argument("--limit", type=float, help="guard: stop when |error| passes this on 4 half-cycles in a row "
                                               "(above 0, at most 100; default 45 for a sensor pair, 25 for one "
                                               "sensor)")
    p.set_defaults(func=cmd_tune)
