"""A made-up firmware module for the example adapter in docs/board-adapter.md (its calls are
invented for that page). Motors turn 20 deg/s per % of power in real time; the right motor is
mounted mirror-image; the gyro counts counter-clockwise, as many firmwares do."""

import time

_power = [0, 0]
_turned = [0.0, 0.0]
_last = [time.ticks_us()]
_gyro_zero = [0.0]
DEG_PER_S_PER_PCT = 20
DEG_HEADING_PER_WHEEL_DEG = 0.5  # a made-up track / wheel ratio


def _advance():
    now = time.ticks_us()
    # Capped: when the test machine is busy and this process is not scheduled for a while, the
    # fake motors must not run on unobserved (the interpreter's clock is all it has).
    dt = min(time.ticks_diff(now, _last[0]) / 1e6, 0.004)
    _last[0] = now
    for i in (0, 1):
        _turned[i] += _power[i] * DEG_PER_S_PER_PCT * dt


def motor_drive(port, pct):
    _advance()
    _power[port] = max(-100, min(100, pct))


def motor_turned(port):
    _advance()
    return _turned[port]


def _ccw():
    # Left forward with the (mirrored) right motor turning backward spins clockwise.
    return -(_turned[0] + _turned[1]) * DEG_HEADING_PER_WHEEL_DEG


def gyro_zero():
    _advance()
    _gyro_zero[0] = _ccw()


def gyro_angle():
    _advance()
    return _ccw() - _gyro_zero[0]


def light_level(port):
    return 40 + port


def battery_volts():
    return 7.4
