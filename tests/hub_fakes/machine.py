"""A stand-in for MicroPython's `machine` module, for tests on CPython and on the WebAssembly
MicroPython (which has no `machine`). Put this folder first on sys.path.

The classes follow the documented signatures of machine.Pin, PWM, ADC and I2C (MicroPython
1.27 docs): Pin(id, mode=-1, pull=-1, *, value=None), Pin.value([x]), Pin.irq(handler=None,
trigger=IRQ_FALLING | IRQ_RISING, *, priority=1, wake=None, hard=False) calling handler(pin);
PWM(dest, *, freq, duty_u16) with freq([value]) / duty_u16([value]) / deinit(); ADC(id) with
read_u16(); I2C(id, *, scl, sda, freq=400000) with scan(), readfrom_mem(addr, memaddr, nbytes),
readfrom_mem_into(addr, memaddr, buf), writeto_mem(addr, memaddr, buf). Constant values differ
between ports; these are one port's.

The outside world is driven by the module-level helpers below (not part of the real module):
drive_pin(id, level) fires pin interrupts on real edges only, set_adc(id, raw), pwm_duty(id),
attach_i2c(bus, addr, device), and reset() between tests.
"""

import errno

_levels = {}  # pin id -> level driven from outside
_pins = {}  # pin id -> [Pin, ...] objects made for it
_adc_raw = {}  # pin id -> raw 16-bit reading
_pwms = {}  # pin id -> PWM
_i2c_devices = {}  # (bus id, address) -> device with read(reg, n) -> bytes and write(reg, data)


def reset():
    _levels.clear()
    _pins.clear()
    _adc_raw.clear()
    _pwms.clear()
    _i2c_devices.clear()


def _pin_id(obj):
    return obj.id if isinstance(obj, Pin) else obj


class Pin:
    IN = 0
    OUT = 1
    OPEN_DRAIN = 2
    PULL_UP = 1
    PULL_DOWN = 2
    IRQ_FALLING = 4
    IRQ_RISING = 8

    def __init__(self, id, mode=-1, pull=-1, *, value=None):
        self.id = id
        self.mode = mode
        self.pull = pull
        self._out = 0 if value is None else (1 if value else 0)
        self._handler = None
        self._trigger = 0
        self.hard = False
        _pins.setdefault(id, []).append(self)

    def init(self, mode=-1, pull=-1, *, value=None):
        if mode != -1:
            self.mode = mode
        if pull != -1:
            self.pull = pull
        if value is not None:
            self._out = 1 if value else 0

    def value(self, x=None):
        if x is not None:
            self._out = 1 if x else 0
            return None
        if self.mode == Pin.OUT:
            return self._out
        level = _levels.get(self.id)
        if level is None:  # nothing drives it: the pull decides
            return 1 if self.pull == Pin.PULL_UP else 0
        return level

    def __call__(self, x=None):
        return self.value(x)

    def on(self):
        self._out = 1

    def off(self):
        self._out = 0

    def irq(self, handler=None, trigger=IRQ_FALLING | IRQ_RISING, *, priority=1, wake=None, hard=False):
        self._handler = handler
        self._trigger = trigger if handler is not None else 0
        self.hard = hard
        return _Irq(self)


class _Irq:
    """What Pin.irq returns: a callback object with trigger()."""

    def __init__(self, pin):
        self._pin = pin

    def trigger(self):
        return self._pin._trigger


def drive_pin(pin_id, level):
    """The outside world sets an input's level; a real change fires matching interrupts."""
    level = 1 if level else 0
    before = [p.value() for p in _pins.get(pin_id, ())]
    _levels[pin_id] = level
    for pin, old in zip(_pins.get(pin_id, ()), before):
        if old == level or pin._handler is None:
            continue
        edge = Pin.IRQ_RISING if level else Pin.IRQ_FALLING
        if pin._trigger & edge:
            pin._handler(pin)


class PWM:
    def __init__(self, dest, *, freq=None, duty_u16=None):
        self.pin_id = _pin_id(dest)
        self._freq = 0
        self._duty = 0
        self.active = True
        _pwms[self.pin_id] = self
        if freq is not None:
            self.freq(freq)
        if duty_u16 is not None:
            self.duty_u16(duty_u16)

    def freq(self, value=None):
        if value is None:
            return self._freq
        if value <= 0:
            raise ValueError("freq must be positive")
        self._freq = value
        return None

    def duty_u16(self, value=None):
        if value is None:
            return self._duty
        if not 0 <= value <= 65535:
            raise ValueError("duty_u16 must be 0..65535, got %r" % (value,))
        if int(value) != value:
            raise TypeError("duty_u16 takes an int")
        self._duty = value
        return None

    def deinit(self):
        self.active = False
        self._duty = 0


def pwm_duty(pin_id):
    pwm = _pwms.get(pin_id)
    return None if pwm is None else pwm.duty_u16()


def pwm_freq(pin_id):
    pwm = _pwms.get(pin_id)
    return None if pwm is None else pwm.freq()


class ADC:
    def __init__(self, id):
        self.pin_id = _pin_id(id)

    def read_u16(self):
        return _adc_raw.get(self.pin_id, 0)


def set_adc(pin_id, raw):
    if not 0 <= raw <= 65535:
        raise ValueError("an ADC reads 0..65535")
    _adc_raw[pin_id] = raw


class I2C:
    def __init__(self, id, *, scl=None, sda=None, freq=400000, timeout=50000):
        self.bus = id
        self.scl = scl
        self.sda = sda
        self.freq = freq

    def _device(self, addr):
        device = _i2c_devices.get((self.bus, addr))
        if device is None:  # no acknowledge from that address
            raise OSError(errno.ENODEV)
        return device

    def scan(self):
        return sorted(addr for bus, addr in _i2c_devices if bus == self.bus)

    def readfrom_mem(self, addr, memaddr, nbytes, *, addrsize=8):
        return bytes(self._device(addr).read(memaddr, nbytes))

    def readfrom_mem_into(self, addr, memaddr, buf, *, addrsize=8):
        data = self._device(addr).read(memaddr, len(buf))
        for i in range(len(buf)):
            buf[i] = data[i]

    def writeto_mem(self, addr, memaddr, buf, *, addrsize=8):
        self._device(addr).write(memaddr, bytes(buf))


def attach_i2c(bus, addr, device):
    _i2c_devices[(bus, addr)] = device
