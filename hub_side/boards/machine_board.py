"""A generic board adapter on MicroPython's `machine` module, configured by one dict.

    from hub_side.boards.machine_board import MachineBoard
    from hub_side.usb_serial import UsbSerialLink
    board = MachineBoard(CONFIG, UsbSerialLink())

Hardware it expects (every part but the motors and encoders is optional):

- Motors: one H-bridge per motor driven by TWO PWM pins ("in A" / "in B", the usual input pair of
  small dual H-bridge drivers). Forward: PWM on A, B low; backward: A low, PWM on B. At power 0
  both inputs go high, which such drivers treat as brake (or both low, coast, with
  "brake_at_zero": False). Drivers with a PWM + direction input pair are not covered; wire them
  as a small Board subclass overriding set_power.
- Encoders: quadrature, both channels on interrupt-capable pins, every edge of A and B counted
  (x4 decoding). "encoder_counts_per_rev" is the number of those edges per turn of the shaft that
  drives the wheel (lines per encoder turn x 4 x gear ratio).
- Reflectance: analog sensors on ADC pins, each calibrated with its raw reading over black and
  over white (read them with raw_reflectance(name)); either may be the larger one.
- Gyro: a common 6-axis I2C IMU register map, from memory (check your part's register map):
  0x6B power management 1 (writing 0 clears the sleep bit), 0x1B gyro config (0 selects
  +-250 deg/s), 0x47/0x48 gyro Z high/low byte, two's complement, 131 LSB per deg/s at +-250.
  The chip's Z rate is positive counter-clockwise seen from its top face; our heading is
  clockwise positive, hence "gyro_sign": -1 for a chip mounted face up, +1 face down.
  Its bias is measured at start-up while the robot stands still, then the rate is integrated
  (trapezoids) into a continuous heading every time the heading is read or the board idles.
- Battery: an ADC pin behind a resistor divider ("battery_divider" = battery volts per ADC volt).
- Stop button: a pin to ground with the internal pull-up (or set "stop_button_active_low").

Everything is in the CONFIG dict; see DEFAULTS for each key, its unit and its default.
"""

import time

from machine import ADC, I2C, PWM, Pin

from hub_side.board import Board, ticks_add, ticks_diff
from hub_side.boards import LinkDelegate

REQUIRED = ("left_motor_pins", "right_motor_pins", "left_encoder_pins", "right_encoder_pins",
            "encoder_counts_per_rev")

DEFAULTS = {
    "pwm_freq_hz": 20000,  # above hearing; most small drivers switch fine at 20 kHz
    "left_motor_reversed": False,  # True: swap forward/backward for this motor
    "right_motor_reversed": False,
    "brake_at_zero": True,
    "left_encoder_reversed": False,  # True: this encoder counts down when the wheel drives forward
    "right_encoder_reversed": False,
    "encoder_pull_up": True,  # internal pull-ups for open-collector encoder outputs
    "encoder_hard_irq": True,  # hard IRQs count fast edges reliably where the port has them
    # (name, adc_pin, raw_over_black, raw_over_white) in the order telemetry reports them.
    # A list, not a dict: MicroPython dicts do not keep insertion order.
    "reflectance": [],
    "imu_i2c_id": 0,
    "imu_scl_pin": None,  # None: no gyro; heading_deg() then stays 0 and capabilities say so
    "imu_sda_pin": None,
    "imu_i2c_freq_hz": 400000,
    "imu_address": 0x68,
    "gyro_sign": -1,
    "gyro_calibration_samples": 200,
    "gyro_calibration_interval_us": 2000,
    "gyro_still_dps": 1.0,  # largest spread of readings accepted as "standing still"
    "gyro_step_us": 2000,  # longest gap between two gyro readings while idling
    "battery_adc_pin": None,
    "battery_divider": 3.0,
    "adc_full_scale_mv": 3300,  # ADC input voltage that reads 65535
    "stop_button_pin": None,
    "stop_button_active_low": True,
}

# Common IMU register map (from memory, see the module docstring).
_REG_PWR_MGMT_1 = 0x6B
_REG_GYRO_CONFIG = 0x1B
_REG_GYRO_Z_H = 0x47
GYRO_LSB_PER_DPS = 131.0
_GYRO_WAKE_US = 100000
_GYRO_CALIBRATION_TRIES = 3

# x4 quadrature decoding: index (previous state << 2) | new state, state = A << 1 | B. With A
# leading B the states run 0, 2, 3, 1 (+1 each); the reverse order counts -1; no change or an
# impossible double change (a missed edge) counts 0. The standard quadrature state table.
_QUAD = (0, -1, 1, 0, 1, 0, 0, -1, -1, 0, 0, 1, 0, 1, -1, 0)


def _config(config):
    out = dict(DEFAULTS)
    for key in config:
        if key not in DEFAULTS and key not in REQUIRED:
            raise ValueError("board config: unknown key %r" % key)
        out[key] = config[key]
    for key in REQUIRED:
        if key not in config:
            raise ValueError("board config: %r is required" % key)
    if out["encoder_counts_per_rev"] <= 0:
        raise ValueError("board config: encoder_counts_per_rev must be positive")
    return out


class HBridge:
    """One motor on two PWM inputs."""

    def __init__(self, pins, freq_hz, reversed_, brake_at_zero):
        self._a = PWM(Pin(pins[0]))
        self._b = PWM(Pin(pins[1]))
        self._a.freq(freq_hz)
        self._b.freq(freq_hz)
        self._sign = -1 if reversed_ else 1
        self._idle = 65535 if brake_at_zero else 0
        self.set(0)

    def set(self, pct):
        pct = max(-100, min(100, pct)) * self._sign
        duty = int(abs(pct) * 655.35 + 0.5)  # 100 % -> 65535
        if pct > 0:
            self._b.duty_u16(0)
            self._a.duty_u16(duty)
        elif pct < 0:
            self._a.duty_u16(0)
            self._b.duty_u16(duty)
        else:
            self._a.duty_u16(self._idle)
            self._b.duty_u16(self._idle)


class Quadrature:
    """An encoder counted in pin interrupts on both edges of both channels."""

    def __init__(self, pins, pull_up, hard, reversed_):
        pull = Pin.PULL_UP if pull_up else None
        self._a = Pin(pins[0], Pin.IN, pull)
        self._b = Pin(pins[1], Pin.IN, pull)
        self._state = (self._a.value() << 1) | self._b.value()
        self.sign = -1 if reversed_ else 1
        self.count = 0
        trigger = Pin.IRQ_RISING | Pin.IRQ_FALLING
        self._a.irq(handler=self._edge, trigger=trigger, hard=hard)
        self._b.irq(handler=self._edge, trigger=trigger, hard=hard)

    def _edge(self, pin):
        # Reads both channels now rather than trusting which pin fired: robust to bounce.
        state = (self._a.value() << 1) | self._b.value()
        self.count += _QUAD[(self._state << 2) | state]
        self._state = state

    def close(self):
        self._a.irq(handler=None)
        self._b.irq(handler=None)


class MachineBoard(LinkDelegate, Board):
    """Board on `machine`; link is any object with read() / write(data) / close().

    clock defaults to the `time` module (ticks_us, sleep_us); tests pass a virtual one."""

    def __init__(self, config, link, clock=None):
        c = _config(config)
        self.config = c
        self.link = link
        self._clock = clock if clock is not None else time
        self._motors = (
            HBridge(c["left_motor_pins"], c["pwm_freq_hz"], c["left_motor_reversed"], c["brake_at_zero"]),
            HBridge(c["right_motor_pins"], c["pwm_freq_hz"], c["right_motor_reversed"], c["brake_at_zero"]),
        )
        self._encoders = (
            Quadrature(c["left_encoder_pins"], c["encoder_pull_up"], c["encoder_hard_irq"],
                       c["left_encoder_reversed"]),
            Quadrature(c["right_encoder_pins"], c["encoder_pull_up"], c["encoder_hard_irq"],
                       c["right_encoder_reversed"]),
        )
        self._counts_per_rev = c["encoder_counts_per_rev"]
        names = []
        self._sensors = {}
        for entry in c["reflectance"]:
            name, pin, black, white = entry
            if name in self._sensors:
                raise ValueError("board config: reflectance sensor %r listed twice" % name)
            names.append(name)
            self._sensors[name] = [ADC(Pin(pin)), 0, 1]
            self.calibrate(name, black, white)
        self.sensor_names = tuple(names)
        self._battery = ADC(Pin(c["battery_adc_pin"])) if c["battery_adc_pin"] is not None else None
        self._battery_scale = c["adc_full_scale_mv"] * c["battery_divider"] / 65535
        self._button = None
        if c["stop_button_pin"] is not None:
            pull = Pin.PULL_UP if c["stop_button_active_low"] else Pin.PULL_DOWN
            self._button = Pin(c["stop_button_pin"], Pin.IN, pull)
        self._heading = 0.0
        self._i2c = None
        self.gyro_bias_raw = 0.0
        self.gyro_still = False
        if c["imu_scl_pin"] is not None:
            self._start_gyro(c)
        self.capabilities = {
            "gyro": self._i2c is not None,
            "gyro_still_at_start": self.gyro_still,
            "encoders": True,
            "battery": self._battery is not None,
            "button": self._button is not None,
        }

    # ------------------------------------------------------------ gyro

    def _start_gyro(self, c):
        self._i2c = I2C(c["imu_i2c_id"], scl=Pin(c["imu_scl_pin"]), sda=Pin(c["imu_sda_pin"]),
                        freq=c["imu_i2c_freq_hz"])
        self._imu = c["imu_address"]
        self._gyro_buf = bytearray(2)
        self._gyro_sign = c["gyro_sign"]
        self._gyro_step_us = c["gyro_step_us"]
        self._i2c.writeto_mem(self._imu, _REG_PWR_MGMT_1, b"\x00")
        self._i2c.writeto_mem(self._imu, _REG_GYRO_CONFIG, b"\x00")
        self._clock.sleep_us(_GYRO_WAKE_US)
        self.calibrate_gyro(c["gyro_calibration_samples"], c["gyro_calibration_interval_us"],
                            c["gyro_still_dps"])

    def gyro_raw(self):
        """Gyro Z as the chip reports it (signed 16 bit, counter-clockwise positive)."""
        buf = self._gyro_buf
        self._i2c.readfrom_mem_into(self._imu, _REG_GYRO_Z_H, buf)
        value = (buf[0] << 8) | buf[1]
        return value - 65536 if value & 0x8000 else value

    def calibrate_gyro(self, samples=200, interval_us=2000, still_dps=1.0):
        """Measure the gyro's bias while the robot stands still; the heading restarts at 0.
        Tries again (up to 3 times) when readings spread more than still_dps; gyro_still says
        whether the last try was still."""
        limit = still_dps * GYRO_LSB_PER_DPS
        for _ in range(_GYRO_CALIBRATION_TRIES):
            total = 0
            low = high = self.gyro_raw()
            for _ in range(samples):
                value = self.gyro_raw()
                total += value
                if value < low:
                    low = value
                if value > high:
                    high = value
                self._clock.sleep_us(interval_us)
            self.gyro_bias_raw = total / samples
            self.gyro_still = high - low <= limit
            if self.gyro_still:
                break
        self._heading = 0.0
        self._gyro_t = self._clock.ticks_us()
        self._gyro_rate = self._rate_dps()

    def _rate_dps(self):
        """Clockwise-positive turn rate in degrees per second."""
        return (self.gyro_raw() - self.gyro_bias_raw) * self._gyro_sign / GYRO_LSB_PER_DPS

    def _integrate(self):
        now = self._clock.ticks_us()
        dt_us = ticks_diff(now, self._gyro_t)
        if dt_us <= 0:
            return
        rate = self._rate_dps()
        self._heading += (self._gyro_rate + rate) * 0.5 * dt_us / 1000000
        self._gyro_rate = rate
        self._gyro_t = now

    # ------------------------------------------------------------ Board

    def ticks_us(self):
        return self._clock.ticks_us()

    def idle_us(self, us):
        clock = self._clock
        if self._i2c is None:
            if us > 0:
                clock.sleep_us(us)
            return
        # Sleep in slices so the heading keeps being integrated while nothing else happens.
        end = ticks_add(clock.ticks_us(), int(us))
        while True:
            self._integrate()
            left = ticks_diff(end, clock.ticks_us())
            if left <= 0:
                return
            clock.sleep_us(min(left, self._gyro_step_us))

    def set_power(self, left_pct, right_pct):
        self._motors[0].set(left_pct)
        self._motors[1].set(right_pct)

    def encoders_deg(self):
        cpr = self._counts_per_rev
        left, right = self._encoders
        return (left.count * left.sign * 360 // cpr, right.count * right.sign * 360 // cpr)

    def raw_reflectance(self, name):
        """The sensor's ADC reading (0..65535), for measuring its black and white values."""
        return self._sensor(name)[0].read_u16()

    def calibrate(self, name, black_raw, white_raw):
        if black_raw == white_raw:
            raise ValueError("reflectance %r: black and white readings must differ" % name)
        sensor = self._sensor(name)
        sensor[1] = black_raw
        sensor[2] = white_raw

    def reflectance_pct(self, name):
        adc, black, white = self._sensor(name)
        pct = (adc.read_u16() - black) * 100.0 / (white - black)
        return 0.0 if pct <= 0 else 100.0 if pct > 100 else pct

    def _sensor(self, name):
        sensor = self._sensors.get(name)
        if sensor is None:
            raise ValueError("no reflectance sensor %r (have: %s)" % (name, ", ".join(self.sensor_names)))
        return sensor

    def heading_deg(self):
        if self._i2c is not None:
            self._integrate()
        return self._heading

    def battery_mv(self):
        if self._battery is None:
            return 0
        return int(self._battery.read_u16() * self._battery_scale)

    def button_pressed(self):
        button = self._button
        if button is None:
            return False
        return button.value() == (0 if self.config["stop_button_active_low"] else 1)

    def close(self):
        """Motors off, encoder interrupts off, link closed (Ctrl-C works again on USB)."""
        self.set_power(0, 0)
        for encoder in self._encoders:
            encoder.close()
        self.link.close()
