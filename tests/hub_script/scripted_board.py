"""A deterministic board for running the unchanged hub listener under CPython and MicroPython.

The model is kinematic and all integer, so both interpreters compute the same numbers bit for bit:
no randomness beyond a small integer LCG, no libm calls (sine is Bhaskara I's rational
approximation in integers), and every reported value is an int or an int divided by 100.0.

Truth (deliberately not the profile the host sends, like a real robot):
- a wheel turns 9 deg/s per % of power; the right motor is 35/36 as strong as the left;
- one wheel degree moves the wheel 0.5 mm; the track is such that heading (centidegrees)
  = (left - right wheel travel in 1e-4 deg) // 400;
- the gyro drifts 1 centidegree every 2 s; reflectance sensors refresh every millisecond;
- the mat has one straight line along +s (18 mm wide, edges blurred over 6 mm) and a cross mark
  every 250 mm from s = 150 mm: even-numbered marks branch to the left only, odd ones both ways.

Frame: s runs along the line, x to its right, in half-units of 1e-4 wheel degrees (1 mm = 40000).
Heading is clockwise from +s.
"""

from hub_side.board import Board, ticks_add

# Start the clock 2 s before MicroPython's 2**30 tick wrap so the hub's tick arithmetic is
# exercised across a wrap there (CPython's ticks never wrap; the results must not differ).
CLOCK_ORIGIN_US = (1 << 30) - 2000000

UNITS_PER_MM = 40000
LINE_HALF_TENTHS = 90  # line half-width, 0.1 mm
BLUR_TENTHS = 30  # reflectance ramps over +-3 mm around each edge
MARK_FIRST_MM = 150
MARK_PITCH_MM = 250
DARK_PCT = 10
LIGHT_PCT = 90
SENSOR_PERIOD_US = 1000

# name: (forward_mm, left_mm) from the axle midpoint.
SENSORS = (
    ("line_left", 60, 10),
    ("line_right", 60, -10),
    ("side_left", 60, 35),
    ("side_right", 60, -35),
)


def sin_milli(cdeg):
    """sin(cdeg / 100 degrees) * 1000, Bhaskara I's approximation (error < 2e-3) in integers."""
    x = (cdeg // 10) % 3600  # tenths of a degree in [0, 3600)
    sign = 1
    if x >= 1800:
        x -= 1800
        sign = -1
    q = x * (1800 - x)
    # 4q / (4050000 - q) rewritten so every intermediate stays a MicroPython small int.
    return sign * (1000 * q // (1012500 - q // 4))


def cos_milli(cdeg):
    return sin_milli(cdeg + 9000)


def _edge_pct(dist_tenths):
    """Reflectance at a distance (0.1 mm) from a line's centre line."""
    if dist_tenths < 0:
        dist_tenths = -dist_tenths
    low = LINE_HALF_TENTHS - BLUR_TENTHS
    high = LINE_HALF_TENTHS + BLUR_TENTHS
    if dist_tenths <= low:
        return DARK_PCT
    if dist_tenths >= high:
        return LIGHT_PCT
    return DARK_PCT + (LIGHT_PCT - DARK_PCT) * (dist_tenths - low) // (high - low)


class ScriptedBoard(Board):
    sensor_names = tuple(s[0] for s in SENSORS)
    capabilities = {"gyro": True, "scripted": True}

    def __init__(self, rx_chunk=7):
        self.rx_chunk = rx_chunk  # bytes handed over per link_read, like a serial driver
        self.now_us = 0  # virtual time since power-on
        self._last_us = 0
        self._power = [0, 0]  # tenths of a percent
        self._wheel = [0, 0]  # 1e-4 deg
        self._carry = [0, 0]
        self._s = 0
        self._x = 0
        self._carry_s = 0
        self._carry_x = 0
        self._lcg = 12345
        self._rx = bytearray()
        self.tx = bytearray()
        self._places = {}
        self._held = {}
        for name, forward_mm, left_mm in SENSORS:
            self._places[name] = (forward_mm, left_mm)

    # ------------------------------------------------------------ test side

    def host_send(self, data):
        self._rx.extend(data)

    def take_tx(self):
        out = bytes(self.tx)
        self.tx = bytearray()
        return out

    def true_cdeg(self):
        return (self._wheel[0] - self._wheel[1]) // 400

    def pose(self):
        """(s_mm, x_mm, heading_cdeg) truth, rounded down to whole millimetres."""
        return (self._s // UNITS_PER_MM, self._x // UNITS_PER_MM, self.true_cdeg())

    # ------------------------------------------------------------ model

    def _advance(self):
        dt = self.now_us - self._last_us
        if dt <= 0:
            return
        self._last_us = self.now_us
        # Carries make wheel travel independent of how time is split into calls.
        acc = 9 * self._power[0] * dt + self._carry[0]
        d_left = acc // 1000
        self._carry[0] = acc - d_left * 1000
        acc = 35 * self._power[1] * dt + self._carry[1]
        d_right = acc // 4000
        self._carry[1] = acc - d_right * 4000
        if not d_left and not d_right:
            return
        heading = self.true_cdeg()  # Euler step from the heading at the start of the interval
        self._wheel[0] += d_left
        self._wheel[1] += d_right
        travel = d_left + d_right  # twice the midpoint's travel, in half-units
        acc = travel * cos_milli(heading) + self._carry_s
        ds = acc // 1000
        self._carry_s = acc - ds * 1000
        acc = travel * sin_milli(heading) + self._carry_x
        dx = acc // 1000
        self._carry_x = acc - dx * 1000
        self._s += ds
        self._x += dx

    def _noise(self):
        # A small LCG (a=75, c=74, m=2**16+1) whose products stay MicroPython small ints.
        self._lcg = (self._lcg * 75 + 74) % 65537
        return self._lcg % 3 - 1

    # ------------------------------------------------------------ Board

    def ticks_us(self):
        return ticks_add(CLOCK_ORIGIN_US, self.now_us)

    def idle_us(self, us):
        if us > 0:
            self.now_us += int(us)

    def set_power(self, left_pct, right_pct):
        self._advance()
        self._power[0] = int(max(-100, min(100, left_pct)) * 10)
        self._power[1] = int(max(-100, min(100, right_pct)) * 10)

    def encoders_deg(self):
        self._advance()
        return (self._wheel[0] // 10000, self._wheel[1] // 10000)

    def heading_deg(self):
        self._advance()
        return (self.true_cdeg() + self.now_us // 2000000) / 100.0

    def reflectance_pct(self, name):
        # Like a real colour sensor, each one refreshes its reading every SENSOR_PERIOD_US and
        # reads in between return the held value.
        period = self.now_us // SENSOR_PERIOD_US
        held = self._held.get(name)
        if held is not None and held[0] == period:
            return held[1]
        value = self._measure(name)
        self._held[name] = (period, value)
        return value

    def _measure(self, name):
        self._advance()
        forward_mm, left_mm = self._places[name]
        heading = self.true_cdeg()
        c = cos_milli(heading)
        s = sin_milli(heading)
        # Sensor position in 0.1 mm: robot + forward * (cos, sin) + left * (sin, -cos).
        along = self._s // 4000 + (forward_mm * c + left_mm * s) // 100
        across = self._x // 4000 + (forward_mm * s - left_mm * c) // 100
        value = _edge_pct(across)
        pitch = MARK_PITCH_MM * 10
        k = (along - MARK_FIRST_MM * 10 + pitch // 2) // pitch  # nearest mark
        if k >= 0 and (across <= 0 or k % 2 == 1):
            mark = _edge_pct(along - MARK_FIRST_MM * 10 - k * pitch)
            if mark < value:
                value = mark
        value += self._noise()
        return 0 if value < 0 else 100 if value > 100 else value

    def battery_mv(self):
        return 7800 - self.now_us // 4000000

    def link_read(self):
        if not self._rx:
            return b""
        out = bytes(self._rx[: self.rx_chunk])
        self._rx = self._rx[self.rx_chunk :]
        return out

    def link_write(self, data):
        self.tx.extend(data)
