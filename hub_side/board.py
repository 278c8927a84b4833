"""The board interface: the only thing in hub_side that touches hardware.

An adapter subclasses Board (or just provides the same methods) for one kind of hardware. The
simulated robot on the host implements it too, so the unchanged listener runs on both.
"""

try:
    from time import ticks_add, ticks_diff  # MicroPython: tick counters wrap
except ImportError:  # CPython: the simulator's virtual clock never wraps

    def ticks_diff(a, b):
        return a - b

    def ticks_add(a, b):
        return a + b


class Board:
    # Reflectance sensor names, in the order telemetry reports them.
    sensor_names = ()
    # What this board has, reported to the host in the hello, e.g. {"gyro": True}.
    capabilities = {}

    def ticks_us(self):
        """A microsecond counter; compare values only with ticks_diff."""
        raise NotImplementedError

    def idle_us(self, us):
        """Sleep up to us microseconds (the listener has nothing to do until then)."""
        raise NotImplementedError

    def set_power(self, left_pct, right_pct):
        """Motor power -100..100 per wheel, positive drives forward; 0 brakes."""
        raise NotImplementedError

    def encoders_deg(self):
        """(left, right) motor angles in whole degrees, forward positive."""
        raise NotImplementedError

    def reflectance_pct(self, name):
        """Reflected light under the named sensor, 0..100 %."""
        raise NotImplementedError

    def heading_deg(self):
        """Gyro heading in degrees, clockwise positive, continuous (not wrapped to 360)."""
        raise NotImplementedError

    def battery_mv(self):
        raise NotImplementedError

    def link_read(self):
        """Bytes received from the host since the last call (b"" if none); never blocks."""
        raise NotImplementedError

    def link_write(self, data):
        """Send bytes to the host."""
        raise NotImplementedError

    def link_room(self):
        """Bytes link_write can take now without blocking. The listener drops a telemetry batch
        that does not fit (the host counts the gap) rather than stall the control loop."""
        return 1 << 20

    def button_pressed(self):
        """True while the hub's own stop button is pressed (boards without one: always False)."""
        return False
