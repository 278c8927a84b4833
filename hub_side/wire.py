"""The one wire codec, used unchanged by the hub (MicroPython) and the host (CPython).

A frame on the wire is COBS(raw) followed by one 0x00 delimiter, where

    raw = type:u8 | seq:u16le | body | crc:u16le

and crc is CRC-16/CCITT-FALSE (poly 0x1021, init 0xFFFF, no reflection, no xorout; check value of
"123456789" is 0x29B1 in the CRC catalogue) over type, seq and body. Control messages carry small
JSON bodies; telemetry bodies are binary batches (see TELEMETRY_HEADER and TELEMETRY_SAMPLE).

Written for the MicroPython subset: no typing, no dataclasses, dict order never relied on.
"""

import json
import struct
import sys
from array import array

try:
    from micropython import const
except ImportError:  # CPython

    def const(value):
        return value


PROTOCOL_VERSION = const(2)

# Our Bluetooth LE byte-pipe service (UUIDs generated for this project, see docs/links.md). The
# host writes frames without response to BLE_RX_UUID; the hub notifies on BLE_TX_UUID.
BLE_SERVICE_UUID = "6f288cd7-2ba2-4c96-b014-034ad2e3a6fd"
BLE_RX_UUID = "38d99472-ecac-4bb9-8733-fbb0b6e91a05"  # host -> hub
BLE_TX_UUID = "41075109-ab63-4abf-a196-65dabb1e9a4a"  # hub -> host

# Cap on one raw frame (type + seq + body + crc); an encoded frame can be at most this plus COBS
# overhead. Anything longer is refused by the reader without being decoded.
MAX_RAW_BYTES = const(1024)
MAX_ENCODED_BYTES = const(1030)  # MAX_RAW_BYTES + ceil(MAX_RAW_BYTES / 254) + 1

# Message types. Host -> hub: HELLO, START, STOP, PING, RESEND. Hub -> host: the rest.
HELLO = const(0x01)
HUB_INFO = const(0x02)
START = const(0x03)
STOP = const(0x04)
ACK = const(0x05)
REFUSE = const(0x06)
EVENT = const(0x07)
RESULT = const(0x08)
PING = const(0x09)
PONG = const(0x0A)
FAULT = const(0x0B)
TELEMETRY = const(0x0C)
RESEND = const(0x0D)  # host -> hub: send the kept telemetry batches covering samples again

MESSAGE_NAMES = {
    HELLO: "hello",
    HUB_INFO: "hub_info",
    START: "start",
    STOP: "stop",
    ACK: "ack",
    REFUSE: "refuse",
    EVENT: "event",
    RESULT: "result",
    PING: "ping",
    PONG: "pong",
    FAULT: "fault",
    TELEMETRY: "telemetry",
    RESEND: "resend",
}

# Telemetry batch: a header, then n fixed-size samples. first_index counts samples since the
# action started, so consecutive batches must join up exactly; a gap is dropped samples.
#   first_index u32, t0_us u32 (since the action started), battery_mv u16, n_samples u8,
#   n_sensors u8
TELEMETRY_HEADER = "<IIHBB"
TELEMETRY_HEADER_BYTES = const(12)
# Each sample: dt (10 us units after t0) u16, encoder left and right (deg since the action
# started) u32, heading (0.01 deg, clockwise positive) u32, controller error (0.1 %) u16, motor
# power left and right (%) u8, then one u8 reflectance (%) per sensor, in the order of the hub's
# sensor list. Signed values travel in offset binary (value + bias): small numbers then contain
# no zero byte, and every zero byte costs COBS a pass of the hub's interpreter loop.
TELEMETRY_SAMPLE = "<HIIIHBB"
TELEMETRY_SAMPLE_BYTES = const(18)
TELEMETRY_DT_UNIT_US = const(10)
HEADING_SCALE = const(100)
ERROR_SCALE = const(10)
MAX_BATCH_SAMPLES = const(32)
MAX_SENSORS = const(8)
# Biases below 2**30 stay small integers on 32-bit MicroPython ports (no heap allocation).
BIAS_32 = const(0x3F808080)
BIAS_16 = const(0x8080)
BIAS_8 = const(0x80)
TELEMETRY_LIMIT_32 = const(0x3F000000)  # encoders and heading are clamped to +-this
TELEMETRY_LIMIT_16 = const(0x7F7F)  # the controller error is clamped to +-this


class FrameError(ValueError):
    """A frame that cannot be decoded: bad COBS, too short, or a CRC mismatch."""


# ---------------------------------------------------------------- CRC-16/CCITT-FALSE


def _crc_table():
    # table[v] is v * x^16 mod P: the register after eight zero bits have shifted byte v out.
    table = []
    for byte in range(256):
        crc = byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) if crc & 0x8000 else (crc << 1)
        table.append(crc & 0xFFFF)
    return table


_CRC_TABLE = _crc_table()


def crc16_table(data, crc=0xFFFF):
    """CRC-16/CCITT-FALSE computed byte by byte from a 256-entry table (works everywhere)."""
    table = _CRC_TABLE
    for byte in data:
        crc = ((crc << 8) & 0xFF00) ^ table[(crc >> 8) ^ byte]
    return crc


def _swap16(value):
    return ((value & 0xFF) << 8) | (value >> 8)


def _crc_pair_tables():
    # Two bytes at a time: after 16 message bits the register is f(crc ^ word), f linear, so
    # f(hi << 8 | lo) = f(hi << 8) ^ f(lo) = high[hi] ^ table[lo]. The register is kept byte-
    # swapped, so a little-endian 16-bit load of the next two bytes XORs straight into it, and
    # the tables hold byte-swapped values to match.
    table = _CRC_TABLE
    high = array("H")
    low = array("H")
    for v in range(256):
        once = table[v]
        high.append(_swap16(((once << 8) & 0xFF00) ^ table[once >> 8]))
        low.append(_swap16(once))
    return high, low


_CRC_HIGH, _CRC_LOW = _crc_pair_tables()


def crc16_pairs(data, crc=0xFFFF):
    """CRC-16/CCITT-FALSE two bytes per interpreter step: about twice as fast as crc16_table
    where the CRC runs as bytecode (MicroPython). Needs a little-endian machine for its
    16-bit loads (every MicroPython hub is one; crc16 falls back to the table otherwise)."""
    if type(data) is not bytes and type(data) is not bytearray:
        data = bytes(data)  # array() would take a memoryview item by item, not as 16-bit words
    n = len(data)
    even = n & ~1
    high = _CRC_HIGH
    low = _CRC_LOW
    reg = _swap16(crc)
    for word in array("H", data if even == n else data[:even]):
        word ^= reg
        reg = high[word & 0xFF] ^ low[word >> 8]
    crc = _swap16(reg)
    if even != n:
        crc = ((crc << 8) & 0xFF00) ^ _CRC_TABLE[(crc >> 8) ^ data[even]]
    return crc


try:
    # CPython's binascii.crc_hqx is this same CRC (poly 0x1021, MSB first) in C; MicroPython
    # has no crc_hqx and uses the pair tables.
    from binascii import crc_hqx as _crc_hqx

    def crc16(data, crc=0xFFFF):
        return _crc_hqx(data, crc)

except ImportError:
    crc16 = crc16_pairs if sys.byteorder == "little" else crc16_table


# ---------------------------------------------------------------- COBS


def cobs_encode(data):
    """COBS-encode data (Cheshire & Baker 1999). The output contains no 0x00 byte.

    A final block of exactly 254 non-zero bytes is not followed by an extra 0x01 (the same
    convention as the `cobs` package); cobs_decode accepts both conventions. Splitting at the
    zeros in one C call keeps the per-byte work out of the interpreter, which matters on a hub.
    """
    pieces = bytes(data).split(b"\x00")
    last = len(pieces) - 1
    out = bytearray()
    for i in range(last + 1):
        piece = pieces[i]
        while len(piece) >= 254:
            out.append(0xFF)
            out.extend(piece[:254])
            piece = piece[254:]
            if not piece and i == last:
                return bytes(out)
        out.append(len(piece) + 1)
        out.extend(piece)
    return bytes(out)


def cobs_decode(data):
    """Decode one COBS block sequence (without the 0x00 delimiter); FrameError if malformed."""
    data = bytes(data)
    size = len(data)
    out = bytearray()
    pos = 0
    while pos < size:
        code = data[pos]
        if code == 0:
            raise FrameError("zero byte inside a COBS frame")
        end = pos + code
        if end > size:
            raise FrameError("COBS block runs past the end of the frame")
        out.extend(data[pos + 1 : end])
        pos = end
        if code != 0xFF and pos < size:
            out.append(0)
    return bytes(out)


# ---------------------------------------------------------------- frames


def encode_frame(msg_type, seq, body=b""):
    """One complete frame, delimiter included. ValueError if the frame exceeds the cap."""
    size = 3 + len(body) + 2
    if size > MAX_RAW_BYTES:
        raise ValueError("frame of %d bytes exceeds the %d-byte cap" % (size, MAX_RAW_BYTES))
    raw = bytearray(size - 2)
    struct.pack_into("<BH", raw, 0, msg_type, seq & 0xFFFF)
    raw[3:] = body
    raw.extend(struct.pack("<H", crc16(raw)))  # the CRC reads raw itself, no copy of it
    return cobs_encode(raw) + b"\x00"


def decode_frame(encoded):
    """(msg_type, seq, body) from one encoded frame without its delimiter; FrameError if bad."""
    if len(encoded) > MAX_ENCODED_BYTES:
        raise FrameError("frame of %d bytes exceeds the cap" % len(encoded))
    raw = cobs_decode(encoded)
    if len(raw) < 5:
        raise FrameError("frame too short (%d bytes)" % len(raw))
    (crc,) = struct.unpack_from("<H", raw, len(raw) - 2)
    if crc16(memoryview(raw)[: len(raw) - 2]) != crc:
        raise FrameError("CRC mismatch")
    msg_type, seq = struct.unpack_from("<BH", raw, 0)
    return msg_type, seq, raw[3 : len(raw) - 2]


class FrameReader:
    """Turns received chunks, however they are split, into decoded frames.

    Bad frames are counted and dropped; the stream resynchronises at the next 0x00. Bytes piling
    up past the size cap without a delimiter are discarded up to the next delimiter.
    """

    def __init__(self, max_encoded=MAX_ENCODED_BYTES):
        self.max_encoded = max_encoded
        self._pending = bytearray()
        self._skipping = False
        self.frames_ok = 0
        self.frames_bad = 0
        self.frames_oversize = 0

    def feed(self, chunk):
        frames = []
        chunk = bytes(chunk)
        start = 0
        while True:
            zero = chunk.find(b"\x00", start)
            if zero < 0:
                self._keep(chunk[start:])
                return frames
            piece = chunk[start:zero]
            start = zero + 1
            if self._skipping:
                self._skipping = False
                continue
            if self._pending:
                self._pending.extend(piece)
                piece = bytes(self._pending)
                self._pending = bytearray()
            if not piece:
                continue
            if len(piece) > self.max_encoded:
                self.frames_oversize += 1
                continue
            try:
                frames.append(decode_frame(piece))
                self.frames_ok += 1
            except FrameError:
                self.frames_bad += 1

    def _keep(self, rest):
        if self._skipping or not rest:
            return
        if len(self._pending) + len(rest) > self.max_encoded:
            self.frames_oversize += 1
            self._pending = bytearray()
            self._skipping = True
        else:
            self._pending.extend(rest)


# ---------------------------------------------------------------- JSON control messages


def encode_message(msg_type, seq, obj):
    """A control frame whose body is obj as compact JSON."""
    return encode_frame(msg_type, seq, json.dumps(obj).encode())


def decode_json(body):
    """The JSON object in a control body; FrameError if it is not a JSON object."""
    try:
        obj = json.loads(bytes(body).decode())
    except (ValueError, UnicodeError):
        raise FrameError("body is not valid JSON")
    if not isinstance(obj, dict):
        raise FrameError("body is not a JSON object")
    return obj


# ---------------------------------------------------------------- telemetry


def telemetry_sample_bytes(n_sensors):
    return TELEMETRY_SAMPLE_BYTES + n_sensors


class TelemetryBatch:
    """Hub-side builder of one telemetry batch in a buffer allocated once.

    add() writes a sample in place with struct.pack_into; body() returns the bytes to send;
    reset() starts the next batch at the following sample index.
    """

    def __init__(self, n_sensors, max_samples=MAX_BATCH_SAMPLES):
        if n_sensors > MAX_SENSORS:
            raise ValueError("at most %d sensors" % MAX_SENSORS)
        self.n_sensors = n_sensors
        self.max_samples = max_samples
        self.sample_bytes = telemetry_sample_bytes(n_sensors)
        # Reflectance goes in with the rest; "B" needs 0..255, which percentages are.
        self._format = TELEMETRY_SAMPLE + "B" * n_sensors
        self._buf = bytearray(TELEMETRY_HEADER_BYTES + max_samples * self.sample_bytes)
        self.t0_us = 0
        self.reset(0)

    def reset(self, first_index):
        self.first_index = first_index
        self.count = 0
        self._offset = TELEMETRY_HEADER_BYTES

    def full(self):
        return self.count >= self.max_samples

    def add(self, t_us, enc_left_deg, enc_right_deg, heading_deg, error_pct, power_left_pct,
            power_right_pct, reflectance_pct):
        """Append one sample; t_us counts from the action start and t0_us is the batch's first.
        Values out of their field's range are clamped (MicroPython's struct would wrap them
        silently); reflectance must already be whole numbers 0..255."""
        if self.count == 0:
            self.t0_us = t_us
        dt = (t_us - self.t0_us) // TELEMETRY_DT_UNIT_US
        left = int(enc_left_deg)
        right = int(enc_right_deg)
        heading = round(heading_deg * HEADING_SCALE)
        error = round(error_pct * ERROR_SCALE)
        power_left = int(power_left_pct)
        power_right = int(power_right_pct)
        # One comparison chain on the common path; the clamps run only when something is off.
        if not (0 <= dt <= 0xFFFF and -TELEMETRY_LIMIT_32 <= left <= TELEMETRY_LIMIT_32
                and -TELEMETRY_LIMIT_32 <= right <= TELEMETRY_LIMIT_32
                and -TELEMETRY_LIMIT_32 <= heading <= TELEMETRY_LIMIT_32
                and -TELEMETRY_LIMIT_16 <= error <= TELEMETRY_LIMIT_16
                and -127 <= power_left <= 127 and -127 <= power_right <= 127):
            dt = min(0xFFFF, max(0, dt))
            left = min(TELEMETRY_LIMIT_32, max(-TELEMETRY_LIMIT_32, left))
            right = min(TELEMETRY_LIMIT_32, max(-TELEMETRY_LIMIT_32, right))
            heading = min(TELEMETRY_LIMIT_32, max(-TELEMETRY_LIMIT_32, heading))
            error = min(TELEMETRY_LIMIT_16, max(-TELEMETRY_LIMIT_16, error))
            power_left = min(127, max(-127, power_left))
            power_right = min(127, max(-127, power_right))
        struct.pack_into(self._format, self._buf, self._offset, dt, left + BIAS_32, right + BIAS_32,
                         heading + BIAS_32, error + BIAS_16, power_left + BIAS_8, power_right + BIAS_8,
                         *reflectance_pct)
        self._offset += self.sample_bytes
        self.count += 1

    def body(self, battery_mv):
        struct.pack_into(
            TELEMETRY_HEADER,
            self._buf,
            0,
            self.first_index & 0xFFFFFFFF,
            self.t0_us & 0xFFFFFFFF,
            min(0xFFFF, max(0, int(battery_mv))),
            self.count,
            self.n_sensors,
        )
        return bytes(memoryview(self._buf)[: TELEMETRY_HEADER_BYTES + self.count * self.sample_bytes])


def unpack_telemetry(body):
    """Plain decoder: (first_index, t0_us, battery_mv, n_sensors, samples).

    Each sample is (t_us, enc_left_deg, enc_right_deg, heading_deg, error_pct, power_left_pct,
    power_right_pct, reflectance tuple). FrameError if the body's length does not add up.
    """
    if len(body) < TELEMETRY_HEADER_BYTES:
        raise FrameError("telemetry body shorter than its header")
    first_index, t0_us, battery_mv, n, n_sensors = struct.unpack_from(TELEMETRY_HEADER, body, 0)
    size = telemetry_sample_bytes(n_sensors)
    if len(body) != TELEMETRY_HEADER_BYTES + n * size:
        raise FrameError("telemetry body length does not match its sample count")
    samples = []
    for k in range(n):
        offset = TELEMETRY_HEADER_BYTES + k * size
        dt, left, right, heading, error, p_left, p_right = struct.unpack_from(
            TELEMETRY_SAMPLE, body, offset
        )
        start = offset + TELEMETRY_SAMPLE_BYTES
        samples.append(
            (
                t0_us + dt * TELEMETRY_DT_UNIT_US,
                left - BIAS_32,
                right - BIAS_32,
                (heading - BIAS_32) / HEADING_SCALE,
                (error - BIAS_16) / ERROR_SCALE,
                p_left - BIAS_8,
                p_right - BIAS_8,
                tuple(body[start : start + n_sensors]),
            )
        )
    return first_index, t0_us, battery_mv, n_sensors, samples
