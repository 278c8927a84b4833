"""Bluetooth LE link: the hub is a peripheral offering our byte-pipe service (hub_side.wire).

    link = BleUartLink("robot-7")   # advertises at once; the host connects by this name
    ...  link.read() / link.write(frame) / link.connected ...
    link.close()

The host writes frames (without response) to the RX characteristic and subscribes to
notifications on TX. Written on MicroPython's low-level `bluetooth` module:

- The IRQ handler only records: connections, the negotiated MTU per connection, and received
  bytes appended to a buffer. read() hands that buffer over; nothing else happens in the IRQ
  except re-advertising after a disconnect, so a host can always come back.
- RX uses the stack's append mode (gatts_set_buffer(..., append=True)) with room for several
  full-size writes, so writes arriving between two reads queue up instead of overwriting each
  other (the default value buffer is 20 bytes and silently truncates longer writes).
- write() splits data into notifications of (MTU - 3) bytes: 20 until the central starts an MTU
  exchange, then whatever the two sides agreed (we offer MTU_PREFERRED), and notifies every
  connected central.

Advertising data is built here (AD structures: length, type, data). The byte values come from the
Bluetooth SIG's Assigned Numbers (AD types 0x01 Flags, 0x07 Complete List of 128-bit Service
UUIDs, 0x09 Complete Local Name) and the Core Specification Supplement (Flags bits: 0x02 LE
General Discoverable, 0x04 BR/EDR Not Supported); a 128-bit UUID travels least significant byte
first. The name goes in the advertisement, the service UUID in the scan response: both do not
fit in one 31-byte payload.
"""

import bluetooth
import time

try:
    from micropython import const
except ImportError:  # CPython (tests)

    def const(value):
        return value


from hub_side import wire

try:
    _sleep_ms = time.sleep_ms
    _ticks_ms = time.ticks_ms
    _ticks_diff = time.ticks_diff
except AttributeError:  # CPython (tests)

    def _sleep_ms(ms):
        time.sleep(ms / 1000)

    def _ticks_ms():
        return int(time.monotonic() * 1000)

    def _ticks_diff(a, b):
        return a - b


# IRQ event numbers and characteristic flags of MicroPython's bluetooth module (its docs).
_IRQ_CENTRAL_CONNECT = const(1)
_IRQ_CENTRAL_DISCONNECT = const(2)
_IRQ_GATTS_WRITE = const(3)
_IRQ_MTU_EXCHANGED = const(21)
_FLAG_WRITE_NO_RESPONSE = const(0x0004)
_FLAG_WRITE = const(0x0008)
_FLAG_NOTIFY = const(0x0010)

_AD_FLAGS = const(0x01)
_AD_UUID128_COMPLETE = const(0x07)
_AD_NAME_COMPLETE = const(0x09)
_AD_FLAGS_VALUE = const(0x06)  # LE General Discoverable | BR/EDR Not Supported
_AD_MAX_BYTES = const(31)
MAX_NAME_BYTES = const(26)  # 31 - 3 (flags) - 2 (name's length and type)

MTU_DEFAULT = const(23)  # ATT's minimum, in force until an exchange
MTU_PREFERRED = const(247)  # offered to the central; fits a full frame in few notifications
RX_BUFFER_BYTES = const(512)  # the stack's append buffer for RX writes
RX_QUEUE_MAX_BYTES = const(4096)  # our own queue; past this, bytes are dropped (CRC catches it)
ADV_INTERVAL_US = const(100000)
# The stack refuses a notification while its transmit buffers are full: retry a few times, 2 ms
# apart, then drop the rest of that write. After a refusal room() reports no room for a while,
# so the listener drops (and can resend) telemetry instead of stalling its control loop here.
_NOTIFY_RETRIES = const(5)
_CONGESTED_MS = const(50)


def _ad(ad_type, data):
    out = bytearray(2 + len(data))
    out[0] = len(data) + 1
    out[1] = ad_type
    out[2:] = data
    return out


def uuid128_le(text):
    """The 16 bytes of a UUID string, least significant first, as advertised on air."""
    hex_digits = text.replace("-", "")
    if len(hex_digits) != 32:
        raise ValueError("not a 128-bit UUID: %r" % text)
    out = bytearray(16)
    for i in range(16):
        out[15 - i] = int(hex_digits[2 * i : 2 * i + 2], 16)
    return bytes(out)


def advertising_payloads(name, service_uuid=wire.BLE_SERVICE_UUID):
    """(adv_data, resp_data): flags and the complete name; the 128-bit service UUID."""
    name_bytes = name.encode("utf-8")
    if not name_bytes:
        raise ValueError("the Bluetooth name must not be empty")
    if len(name_bytes) > MAX_NAME_BYTES:
        raise ValueError("Bluetooth name %r is %d bytes; at most %d fit in an advertisement"
                         % (name, len(name_bytes), MAX_NAME_BYTES))
    adv = _ad(_AD_FLAGS, bytes((_AD_FLAGS_VALUE,))) + _ad(_AD_NAME_COMPLETE, name_bytes)
    resp = _ad(_AD_UUID128_COMPLETE, uuid128_le(service_uuid))
    return bytes(adv), bytes(resp)


class BleUartLink:
    def __init__(self, name, ble=None, rx_buffer_bytes=RX_BUFFER_BYTES):
        self.name = name
        self._adv, self._resp = advertising_payloads(name)
        self._ble = ble if ble is not None else bluetooth.BLE()
        ble = self._ble
        ble.active(True)
        ble.config(mtu=MTU_PREFERRED)
        ble.irq(self._irq)
        ble.gap_advertise(None)  # services cannot be registered while advertising
        tx = (bluetooth.UUID(wire.BLE_TX_UUID), _FLAG_NOTIFY)
        rx = (bluetooth.UUID(wire.BLE_RX_UUID), _FLAG_WRITE | _FLAG_WRITE_NO_RESPONSE)
        service = (bluetooth.UUID(wire.BLE_SERVICE_UUID), (tx, rx))
        ((self._tx_handle, self._rx_handle),) = ble.gatts_register_services((service,))
        ble.gatts_set_buffer(self._rx_handle, rx_buffer_bytes, True)
        self._mtu = {}  # connection handle -> negotiated MTU
        self._rx = bytearray()
        self.rx_dropped_bytes = 0
        self.tx_dropped_bytes = 0
        self._congested_ms = None
        self._open = True
        self._advertise()

    # ------------------------------------------------------------ IRQ (keep it short)

    def _irq(self, event, data):
        if event == _IRQ_GATTS_WRITE:
            conn, handle = data
            if handle == self._rx_handle:
                got = self._ble.gatts_read(handle)  # append mode: this also empties the stack's buffer
                room = RX_QUEUE_MAX_BYTES - len(self._rx)
                if len(got) > room:
                    self.rx_dropped_bytes += len(got) - max(room, 0)
                    got = got[:max(room, 0)]
                self._rx.extend(got)
        elif event == _IRQ_CENTRAL_CONNECT:
            self._mtu[data[0]] = MTU_DEFAULT
        elif event == _IRQ_CENTRAL_DISCONNECT:
            conn = data[0]
            if conn in self._mtu:
                del self._mtu[conn]
            if self._open:
                self._advertise()
        elif event == _IRQ_MTU_EXCHANGED:
            conn, mtu = data
            if conn in self._mtu:
                self._mtu[conn] = mtu

    def _advertise(self):
        self._ble.gap_advertise(ADV_INTERVAL_US, adv_data=self._adv, resp_data=self._resp)

    # ------------------------------------------------------------ link interface

    @property
    def connected(self):
        return len(self._mtu) > 0

    def mtu(self, conn):
        return self._mtu.get(conn, MTU_DEFAULT)

    def read(self):
        """Bytes written by the host since the last call, or b"" at once if none."""
        rx = self._rx
        if not rx:
            return b""
        # Swap in a fresh buffer first: an IRQ in between appends either to the old one (and is
        # returned now) or to the new one (and is returned next time), never to neither.
        self._rx = bytearray()
        return bytes(rx)

    def write(self, data):
        """Notify data to every connected central in (MTU - 3)-byte pieces; with no central
        connected the bytes are dropped, as a serial line with no one listening would."""
        if not self._open:
            raise OSError("Bluetooth link is closed")
        view = memoryview(data)
        for conn in list(self._mtu):
            step = self._mtu.get(conn, MTU_DEFAULT) - 3
            for start in range(0, len(view), step):
                if not self._notify(conn, view[start:start + step]):
                    self.tx_dropped_bytes += len(view) - start
                    break

    def _notify(self, conn, chunk):
        for _ in range(_NOTIFY_RETRIES):
            try:
                self._ble.gatts_notify(conn, self._tx_handle, chunk)
                return True
            except OSError:
                self._congested_ms = _ticks_ms()
                if conn not in self._mtu:
                    return False  # the central went away
                _sleep_ms(2)
        return False

    def room(self):
        """Bytes write() should take now: none for a moment after the stack refused one."""
        if self._congested_ms is not None and _ticks_diff(_ticks_ms(), self._congested_ms) < _CONGESTED_MS:
            return 0
        self._congested_ms = None
        return 1 << 20

    def close(self):
        """Stop advertising, drop every connection and switch the radio off."""
        if not self._open:
            return
        self._open = False
        ble = self._ble
        ble.gap_advertise(None)
        for conn in list(self._mtu):
            try:
                ble.gap_disconnect(conn)
            except OSError:
                pass
        self._mtu = {}
        ble.irq(None)
        ble.active(False)
