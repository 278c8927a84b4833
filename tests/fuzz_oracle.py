"""The fuzzing oracle shared by tests/test_fuzz.py and bench/fuzz.py.

Reference decoding by independent codecs (`cobs`, `crcmod`), the host-side rules for a
well-formed HELLO and START (written here, not taken from the listener), the mutations applied to
encoded frames, and the instruments that record what the hub executed: every built-in action
wrapped to record its entry, and a scripted board that records non-zero motor power.
"""

from __future__ import annotations

import json
import math
import struct
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any
from unittest import mock

import crcmod.predefined
from cobs import cobs as cobs_ref

import hub_side.listener as listener_module
from hub_script.scripted_board import ScriptedBoard
from hub_side import actions, wire

# CRC-16/CCITT-FALSE is crcmod's "crc-ccitt-false" (CRC RevEng catalogue: poly 0x1021, init 0xFFFF,
# not reflected, no xorout; check value 0x29B1, checked in tests/test_wire.py).
crc_ref = crcmod.predefined.mkCrcFun("crc-ccitt-false")

MAX_BODY = wire.MAX_RAW_BYTES - 5  # raw frame = type u8 + seq u16 + body + crc u16
HANG_LIMIT_S = 1.0  # one feed or one tick taking longer than this counts as a hang

# Message types by name, so the sets follow the codec as types are added.
_HOST_NAMES = ("hello", "start", "stop", "ping", "resend")
TYPE_BY_NAME = {name: t for t, name in wire.MESSAGE_NAMES.items()}
HOST_TO_HUB = tuple(TYPE_BY_NAME[n] for n in _HOST_NAMES if n in TYPE_BY_NAME)
HUB_TO_HOST = tuple(sorted(t for t in wire.MESSAGE_NAMES if t not in HOST_TO_HUB))
UNKNOWN_TYPES = tuple(t for t in range(256) if t not in wire.MESSAGE_NAMES)

# Host-side contract (docs: DESIGN.md "Actions and parameters"; HELLO fields as the host sends them).
KNOWN_ACTIONS = ("follow_line", "turn", "drive_straight", "probe_edge", "stop")
# The ranges the host's robot profile allows (harness/profile.py), written out on their own.
GEOMETRY_LIMITS = {"wheel_diameter_mm": (1.0, 1000.0), "track_mm": (1.0, 2000.0), "distance_scale": (0.5, 2.0),
                   "spin_scale": (0.5, 2.0), "pivot_scale": (0.5, 2.0), "wheel_ratio": (0.9, 1.1),
                   "spin_offset_deg": (-30.0, 30.0), "pivot_offset_deg": (-30.0, 30.0)}
GEOMETRY_KEYS = tuple(sorted(GEOMETRY_LIMITS))
WATCHDOG_RANGE_MS = (50, 60000)
MAX_TELEMETRY_HZ = 500
# The parameter contract of each action (kind, default, low, high_or_choices), taken before any
# wrapping; `well_formed_start` judges values against it with its own code.
SPECS = {name: actions.BUILTINS[name][1] for name in KNOWN_ACTIONS}
INT_PARAMS = {key for spec in SPECS.values() for key in spec if spec[key][0] == "int"}


# ---------------------------------------------------------------- the reference oracle


def reference_decode(piece: bytes) -> tuple[int, int, bytes] | None:
    """(type, seq, body) if piece (one delimiter-free piece) is a valid frame according to the
    reference codecs, else None."""
    if not piece or len(piece) > wire.MAX_ENCODED_BYTES:
        return None
    try:
        raw = cobs_ref.decode(piece)
    except cobs_ref.DecodeError:
        return None
    if len(raw) < 5 or crc_ref(raw[:-2]) != struct.unpack("<H", raw[-2:])[0]:
        return None
    msg_type, seq = struct.unpack_from("<BH", raw, 0)
    return msg_type, seq, bytes(raw[3:-2])


def expected_reading(stream: bytes) -> tuple[list[tuple[int, int, bytes]], int, int]:
    """What a FrameReader fed `stream` (however chunked) must yield and count: (frames, bad,
    oversize). Pieces end at 0x00; the last, unterminated piece is still pending, and counts as
    oversize once it outgrows the cap."""
    *terminated, tail = stream.split(b"\x00")
    frames, bad, oversize = [], 0, 0
    for piece in terminated:
        if not piece:
            continue
        if len(piece) > wire.MAX_ENCODED_BYTES:
            oversize += 1
            continue
        frame = reference_decode(piece)
        if frame is None:
            bad += 1
        else:
            frames.append(frame)
    if len(tail) > wire.MAX_ENCODED_BYTES:
        oversize += 1
    return frames, bad, oversize


def is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _finite_number(value: Any) -> bool:
    return is_number(value) and (isinstance(value, int) or math.isfinite(value))


def well_formed_hello(msg: Any) -> bool:
    """A HELLO the hub may accept: our protocol, a sane watchdog, geometry within its limits."""
    if not isinstance(msg, dict):
        return False
    proto = msg.get("proto")
    if not is_number(proto) or proto != wire.PROTOCOL_VERSION:
        return False
    watchdog = msg.get("watchdog_ms", 500)
    if not _finite_number(watchdog) or not WATCHDOG_RANGE_MS[0] <= watchdog <= WATCHDOG_RANGE_MS[1]:
        return False
    geometry = msg.get("geometry", {})
    if not isinstance(geometry, dict):
        return False
    return all(k in GEOMETRY_LIMITS and _finite_number(v) and GEOMETRY_LIMITS[k][0] <= v <= GEOMETRY_LIMITS[k][1]
               for k, v in geometry.items())


def _value_ok(kind: str, value: Any, low: Any, high: Any, sensors: tuple[str, ...]) -> bool:
    if kind in ("num", "int"):
        if not _finite_number(value) or not low <= value <= high:
            return False
        return kind == "num" or value == int(value)
    if kind == "str":
        return isinstance(value, str) and value in high
    if kind == "sensor":
        return isinstance(value, str) and (value == "" or value in sensors)
    if kind == "sensors":
        names = [value] if isinstance(value, str) else value
        return isinstance(names, list) and 1 <= len(names) <= 2 and all(
            isinstance(n, str) and n in sensors for n in names)
    return False


def well_formed_start(msg: Any, sensors: tuple[str, ...]) -> str | None:
    """The action a START may start: a known action, parameters it knows with finite values in
    range, required ones present, and a telemetry rate of 0 (off) or 1..500 Hz. None otherwise."""
    if not isinstance(msg, dict):
        return None
    action = msg.get("action")
    if not isinstance(action, str) or action not in SPECS:
        return None
    params = msg.get("params", {})
    hz = msg.get("telemetry_hz", 100)
    if not isinstance(params, dict) or not _finite_number(hz) or not (hz == 0 or 1 <= hz <= MAX_TELEMETRY_HZ):
        return None
    spec = SPECS[action]
    for key, value in params.items():
        if key not in spec:
            return None
        kind, _default, low, high = spec[key]
        if not _value_ok(kind, value, low, high, sensors):
            return None
    if any(spec[key][1] is None and key not in params for key in spec):
        return None
    return action


def parse_json(body: bytes) -> Any:
    """The body as the host's stdlib json sees it, or None."""
    try:
        return json.loads(body.decode("utf-8"))
    except (ValueError, UnicodeDecodeError):
        return None


# ---------------------------------------------------------------- building blocks for generators

ODD_NUMBERS = [0, -1, 1, 2, 10**18, -(10**18), 2**64, 10**400, -(10**400), 1e308, -1e308,
               1.7976931348623157e308, 5e-324, 1e-310, -0.0, float("inf"), float("-inf"), float("nan")]
ODD_STRINGS = ["", "turn", "stop", "start", "hello", "follow_line ", "FOLLOW_LINE", "__import__",
               "eval", "line_left", "forward", "spin", "gyro", "\u00e9\u0000\ud7ff", "x" * 200,
               "x" * 900, "\u00e9" * 170]
KEYS = sorted({"action", "params", "telemetry_hz", "proto", "watchdog_ms", "geometry", "session",
               "auth", "challenge", "from", "to", "ref", *GEOMETRY_KEYS,
               *(k for spec in SPECS.values() for k in spec)})


def encode_json_frame(msg_type: int, seq: int, obj: Any) -> bytes:
    """A frame with a valid CRC whose body is obj as JSON (cut to the cap if longer)."""
    body = json.dumps(obj).encode()
    return wire.encode_frame(msg_type, seq, body[:MAX_BODY])


def valid_hello(seq: int = 1, **extra: Any) -> bytes:
    # A long watchdog: the fuzz advances virtual time, and silence must not be what stops things.
    return wire.encode_message(wire.HELLO, seq, {"proto": wire.PROTOCOL_VERSION, "session": "fuzz",
                                                 "watchdog_ms": 60000, **extra})


# A START for each action, as a host would send it (sensor names of the scripted board).
GOOD_STARTS = {
    "stop": {"action": "stop"},
    "turn": {"action": "turn", "params": {"angle_deg": 90, "speed_pct": 30}, "telemetry_hz": 50},
    "drive_straight": {"action": "drive_straight", "params": {"distance_mm": 120}},
    "probe_edge": {"action": "probe_edge", "params": {"sensor": "line_left"}},
    "follow_line": {"action": "follow_line", "params": {"sensors": ["line_left", "line_right"],
                                                         "time_s": 1.5, "kp": 0.4}},
}


MUTATIONS = ("flip", "insert", "delete", "truncate", "splice", "overwrite", "oversize", "zero")


def mutate(data: bytes, ops: list[tuple[str, int, int, bytes]], donor: bytes = b"") -> bytes:
    """Apply mutations to encoded bytes; positions wrap around so any drawn number is valid."""
    buf = bytearray(data)
    for kind, where, value, extra in ops:
        pos = where % (len(buf) + 1)
        if kind == "flip" and buf:
            buf[where % len(buf)] ^= 1 << (value % 8)
        elif kind == "insert":
            buf[pos:pos] = bytes([value])
        elif kind == "delete" and buf:
            del buf[where % len(buf)]
        elif kind == "truncate":
            del buf[pos:]
        elif kind == "splice":  # a slice of another frame, or of the drawn bytes
            source = donor or extra
            start = value % (len(source) + 1)
            buf[pos:pos] = source[start : start + 1 + where % 64]
        elif kind == "overwrite":
            buf[pos : pos + len(extra)] = extra
        elif kind == "oversize":  # a run longer than any frame, with no delimiter in it
            buf[pos:pos] = bytes([value or 1]) * (wire.MAX_ENCODED_BYTES + 1 + where % 700)
        elif kind == "zero":
            buf[pos:pos] = b"\x00"
    return bytes(buf)


# ---------------------------------------------------------------- what the hub executed


class Watch:
    """What the hub executed: actions entered (name, checked params) and non-zero motor power."""

    def __init__(self) -> None:
        self.started: list[tuple[str, dict]] = []
        self.moves: list[tuple[float, float]] = []

    def record_power(self, left: float, right: float) -> None:
        if left or right:
            self.moves.append((left, right))


def _counting(name: str, fn: Callable, started: list) -> Callable:
    def action(ctx, p):
        started.append((name, p))
        return (yield from fn(ctx, p))

    return action


@contextmanager
def watched_actions(watch: Watch) -> Iterator[None]:
    """Every built-in action records that it was entered, for as long as the block runs."""
    assert listener_module.BUILTINS is actions.BUILTINS  # the listener dispatches through this dict
    wrapped = {name: (_counting(name, fn, watch.started), spec)
               for name, (fn, spec) in actions.BUILTINS.items()}
    with mock.patch.dict(actions.BUILTINS, wrapped):
        yield


class WatchedBoard(ScriptedBoard):
    def __init__(self, watch: Watch) -> None:
        super().__init__(rx_chunk=1 << 20)  # one tick takes everything delivered
        self.watch = watch

    def set_power(self, left_pct, right_pct):
        self.watch.record_power(left_pct, right_pct)
        super().set_power(left_pct, right_pct)


class Oracle:
    """The host's view of a stream: which STARTs may start an action, judged frame by frame."""

    def __init__(self, sensors: tuple[str, ...]) -> None:
        self.sensors = sensors
        self.hello_ok = False

    def allowed_starts(self, unit: bytes) -> tuple[list[tuple[str, dict]], bool]:
        """(action, params) of the well-formed STARTs in a delimiter-terminated unit, in order,
        and whether any piece of it decoded at all."""
        allowed = []
        any_frame = False
        for piece in unit.split(b"\x00")[:-1]:
            frame = reference_decode(piece)
            if frame is None:
                continue
            any_frame = True
            msg_type, _seq, body = frame
            msg = parse_json(body)
            if msg_type == wire.HELLO and well_formed_hello(msg):
                self.hello_ok = True
            elif msg_type == wire.START and self.hello_ok:
                name = well_formed_start(msg, self.sensors)
                if name is not None:
                    allowed.append((name, msg.get("params", {})))
        return allowed, any_frame


def _same_value(sent: Any, used: Any) -> bool:
    if isinstance(sent, str) and isinstance(used, list):  # one sensor name becomes a list of one
        return used == [sent]
    return sent == used


def unexplained_starts(started: list[tuple[str, dict]],
                       allowed: list[tuple[str, dict]]) -> list[tuple[str, dict]]:
    """The actions entered that no allowed START explains. Each allowed START explains at most
    one entry, of its action, whose checked parameters hold every value the START sent."""
    remaining = list(allowed)
    unexplained = []
    for name, used in started:
        match = [i for i, (n, sent) in enumerate(remaining)
                 if n == name and all(k in used and _same_value(v, used[k]) for k, v in sent.items())]
        if match:
            remaining.pop(match[0])
        else:
            unexplained.append((name, used))
    return unexplained


