"""Built-in actions. Each is a generator function action(ctx, p) -> result dict.

The listener advances a running action once per control period (one `yield` = wait for the next
period) and closes it on stop, timeout or watchdog. `p` holds parameters already checked against
the action's spec in SPECS. Angles are positive clockwise seen from above.

Steering convention: `error_pct` is how far the line lies to the robot's left (in reflectance
percent); a pair of sensors is listed left first. Forward, a positive error slows the left wheel;
backward, the sensors lead from the rear and the correction flips.
"""

from hub_side.motion import (
    clamp,
    encoder_heading_deg,
    pivot_wheel_deg,
    ramp_speed_pct,
    spin_wheel_deg,
    turn_aim_deg,
)

_SPEED = ("num", 40.0, 1.0, 100.0)  # 0 would never arrive: a refusal, not a timeout
_RAMP = {
    "start_pct": ("num", 15.0, 0.0, 100.0),
    "ramp_up_mm": ("num", 0.0, 0.0, 100000.0),
    "end_pct": ("num", 15.0, 0.0, 100.0),
    "ramp_down_mm": ("num", 0.0, 0.0, 100000.0),
}
_TIMEOUT = ("num", 30.0, 0.1, 3600.0)
_SIDES = ("left", "right", "any")


def _spec(base, extra):
    spec = dict(base)
    for key in extra:
        spec[key] = extra[key]
    return spec


FOLLOW_LINE = _spec(_RAMP, {
    "direction": ("str", "forward", None, ("forward", "backward")),
    "sensors": ("sensors", None, None, None),
    "edge": ("str", "left", None, ("left", "right")),
    "threshold_pct": ("num", 60.0, 1.0, 99.0),
    "kp": ("num", 0.6, 0.0, 100.0),
    "kd": ("num", 0.0, 0.0, 100.0),
    "speed_pct": _SPEED,
    "distance_mm": ("num", 0.0, 0.0, 100000.0),
    "junctions": ("int", 0, 0, 100),
    "time_s": ("num", 0.0, 0.0, 3600.0),
    "side": ("str", "any", None, _SIDES),
    "junction_left": ("sensor", "", None, None),
    "junction_right": ("sensor", "", None, None),
    "arm_after_mm": ("num", 30.0, 0.0, 100000.0),
    "overrun_mm": ("num", 0.0, 0.0, 10000.0),
    "timeout_s": _TIMEOUT,
})

TURN = {
    "angle_deg": ("num", None, -1080.0, 1080.0),
    "mode": ("str", "spin", None, ("spin", "pivot_left", "pivot_right")),
    "using": ("str", "encoders", None, ("encoders", "gyro")),
    "speed_pct": _SPEED,
    "min_pct": ("num", 12.0, 0.0, 100.0),
    "slow_deg": ("num", 25.0, 0.0, 360.0),
    "timeout_s": ("num", 10.0, 0.1, 3600.0),
}

DRIVE_STRAIGHT = _spec(_RAMP, {
    "distance_mm": ("num", None, -100000.0, 100000.0),
    "speed_pct": _SPEED,
    "kp_heading": ("num", 2.0, 0.0, 100.0),
    # gyro: hold the gyro heading; encoders: hold the heading the wheel encoders imply (pure
    # odometry, as the UMBmark square test needs: no gyro may hide unequal wheels).
    "hold": ("str", "gyro", None, ("gyro", "encoders")),
    "timeout_s": _TIMEOUT,
})

PROBE_EDGE = {
    "sensor": ("sensor", None, None, None),
    "direction": ("str", "backward", None, ("forward", "backward")),
    "speed_pct": ("num", 10.0, 1.0, 100.0),
    "threshold_pct": ("num", 60.0, 1.0, 99.0),
    "max_mm": ("num", 150.0, 1.0, 10000.0),
    "timeout_s": ("num", 15.0, 0.1, 3600.0),
}

STOP = {}

# How long a stop waits for the wheels to come to rest, so results include the coast.
_SETTLE_PERIODS = 3
_SETTLE_MAX_US = 600000


def settle(ctx):
    """Brake, then wait until the encoders have not moved for a few control periods."""
    ctx.set_power(0, 0)
    last = ctx.encoders()
    still = 0
    waited = 0
    while still < _SETTLE_PERIODS and waited < _SETTLE_MAX_US:
        yield
        waited += ctx.period_us
        now = ctx.encoders()
        still = still + 1 if now == last else 0
        last = now


def _steer(ctx, base_pct, turn_pct, sign):
    ctx.set_power(clamp(base_pct - sign * turn_pct, -100, 100),
                  clamp(base_pct + sign * turn_pct, -100, 100))


class _Junctions:
    """Counts junctions seen by the side sensors: a junction starts when a watched sensor goes
    dark and ends when every watched sensor is light again; it lies mid-way between the two."""

    def __init__(self, ctx, p):
        self.sensors = []
        if p["side"] in ("left", "any") and p["junction_left"]:
            self.sensors.append(("left", p["junction_left"]))
        if p["side"] in ("right", "any") and p["junction_right"]:
            self.sensors.append(("right", p["junction_right"]))
        self.dark = p["threshold_pct"]
        self.light = p["threshold_pct"] + 5.0
        self.inside = False
        self.enter_mm = 0.0
        self.sides = []
        self.count = 0

    def update(self, ctx, travelled_mm):
        """The junction's position in mm if one just ended, else None."""
        any_dark = False
        all_light = True
        for side, name in self.sensors:
            value = ctx.reflectance(name)
            if value < self.dark:
                any_dark = True
                if self.inside and side not in self.sides:
                    self.sides.append(side)
            if value < self.light:
                all_light = False
        if not self.inside:
            if any_dark:
                self.inside = True
                self.enter_mm = travelled_mm
                self.sides = [side for side, name in self.sensors if ctx.reflectance(name) < self.dark]
            return None
        if all_light:
            self.inside = False
            self.count += 1
            at_mm = (self.enter_mm + travelled_mm) / 2.0
            sides = self.sides
            ctx.event("junction", {"index": self.count, "at_mm": round(at_mm, 1),
                                   "sides": "+".join(sorted(sides))})
            return at_mm
        return None


def follow_line(ctx, p):
    sensors = p["sensors"]
    sign = 1 if p["direction"] == "forward" else -1
    if p["distance_mm"] <= 0 and p["junctions"] <= 0 and p["time_s"] <= 0:
        raise ValueError("follow_line needs distance_mm, junctions or time_s")
    junctions = None
    if p["junctions"] > 0:
        junctions = _Junctions(ctx, p)
        if not junctions.sensors:
            raise ValueError("junctions need junction_left and/or junction_right for side %s" % p["side"])
    kp = p["kp"]
    kd = p["kd"]
    dt_s = ctx.period_us / 1e6
    edge_sign = 1.0 if p["edge"] == "right" else -1.0
    target = p["threshold_pct"]
    pair = len(sensors) == 2
    limit_mm = p["distance_mm"] if p["distance_mm"] > 0 else None
    stop_at_mm = None  # set once the wanted junction has been seen
    time_us = int(p["time_s"] * 1e6) if p["time_s"] > 0 else None
    last_error = None
    junction_mm = None
    while True:
        travelled = ctx.distance_mm() * sign
        if limit_mm is not None and travelled >= limit_mm:
            break
        if stop_at_mm is not None and travelled >= stop_at_mm:
            break
        if time_us is not None and ctx.t_us >= time_us:
            break
        if junctions is not None and stop_at_mm is None and travelled >= p["arm_after_mm"]:
            at_mm = junctions.update(ctx, travelled)
            if at_mm is not None and junctions.count >= p["junctions"]:
                junction_mm = at_mm
                stop_at_mm = at_mm + p["overrun_mm"]
                continue
        if pair:
            error = ctx.reflectance(sensors[1]) - ctx.reflectance(sensors[0])
        else:
            error = edge_sign * (ctx.reflectance(sensors[0]) - target)
        ctx.error_pct = error
        derivative = 0.0 if last_error is None else (error - last_error) / dt_s
        last_error = error
        remaining = None
        for end_mm in (limit_mm, stop_at_mm):
            if end_mm is not None and (remaining is None or end_mm - travelled < remaining):
                remaining = end_mm - travelled
        base = sign * ramp_speed_pct(travelled, remaining, p)
        _steer(ctx, base, kp * error + kd * derivative, sign)
        yield
    ctx.error_pct = 0.0
    yield from settle(ctx)
    result = {"junctions": junctions.count if junctions is not None else 0}
    if junction_mm is not None:
        result["junction_at_mm"] = round(junction_mm, 2)
        result["overrun_measured_mm"] = round(ctx.distance_mm() * sign - junction_mm, 2)
    return result


def turn(ctx, p):
    mode = p["mode"]
    use_gyro = p["using"] == "gyro"
    cw = 1 if p["angle_deg"] >= 0 else -1
    # By the encoders, aim short by the profile's offset (the coast after the motors stop).
    angle = p["angle_deg"] if use_gyro else turn_aim_deg(p["angle_deg"], mode, ctx.geometry)
    # Wheel directions for a clockwise turn; a counter-clockwise turn reverses both. Each moving
    # wheel has its own motor-degree target (unequal wheels: the smaller one turns more).
    if mode == "spin":
        left_dir, right_dir = cw, -cw
        want_left, want_right = spin_wheel_deg(angle, ctx.geometry)
    elif mode == "pivot_left":
        left_dir, right_dir = 0, -cw
        want_left, want_right = 0.0, pivot_wheel_deg(angle, ctx.geometry)[1]
    else:
        left_dir, right_dir = cw, 0
        want_left, want_right = pivot_wheel_deg(angle, ctx.geometry)[0], 0.0
    want_left = abs(want_left)
    want_right = abs(want_right)
    moving = abs(left_dir) + abs(right_dir)
    # Progress is counted in the moving wheels' mean target: each wheel's degrees weighted by
    # target / its own target, so the turn ends when the wheels' mean fraction done reaches 1
    # (for a spin: when the encoder heading reaches the angle). Equal wheels weigh exactly 1.0.
    target = (want_left + want_right) / moving
    weight_left = target / want_left if want_left > 0 else 1.0
    weight_right = target / want_right if want_right > 0 else 1.0
    # Power in proportion to each wheel's target, so both wheels finish together.
    power_left = left_dir / weight_left
    power_right = right_dir / weight_right
    if use_gyro:
        target = abs(angle)
    # The slow-down window in the same unit as progress.
    slow = p["slow_deg"] if use_gyro else p["slow_deg"] * target / max(abs(angle), 1e-9)
    start_left, start_right = ctx.encoders()
    start_heading = ctx.heading()
    while True:
        if use_gyro:
            progress = (ctx.heading() - start_heading) * cw
        else:
            left, right = ctx.encoders()
            progress = (abs(left - start_left) * weight_left + abs(right - start_right) * weight_right) / moving
        remaining = target - progress
        if remaining <= 0:
            break
        speed = p["speed_pct"]
        if slow > 0 and remaining < slow:
            speed = max(p["min_pct"], speed * remaining / slow)
        left_pct, right_pct = power_left * speed, power_right * speed
        # Near full speed, scale both down rather than clamp one: they must keep their ratio.
        over = max(abs(left_pct), abs(right_pct)) / 100.0
        if over > 1.0:
            left_pct, right_pct = left_pct / over, right_pct / over
        ctx.set_power(left_pct, right_pct)
        yield
    yield from settle(ctx)
    # target_deg: the heading change aimed for (after any offset); by the encoders also the
    # moving wheels' mean motor-degree target it stood for.
    out = {"target_deg": round(abs(angle), 2)}
    if not use_gyro:
        out["target_motor_deg"] = round(target, 2)
    return out


def drive_straight(ctx, p):
    sign = 1 if p["distance_mm"] >= 0 else -1
    goal = abs(p["distance_mm"])
    by_encoders = p["hold"] == "encoders"
    hold = ctx.heading()
    start_left, start_right = ctx.encoders()
    while True:
        travelled = ctx.distance_mm() * sign
        if travelled >= goal:
            break
        if by_encoders:
            left, right = ctx.encoders()
            error = encoder_heading_deg(left - start_left, right - start_right, ctx.geometry)
        else:
            error = ctx.heading() - hold
        ctx.error_pct = error
        base = sign * ramp_speed_pct(travelled, goal - travelled, p)
        turn_pct = p["kp_heading"] * error
        ctx.set_power(clamp(base - turn_pct, -100, 100), clamp(base + turn_pct, -100, 100))
        yield
    ctx.error_pct = 0.0
    yield from settle(ctx)
    return {}


def probe_edge(ctx, p):
    name = p["sensor"]
    sign = 1 if p["direction"] == "forward" else -1
    threshold = p["threshold_pct"]
    last_mm = 0.0
    last_value = ctx.reflectance(name)
    started_dark = last_value < threshold
    edge_mm = None
    while True:
        travelled = ctx.distance_mm() * sign
        value = ctx.reflectance(name)
        if (value < threshold) != started_dark:
            # Interpolate where the reading crossed the threshold between the last two samples.
            span = value - last_value
            frac = (threshold - last_value) / span if span else 1.0
            edge_mm = last_mm + clamp(frac, 0.0, 1.0) * (travelled - last_mm)
            break
        if travelled >= p["max_mm"]:
            break
        last_mm = travelled
        last_value = value
        ctx.set_power(sign * p["speed_pct"], sign * p["speed_pct"])
        yield
    yield from settle(ctx)
    if edge_mm is None:
        return {"status": "not_found", "edge_mm": None}
    return {"edge_mm": round(edge_mm, 2), "from": "dark" if started_dark else "light"}


def stop(ctx, p):
    yield from settle(ctx)
    return {}


BUILTINS = {
    "follow_line": (follow_line, FOLLOW_LINE),
    "turn": (turn, TURN),
    "drive_straight": (drive_straight, DRIVE_STRAIGHT),
    "probe_edge": (probe_edge, PROBE_EDGE),
    "stop": (stop, STOP),
}
