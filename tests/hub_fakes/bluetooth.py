"""A stand-in for MicroPython's low-level `bluetooth` module (peripheral role), for tests on
CPython and on the WebAssembly MicroPython (which has no `bluetooth`).

Follows the MicroPython 1.27 docs for what the hub uses: BLE() (one shared object), active(),
config(), irq(handler) called as handler(event, data) with the documented event numbers,
gatts_register_services() returning value handles per characteristic (refused while
advertising), gatts_set_buffer(handle, len, append=False) (default value buffer: 20 bytes;
longer writes are truncated; in append mode writes queue up and gatts_read empties the queue),
gatts_read, gatts_write, gatts_notify(conn, handle, data=None), gap_advertise(interval_us,
adv_data=None, *, resp_data=None, connectable=True) (None data re-uses the previous payloads;
None interval stops), gap_disconnect, UUID.

A notification longer than MTU - 3 reaches the central truncated, as the stack does; with
refuse_notifies = n the next n notifications raise OSError, as a stack with full transmit
buffers does. The central
side is played by Central (not part of the real module): connect, exchange_mtu, write, disconnect,
and the notifications it received.
"""

import errno

FLAG_BROADCAST = 0x0001
FLAG_READ = 0x0002
FLAG_WRITE_NO_RESPONSE = 0x0004
FLAG_WRITE = 0x0008
FLAG_NOTIFY = 0x0010
FLAG_INDICATE = 0x0020

_IRQ_CENTRAL_CONNECT = 1
_IRQ_CENTRAL_DISCONNECT = 2
_IRQ_GATTS_WRITE = 3
_IRQ_MTU_EXCHANGED = 21

_ATT_MTU_MIN = 23
_DEFAULT_BUFFER = 20
_ADV_MAX = 31


class UUID:
    def __init__(self, value):
        if isinstance(value, int):
            if not 0 <= value <= 0xFFFF:
                raise ValueError("invalid UUID")
            self._text = "%04x" % value
        elif isinstance(value, str):
            digits = value.replace("-", "").lower()
            if len(digits) != 32:
                raise ValueError("invalid UUID")
            int(digits, 16)  # raises ValueError for non-hex
            self._text = "%s-%s-%s-%s-%s" % (digits[:8], digits[8:12], digits[12:16], digits[16:20], digits[20:])
        else:
            raise TypeError("UUID takes an int or a str")

    def __eq__(self, other):
        return isinstance(other, UUID) and other._text == self._text

    def __hash__(self):
        return hash(self._text)

    def __repr__(self):
        return "UUID('%s')" % self._text


class _Value:
    def __init__(self, uuid, flags):
        self.uuid = uuid
        self.flags = flags
        self.data = b""
        self.max_len = _DEFAULT_BUFFER
        self.append = False


class _BLE:
    def __init__(self):
        self._active = False
        self._config = {"mtu": _ATT_MTU_MIN, "gap_name": "MPY"}
        self._handler = None
        self._values = {}  # value handle -> _Value
        self._next_handle = 1
        self.advertising = False
        self.adv_interval_us = None
        self.adv_data = b""
        self.resp_data = b""
        self.connectable = True
        self.advertise_starts = 0
        self.connections = {}  # conn handle -> Central
        self.refuse_notifies = 0  # tests: this many next notifications fail, buffers "full"

    # ------------------------------------------------------------ API

    def active(self, active=None):
        if active is None:
            return self._active
        self._active = bool(active)
        if not self._active:
            self.advertising = False
            self.connections = {}
        return None

    def config(self, *names, **values):
        if names and values:
            raise TypeError("config takes a name or keywords, not both")
        if names:
            if len(names) != 1 or names[0] not in self._config:
                raise ValueError("unknown config param")
            return self._config[names[0]]
        for key in values:
            if key not in self._config:
                raise ValueError("unknown config param %r" % key)
            if key == "mtu" and not _ATT_MTU_MIN <= values[key] <= 517:
                raise ValueError("mtu out of range")
            self._config[key] = values[key]
        return None

    def irq(self, handler):
        self._handler = handler

    def _need_active(self):
        if not self._active:
            raise OSError(errno.EPERM)

    def gap_advertise(self, interval_us, adv_data=None, *, resp_data=None, connectable=True):
        self._need_active()
        if interval_us is None:
            self.advertising = False
            return
        if adv_data is not None:
            self.adv_data = bytes(adv_data)
        if resp_data is not None:
            self.resp_data = bytes(resp_data)
        if len(self.adv_data) > _ADV_MAX or len(self.resp_data) > _ADV_MAX:
            raise OSError(errno.EINVAL)
        self.adv_interval_us = interval_us
        self.connectable = connectable
        self.advertising = True
        self.advertise_starts += 1

    def gap_disconnect(self, conn_handle):
        central = self.connections.get(conn_handle)
        if central is None:
            return False
        central._drop()
        return True

    def gatts_register_services(self, services_definition):
        self._need_active()
        if self.advertising:
            raise OSError(errno.EALREADY)  # the stack cannot change services while advertising
        self._values = {}
        self._next_handle = 1
        out = []
        for service in services_definition:
            uuid, characteristics = service[0], service[1]
            if not isinstance(uuid, UUID):
                raise TypeError("service UUID must be a bluetooth.UUID")
            self._next_handle += 1  # service declaration
            handles = []
            for characteristic in characteristics:
                char_uuid, flags = characteristic[0], characteristic[1]
                if not isinstance(char_uuid, UUID):
                    raise TypeError("characteristic UUID must be a bluetooth.UUID")
                self._next_handle += 1  # characteristic declaration
                handle = self._next_handle
                self._next_handle += 1
                self._values[handle] = _Value(char_uuid, flags)
                if flags & (FLAG_NOTIFY | FLAG_INDICATE):
                    self._next_handle += 1  # client characteristic configuration descriptor
                handles.append(handle)
            out.append(tuple(handles))
        return tuple(out)

    def _value(self, handle):
        value = self._values.get(handle)
        if value is None:
            raise ValueError("invalid handle")
        return value

    def gatts_set_buffer(self, value_handle, len, append=False):
        value = self._value(value_handle)
        value.max_len = len
        value.append = bool(append)

    def gatts_read(self, value_handle):
        value = self._value(value_handle)
        data = value.data
        if value.append:
            value.data = b""
        return data

    def gatts_write(self, value_handle, data, send_update=False):
        value = self._value(value_handle)
        value.data = bytes(data)[:value.max_len]

    def gatts_notify(self, conn_handle, value_handle, data=None):
        self._need_active()
        central = self.connections.get(conn_handle)
        if central is None:
            raise OSError(errno.ENOTCONN)
        value = self._value(value_handle)
        if self.refuse_notifies > 0:
            self.refuse_notifies -= 1
            raise OSError(errno.ENOMEM)
        payload = value.data if data is None else bytes(data)
        central.notifications.append((value_handle, payload[:central.mtu - 3]))

    # ------------------------------------------------------------ central side

    def _irq(self, event, data):
        if self._handler is not None:
            self._handler(event, data)


_ble = _BLE()


def BLE():
    """The one BLE object (the real constructor also returns a singleton)."""
    return _ble


def reset():
    """Forget everything (tests): a fresh radio."""
    global _ble
    _ble = _BLE()


class Central:
    """A host that connects to the advertising peripheral."""

    _next_conn = 64

    def __init__(self, addr=b"\xc0\x01\x02\x03\x04\x05"):
        self.addr = bytes(addr)
        self.conn = None
        self.mtu = _ATT_MTU_MIN
        self.notifications = []  # (value handle, bytes) in arrival order

    def connect(self):
        ble = _ble
        if not (ble._active and ble.advertising and ble.connectable):
            raise OSError(errno.ENOTCONN)
        ble.advertising = False  # connectable advertising ends with the connection
        Central._next_conn += 1
        self.conn = Central._next_conn
        self.mtu = _ATT_MTU_MIN
        ble.connections[self.conn] = self
        ble._irq(_IRQ_CENTRAL_CONNECT, (self.conn, 0, memoryview(self.addr)))
        return self.conn

    def exchange_mtu(self, mtu):
        ble = _ble
        self.mtu = min(mtu, ble._config["mtu"])
        ble._irq(_IRQ_MTU_EXCHANGED, (self.conn, self.mtu))
        return self.mtu

    def write(self, value_handle, data):
        """A write (with or without response) of at most MTU - 3 bytes."""
        ble = _ble
        if self.conn not in ble.connections:
            raise OSError(errno.ENOTCONN)
        if len(data) > self.mtu - 3:
            raise ValueError("a single write carries at most MTU - 3 = %d bytes" % (self.mtu - 3))
        value = ble._value(value_handle)
        if not value.flags & (FLAG_WRITE | FLAG_WRITE_NO_RESPONSE):
            raise OSError(errno.EPERM)
        if value.append:
            room = value.max_len - len(value.data)
            value.data = value.data + bytes(data)[:max(room, 0)]
        else:
            value.data = bytes(data)[:value.max_len]
        ble._irq(_IRQ_GATTS_WRITE, (self.conn, value_handle))

    def disconnect(self):
        self._drop()

    def _drop(self):
        ble = _ble
        if self.conn in ble.connections:
            del ble.connections[self.conn]
            ble._irq(_IRQ_CENTRAL_DISCONNECT, (self.conn, 0, memoryview(self.addr)))

    def received(self, value_handle=None):
        """All notified bytes joined (optionally from one characteristic only)."""
        out = bytearray()
        for handle, data in self.notifications:
            if value_handle is None or handle == value_handle:
                out.extend(data)
        return bytes(out)
