"""USB serial link: frames travel over the hub's own USB serial port (its REPL console).

    link = UsbSerialLink()      # from now on Ctrl-C (0x03) is ordinary data, see below
    try:
        ...  link.read() / link.write(frame) ...
    finally:
        link.close()            # gives Ctrl-C back to the REPL

Reads never block: select.poll says whether a byte is waiting, and only then is one byte read,
because MicroPython's stdin read(n) waits until all n bytes have arrived. At most read_max bytes
are taken per call so one call cannot hold up the control loop.

While the link is open, micropython.kbd_intr(-1) turns the 0x03 byte into data: a frame may
contain it, and it must not raise KeyboardInterrupt in the middle of a move. The flip side is
that the host tools cannot break into the program with Ctrl-C either; close() restores it, and
hub_side/main_example.py shows a stop button that ends the program for that reason.

The WebAssembly interpreter used in tests differs from a board: its poll always reports ready
and an empty read returns nothing instead of waiting. An empty read therefore simply ends the
current read().
"""

import sys

try:
    import select
except ImportError:  # every MicroPython port with USB serial has select; keep the import soft
    select = None

try:
    from micropython import kbd_intr as _system_kbd_intr
except ImportError:  # CPython (tests): there is no keyboard interrupt character to turn off
    _system_kbd_intr = None

READ_MAX_BYTES = 256
_CTRL_C = 3


class UsbSerialLink:
    """A link over stdin/stdout. stdin and stdout default to the board's USB serial console;
    tests may pass unbuffered binary streams (a buffered reader would hide bytes from poll)."""

    def __init__(self, stdin=None, stdout=None, read_max=READ_MAX_BYTES, kbd_intr=_system_kbd_intr):
        if read_max < 1:
            raise ValueError("read_max must be at least 1 byte")
        self._in = stdin if stdin is not None else sys.stdin.buffer
        self._out = stdout if stdout is not None else sys.stdout.buffer
        self._read_max = read_max
        self._buf = bytearray(read_max)
        self._one = bytearray(1)
        self._poller = select.poll()
        self._poller.register(self._in, select.POLLIN)
        # ipoll allocates nothing per call (MicroPython); CPython's poll object has only poll.
        self._ipoll = getattr(self._poller, "ipoll", self._poller.poll)
        self._kbd_intr = kbd_intr
        self._open = True
        if kbd_intr is not None:
            kbd_intr(-1)

    @property
    def is_open(self):
        return self._open

    def _ready(self):
        for _ in self._ipoll(0):
            return True
        return False

    def read(self):
        """Bytes that have arrived (up to read_max), or b"" at once if none."""
        if not self._open:
            return b""
        buf = self._buf
        one = self._one
        src = self._in
        n = 0
        limit = self._read_max
        while n < limit and self._ready():
            got = src.readinto(one)
            if not got:  # WebAssembly interpreter (always "ready"), or the stream ended
                break
            buf[n] = one[0]
            n += 1
        if n == 0:
            return b""
        return bytes(buf[:n])

    def write(self, data):
        """Send all of data (a slow host makes this wait, as any console output does)."""
        if not self._open:
            raise OSError("USB serial link is closed")
        out = self._out
        view = memoryview(data)
        while len(view):
            sent = out.write(view)
            if sent is None:  # a non-blocking stream that took nothing this time
                sent = 0
            view = view[sent:]

    def close(self):
        """Stop using the console for frames; Ctrl-C interrupts the program again."""
        if not self._open:
            return
        self._open = False
        try:
            self._poller.unregister(self._in)
        except (OSError, KeyError, ValueError):
            pass
        if self._kbd_intr is not None:
            self._kbd_intr(_CTRL_C)

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        self.close()
        return False
