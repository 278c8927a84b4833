"""Pure helpers for the hub's actions: kinematics, speed profiles, parameter checking.

Kinematics are common practice for a differential drive (no published source needed): one motor
degree moves a wheel pi * D / 360 mm; a spin turn by angle a needs a * track / D motor degrees on
each wheel; a pivot turn about one stopped wheel needs twice that on the other wheel.
"""

import math

DEFAULT_GEOMETRY = {
    "wheel_diameter_mm": 56.0,
    "track_mm": 112.0,
    "distance_scale": 1.0,
    "spin_scale": 1.0,
    "pivot_scale": 1.0,
}


# What a hello may set; the host's profile checks the same ranges.
GEOMETRY_LIMITS = {
    "wheel_diameter_mm": (1.0, 1000.0),
    "track_mm": (1.0, 2000.0),
    "distance_scale": (0.5, 2.0),
    "spin_scale": (0.5, 2.0),
    "pivot_scale": (0.5, 2.0),
}
_SHOWN_CHARS = 40  # host text echoed in an error is cut here, so a refusal always fits its frame


def clip(text):
    """Host text cut short: errors echo what the host sent without letting it grow the reply."""
    return text if len(text) <= _SHOWN_CHARS else text[: _SHOWN_CHARS - 3] + "..."


def shown(value):
    return clip(repr(value))


def is_finite_number(value):
    """A real number, not a bool, neither infinite nor NaN (x - x is 0 only for finite x)."""
    return not isinstance(value, bool) and isinstance(value, (int, float)) and value - value == 0


def is_whole(value):
    return not isinstance(value, bool) and isinstance(value, int)


def deg_per_mm(geometry):
    """Motor degrees per millimetre of travel, with the distance correction factor."""
    return 360.0 / (math.pi * geometry["wheel_diameter_mm"]) * geometry["distance_scale"]


def spin_motor_deg(angle_deg, geometry):
    """Motor degrees on each wheel for a spin turn about the axle midpoint."""
    return angle_deg * geometry["track_mm"] / geometry["wheel_diameter_mm"] * geometry["spin_scale"]


def encoder_heading_deg(left_deg, right_deg, geometry):
    """Heading change (clockwise) the wheel encoders imply: the inverse of spin_motor_deg, so a
    spin turn of a degrees reads back as a."""
    return (
        (left_deg - right_deg) * geometry["wheel_diameter_mm"]
        / (2.0 * geometry["track_mm"] * geometry["spin_scale"])
    )


def pivot_motor_deg(angle_deg, geometry):
    """Motor degrees on the moving wheel for a pivot turn about the other, stopped wheel."""
    return (
        angle_deg * 2.0 * geometry["track_mm"] / geometry["wheel_diameter_mm"]
        * geometry["pivot_scale"]
    )


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
