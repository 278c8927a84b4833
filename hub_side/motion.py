"""Pure helpers for the hub's actions: kinematics, speed profiles, parameter checking.

Kinematics are common practice for a differential drive (no published source needed): one motor
degree moves a wheel pi * D / 360 mm; a spin turn by angle a needs a * track / D motor degrees on
each wheel; a pivot turn about one stopped wheel needs twice that on the other wheel.

Unequal wheels: wheel_ratio is E_d = D_R / D_L, UMBmark's wheel-diameter ratio, around the one
wheel_diameter_mm D taken as their average. Each wheel's diameter is D times its correction factor,
c_L = 2 / (E_d + 1) and c_R = 2 / (1/E_d + 1) (J. Borenstein, L. Feng, "Measurement and Correction
of Systematic Odometry Errors in Mobile Robots", IEEE Trans. Robotics and Automation 12(6), 1996;
REFERENCES.md section 2): c_R / c_L = E_d and (c_L + c_R) / 2 = 1. With E_d = 1.0 both factors
are exactly 1.0 and every helper below gives, bit for bit, what the equal-wheel formulas give.

spin_offset_deg and pivot_offset_deg are the degrees a turn by the encoders goes on past its
target, mostly the coast after the motors stop (measured by `trackproof calibrate turns`); such a
turn aims that much short of the angle asked (turn_aim_deg). Both 0.0 by default.
"""

import math

DEFAULT_GEOMETRY = {
    "wheel_diameter_mm": 56.0,
    "track_mm": 112.0,
    "distance_scale": 1.0,
    "spin_scale": 1.0,
    "pivot_scale": 1.0,
    "wheel_ratio": 1.0,
    "spin_offset_deg": 0.0,
    "pivot_offset_deg": 0.0,
}


# What a hello may set; the host's profile checks the same ranges.
GEOMETRY_LIMITS = {
    "wheel_diameter_mm": (1.0, 1000.0),
    "track_mm": (1.0, 2000.0),
    "distance_scale": (0.5, 2.0),
    "spin_scale": (0.5, 2.0),
    "pivot_scale": (0.5, 2.0),
    "wheel_ratio": (0.9, 1.1),
    "spin_offset_deg": (-30.0, 30.0),
    "pivot_offset_deg": (-30.0, 30.0),
}
_SHOWN_CHARS = 40  # host text echoed in an error is cut here, so a refusal always fits its frame
MESSAGE_CHARS = 200  # a whole error message (which may echo host text) is cut here


def clip(text, chars=_SHOWN_CHARS):
    """Host text cut short: errors echo what the host sent without letting it grow the reply."""
    return text if len(text) <= chars else text[: chars - 3] + "..."


def shown(value):
    return clip(repr(value))


def is_finite_number(value):
    """A real number, not a bool, neither infinite nor NaN (x - x is 0 only for finite x)."""
    return not isinstance(value, bool) and isinstance(value, (int, float)) and value - value == 0


def is_whole(value):
    return not isinstance(value, bool) and isinstance(value, int)


def deg_per_mm(geometry):
    """Motor degrees per millimetre of travel of a wheel of the average diameter, with the
    distance correction factor."""
    return 360.0 / (math.pi * geometry["wheel_diameter_mm"]) * geometry["distance_scale"]


def wheel_factors(geometry):
    """(c_L, c_R): each wheel's diameter over wheel_diameter_mm (Borenstein & Feng 1996, see
    the module docstring); both exactly 1.0 when wheel_ratio is 1.0."""
    ratio = geometry.get("wheel_ratio", 1.0)
    return 2.0 / (ratio + 1.0), 2.0 / (1.0 / ratio + 1.0)


def wheel_mm_per_deg(geometry):
    """(left, right) millimetres a wheel travels per motor degree: c * pi * D / 360 / distance_scale."""
    c_l, c_r = wheel_factors(geometry)
    mm = 1.0 / deg_per_mm(geometry)
    return c_l * mm, c_r * mm


def travel_factors(geometry):
    """(left factor, right factor, average wheel's mm per degree) for travel_from: worked out
    once per action, not on every control tick."""
    c_l, c_r = wheel_factors(geometry)
    return c_l, c_r, 1.0 / deg_per_mm(geometry)


def travel_from(left_deg, right_deg, factors):
    """Travel of the axle midpoint for these motor degrees: the mean of the two wheels' travel,
    each at its own millimetres per degree. Written as factor times degrees, summed, times the
    average wheel's mm per degree, so equal wheels give exactly (left + right) / 2 * mm."""
    c_l, c_r, mm = factors
    return (left_deg * c_l + right_deg * c_r) * 0.5 * mm


def travel_mm(left_deg, right_deg, geometry):
    return travel_from(left_deg, right_deg, travel_factors(geometry))


def spin_motor_deg(angle_deg, geometry):
    """Motor degrees on each wheel for a spin turn about the axle midpoint, equal wheels of the
    average diameter (spin_wheel_deg gives each wheel its own)."""
    return angle_deg * geometry["track_mm"] / geometry["wheel_diameter_mm"] * geometry["spin_scale"]


def spin_wheel_deg(angle_deg, geometry):
    """(left, right) motor degrees for a spin turn: each wheel travels the same arc,
    angle * track / 2, so the smaller wheel turns more degrees (angle * track / (c * D))."""
    c_l, c_r = wheel_factors(geometry)
    track = geometry["track_mm"]
    scale = geometry["spin_scale"]
    return (angle_deg * track / (c_l * geometry["wheel_diameter_mm"]) * scale,
            angle_deg * track / (c_r * geometry["wheel_diameter_mm"]) * scale)


def encoder_heading_deg(left_deg, right_deg, geometry):
    """Heading change (clockwise) the wheel encoders imply: each wheel's degrees times its
    diameter factor, so a spin turn by spin_wheel_deg of a degrees reads back as a."""
    c_l, c_r = wheel_factors(geometry)
    return (
        (left_deg * c_l - right_deg * c_r) * geometry["wheel_diameter_mm"]
        / (2.0 * geometry["track_mm"] * geometry["spin_scale"])
    )


def turn_aim_deg(angle_deg, mode, geometry):
    """The signed angle a turn by the encoders aims for, so that with its offset it lands on
    angle_deg; never past zero (an offset larger than the angle is no turn at all). A negative
    offset (turns that stop short) aims further; no turn asked is no turn whatever the offset."""
    if angle_deg == 0:
        return 0.0
    offset = geometry.get("spin_offset_deg" if mode == "spin" else "pivot_offset_deg", 0.0)
    aim = max(0.0, abs(angle_deg) - offset)
    return aim if angle_deg >= 0 else -aim


def pivot_motor_deg(angle_deg, geometry):
    """Motor degrees on the moving wheel for a pivot turn about the other, stopped wheel, for a
    wheel of the average diameter (pivot_wheel_deg gives each wheel its own)."""
    return (
        angle_deg * 2.0 * geometry["track_mm"] / geometry["wheel_diameter_mm"]
        * geometry["pivot_scale"]
    )


def pivot_wheel_deg(angle_deg, geometry):
    """(left, right) motor degrees each wheel turns when it is the moving one of a pivot turn
    (pivot_right moves the left wheel, pivot_left the right): arc angle * track over c * D."""
    c_l, c_r = wheel_factors(geometry)
    arc = angle_deg * 2.0 * geometry["track_mm"]
    scale = geometry["pivot_scale"]
    return (arc / (c_l * geometry["wheel_diameter_mm"]) * scale,
            arc / (c_r * geometry["wheel_diameter_mm"]) * scale)


def ramp_speed_pct(travelled_mm, remaining_mm, p):
    """Speed for a ramp-hold-ramp profile: up from start_pct over ramp_up_mm, hold speed_pct,
    down to end_pct over the last ramp_down_mm (when the remaining distance is known)."""
    speed = p["speed_pct"]
    up = p["ramp_up_mm"]
    if up > 0 and travelled_mm < up:
        start = p["start_pct"]
        speed = start + (speed - start) * max(travelled_mm, 0.0) / up
    down = p["ramp_down_mm"]
    if down > 0 and remaining_mm is not None and remaining_mm < down:
        end = p["end_pct"]
        speed = min(speed, end + (p["speed_pct"] - end) * max(remaining_mm, 0.0) / down)
    return speed


def clamp(value, low, high):
    return low if value < low else high if value > high else value


# ------------------------------------------------------------------ parameter specs
#
# A spec maps each parameter to (kind, default, low, high_or_choices). Kinds: "num", "int",
# "str" (high is the tuple of allowed values), "sensor" (a sensor name), "sensors" (a list of
# one or two sensor names). A default of None means the parameter is required.


class ParamError(ValueError):
    def __init__(self, key, text):
        # super(), not ValueError.__init__: MicroPython's built-in types expose no __init__.
        super().__init__("%s: %s" % (key, text))
        self.key = key
        self.text = text


def check_params(spec, given, sensor_names):
    """Validated parameters with defaults filled in; ParamError names the first bad key."""
    for key in given:
        if key not in spec:
            raise ParamError(clip(key), "unknown parameter (known: %s)" % ", ".join(sorted(spec)))
    out = {}
    for key in spec:
        kind, default, low, high = spec[key]
        value = given[key] if key in given else default
        if value is None:
            raise ParamError(key, "required")
        out[key] = _check_value(key, kind, value, low, high, sensor_names)
    return out


def _check_value(key, kind, value, low, high, sensor_names):
    if kind == "num" or kind == "int":
        if not is_finite_number(value):
            raise ParamError(key, "expected a number, got %s" % shown(value))
        if value < low or value > high:
            raise ParamError(key, "must be between %s and %s, got %s" % (low, high, shown(value)))
        if kind == "int" and value != int(value):
            raise ParamError(key, "expected a whole number, got %s" % shown(value))
        return int(value) if kind == "int" else float(value)
    if kind == "str":
        if value not in high:
            raise ParamError(key, "expected one of %s, got %s" % (", ".join(high), shown(value)))
        return value
    if kind == "sensor":
        if value == "":
            return value
        if value not in sensor_names:
            raise ParamError(key, "unknown sensor %s (hub has: %s)" % (shown(value), ", ".join(sensor_names)))
        return value
    if kind == "sensors":
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not 1 <= len(value) <= 2:
            raise ParamError(key, "expected one or two sensor names")
        for name in value:
            if name not in sensor_names:
                raise ParamError(key, "unknown sensor %s (hub has: %s)" % (shown(name), ", ".join(sensor_names)))
        return list(value)
    raise ParamError(key, "bad spec kind %r" % kind)
