"""Fuzzing of the frame decoder (hub_side/wire.py) and of the hub's command handling
(hub_side/listener.py).

The oracle lives in tests/fuzz_oracle.py (bench/fuzz.py uses it too). The decoder is checked
against independent reference codecs (`cobs` for COBS, `crcmod` for CRC-16/CCITT-FALSE): for any
byte stream, cut into chunks anywhere, FrameReader must yield exactly the frames the reference
finds and count exactly the pieces it drops, within HANG_LIMIT_S per feed.

The listener is checked for "nothing executed from a bad frame": every built-in action is wrapped
so that entering it is recorded, and the board records every non-zero motor power. Each action
entered must trace back to a well-formed START (judged by the host-side rules in
`well_formed_start`, written independently of the listener) that arrived intact, after a
well-formed HELLO; with no action entered, the motors never get power; no exception leaves tick().

Six listener bugs this fuzzing found (A..F: unhashable action names, geometry and rates that
overflowed, infinite or NaN parameters, refusals that echoed host text past the frame cap) are
fixed; the tests at the end of this file keep them fixed.

TRACKPROOF_FUZZ_EXAMPLES=5000 python -m pytest tests/test_fuzz.py runs a deeper search.
"""

from __future__ import annotations

import json
import math
import os
import random
import time
from pathlib import Path
from typing import Any

import pytest
from fuzz_oracle import (GEOMETRY_KEYS, GOOD_STARTS, HANG_LIMIT_S, HOST_TO_HUB, HUB_TO_HOST, KEYS,
                         KNOWN_ACTIONS, MAX_BODY, MAX_TELEMETRY_HZ, MUTATIONS, ODD_NUMBERS,
                         ODD_STRINGS, SPECS, UNKNOWN_TYPES, Oracle, Watch, WatchedBoard,
                         encode_json_frame, expected_reading, mutate, parse_json, reference_decode,
                         unexplained_starts, valid_hello, watched_actions,
                         well_formed_start)
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from harness.sim import Simulation
from hub_script.scripted_board import ScriptedBoard
from hub_side import auth, wire
from hub_side.listener import Listener
from micropython_runner import run_micropython

ROOT = Path(__file__).resolve().parent.parent
FUZZ_EXAMPLES = int(os.environ.get("TRACKPROOF_FUZZ_EXAMPLES", "120"))
FUZZ = settings(deadline=None, max_examples=FUZZ_EXAMPLES, suppress_health_check=[HealthCheck.too_slow])

# ---------------------------------------------------------------- strategies

scalars = st.one_of(
    st.none(), st.booleans(), st.integers(), st.floats(), st.sampled_from(ODD_NUMBERS),
    st.text(max_size=10), st.sampled_from(ODD_STRINGS))
junk = st.recursive(
    scalars,
    lambda inner: st.one_of(st.lists(inner, max_size=4),
                            st.dictionaries(st.one_of(st.sampled_from(KEYS), st.text(max_size=6)),
                                            inner, max_size=4)),
    max_leaves=10)


def _valid_value(kind: str, low: Any, high: Any, sensors: tuple[str, ...]) -> st.SearchStrategy:
    """A value the contract allows for one parameter."""
    if kind == "int":
        return st.integers(int(low), int(high))
    if kind == "num":
        return st.one_of(st.floats(low, high), st.sampled_from([low, high, int(high)]))
    if kind == "str":
        return st.sampled_from(high)
    names = st.sampled_from(sensors)
    if kind == "sensor":
        return names
    return st.one_of(names, st.lists(names, min_size=1, max_size=2))


def _flawed_value(kind: str, low: Any, high: Any, sensors: tuple[str, ...]) -> st.SearchStrategy:
    """A value just past the contract, or something else entirely."""
    if kind in ("num", "int"):
        past = [low - 1, high + 1, low - 1e-9, high * (1 + 1e-12) + 1e-300]
        if kind == "int":
            past += [low + 0.5, (low + high) / 2 + 0.25]
        return st.one_of(st.sampled_from(past), st.sampled_from([True, False, None, str(low)]),
                         st.sampled_from(ODD_NUMBERS), junk)
    if kind == "str":
        return st.one_of(st.sampled_from([c.upper() for c in high] + [" " + high[0], ""]), junk)
    names = st.sampled_from(("nosuch", sensors[0].upper(), ""))
    too_many = st.lists(st.sampled_from(sensors), min_size=3, max_size=4)
    return st.one_of(names, too_many, st.just([]), junk)


START_FLAWS = ("none", "none", "none", "none", "none", "action", "param", "param", "unknown_param",
               "missing", "params_type", "hz", "extra_key")


@st.composite
def start_messages(draw, sensors: tuple[str, ...]) -> dict:
    """START bodies around the real contract: over a third well-formed, the rest with one flaw (an
    unknown or junk action, a bad or unknown or missing parameter, junk params, a bad telemetry
    rate, a stray key; stray keys are allowed)."""
    name = draw(st.sampled_from(KNOWN_ACTIONS))
    spec = SPECS[name]
    flaw = draw(st.sampled_from(START_FLAWS))
    params: Any = {}
    for key in spec:
        kind, default, low, high = spec[key]
        if default is None or draw(st.integers(0, 3)) == 0:
            params[key] = draw(_valid_value(kind, low, high, sensors))
    msg: dict[str, Any] = {"action": name}
    if flaw == "action":
        msg["action"] = draw(st.one_of(st.sampled_from(ODD_STRINGS), junk))
    elif flaw == "param" and spec:
        # Kind first, so the rarer kinds (a whole number, a sensor list) get their share.
        kind = draw(st.sampled_from(sorted({spec[k][0] for k in spec})))
        key = draw(st.sampled_from(sorted(k for k in spec if spec[k][0] == kind)))
        kind, _default, low, high = spec[key]
        params[key] = draw(_flawed_value(kind, low, high, sensors))
    elif flaw == "unknown_param":
        params[draw(st.sampled_from(KEYS))] = draw(junk)
    elif flaw == "missing" and params:
        del params[draw(st.sampled_from(sorted(params)))]
    elif flaw == "params_type":
        params = draw(st.one_of(st.lists(junk, max_size=3), scalars))
    if params or draw(st.booleans()):
        msg["params"] = params
    if flaw == "hz":
        msg["telemetry_hz"] = draw(st.one_of(st.sampled_from([501, -1, 500.0001, -1e-9, True, "100"]),
                                             scalars))
    elif draw(st.integers(0, 2)) == 0:
        msg["telemetry_hz"] = draw(st.one_of(st.integers(0, MAX_TELEMETRY_HZ),
                                             st.floats(0, MAX_TELEMETRY_HZ)))
    if flaw == "extra_key":
        msg[draw(st.sampled_from(["session", "seq", "x", "hello"]))] = draw(junk)
    return msg


@st.composite
def hello_messages(draw) -> dict:
    msg: dict[str, Any] = {"proto": draw(st.one_of(st.just(wire.PROTOCOL_VERSION), scalars))}
    if draw(st.booleans()):
        msg["watchdog_ms"] = draw(st.one_of(st.sampled_from([50, 49, 60000, 60001, 500]), scalars))
    if draw(st.booleans()):
        geo = st.dictionaries(st.sampled_from(GEOMETRY_KEYS + ("wheel_mm",)),
                              st.one_of(st.floats(0.01, 500), scalars), max_size=3)
        msg["geometry"] = draw(st.one_of(geo, junk))
    if draw(st.booleans()):
        msg["session"] = draw(junk)
    return msg


@st.composite
def hub_frames(draw, sensors: tuple[str, ...]) -> bytes:
    """One encoded frame with a valid CRC, of any type, and a body that is a plausible message,
    JSON junk, non-object JSON, broken JSON or raw bytes."""
    shape = draw(st.sampled_from(["start", "start", "start", "hello", "junk", "raw", "broken"]))
    host = st.just(wire.START) if shape == "start" else st.sampled_from(HOST_TO_HUB)
    msg_type = draw(st.one_of(host, host, host, st.sampled_from(HUB_TO_HOST), st.integers(0, 255)))
    seq = draw(st.integers(0, 0xFFFF))
    if shape == "raw":
        return wire.encode_frame(msg_type, seq, draw(st.binary(max_size=200)))
    if shape == "start":
        obj: Any = draw(start_messages(sensors))
    elif shape == "hello":
        obj = draw(hello_messages())
    else:
        obj = draw(junk)
    if shape == "broken":
        body = json.dumps(obj).encode()[:MAX_BODY]
        cut = draw(st.integers(0, len(body)))
        return wire.encode_frame(msg_type, seq, (body[:cut] + draw(st.binary(max_size=4)))[:MAX_BODY])
    return encode_json_frame(msg_type, seq, obj)


mutation_ops = st.lists(
    st.tuples(st.sampled_from(MUTATIONS), st.integers(0, 1 << 16), st.integers(0, 255),
              st.binary(max_size=24)),
    min_size=1, max_size=4)


def split_at(stream: bytes, cuts: list[int]) -> list[bytes]:
    bounds = [0, *sorted(c % (len(stream) + 1) for c in cuts), len(stream)]
    return [stream[a:b] for a, b in zip(bounds, bounds[1:])]


def feed_timed(reader: wire.FrameReader, chunks: list[bytes]) -> list[tuple[int, int, bytes]]:
    frames = []
    for chunk in chunks:
        start = time.perf_counter()
        frames.extend(reader.feed(chunk))
        elapsed = time.perf_counter() - start
        assert elapsed < HANG_LIMIT_S, "feeding %d bytes took %.2f s" % (len(chunk), elapsed)
    return frames


# ---------------------------------------------------------------- frame reader


def check_reader_on(stream: bytes, cuts: list[int]) -> list[tuple[int, int, bytes]]:
    reader = wire.FrameReader()
    frames = feed_timed(reader, split_at(stream, cuts))
    expected, bad, oversize = expected_reading(stream)
    assert frames == expected
    counts = (reader.frames_ok, reader.frames_bad, reader.frames_oversize)
    assert counts == (len(expected), bad, oversize)
    for msg_type, seq, body in frames:
        # Every yielded frame is a real one: re-encoding it gives a frame the reference accepts.
        assert reference_decode(wire.encode_frame(msg_type, seq, body)[:-1]) == (msg_type, seq, body)
    return frames


zero_rich_bytes = st.lists(st.sampled_from([0, 0, 1, 2, 3, 0xFE, 0xFF, 0x7F]), max_size=600).map(bytes)


@FUZZ
@given(st.one_of(st.binary(max_size=2500), zero_rich_bytes),
       st.lists(st.integers(0, 1 << 20), max_size=12))
def test_reader_on_arbitrary_bytes(stream: bytes, cuts: list[int]) -> None:
    check_reader_on(stream, cuts)


frame_specs = st.tuples(
    st.integers(0, 255),
    st.integers(0, 0xFFFF),
    st.one_of(st.binary(max_size=300), st.sampled_from([b"", bytes(MAX_BODY), b"\x5a" * MAX_BODY]),
              junk.map(lambda obj: json.dumps(obj).encode()[:MAX_BODY])),
)


@st.composite
def mutated_streams(draw) -> bytes:
    frames = [wire.encode_frame(*spec) for spec in draw(st.lists(frame_specs, min_size=1, max_size=5))]
    out = []
    for frame in frames:
        if draw(st.booleans()):
            donor = draw(st.sampled_from(frames))
            frame = mutate(frame, draw(mutation_ops), donor)
        out.append(frame)
    return b"".join(out)


@FUZZ
@given(mutated_streams(), st.lists(st.integers(0, 1 << 20), max_size=12))
def test_reader_on_mutated_frames(stream: bytes, cuts: list[int]) -> None:
    check_reader_on(stream, cuts)


@FUZZ
@given(st.one_of(st.binary(max_size=2000), mutated_streams(),
                 st.integers(wire.MAX_ENCODED_BYTES + 1, 4000).map(lambda n: b"\x42" * n)),
       frame_specs, st.lists(st.integers(0, 1 << 20), max_size=10))
def test_reader_resynchronises_after_garbage(garbage: bytes, spec: tuple[int, int, bytes],
                                             cuts: list[int]) -> None:
    # Whatever came before, a valid frame after a 0x00 is always decoded, and is the last one.
    good = (spec[0], spec[1], spec[2])
    stream = garbage + b"\x00" + wire.encode_frame(*good)
    frames = check_reader_on(stream, cuts)
    assert frames[-1] == good


def test_reader_oracle_catches_a_wrong_decoder() -> None:
    # The oracle itself must be able to fail: a frame with a bad CRC is not expected.
    frame = bytearray(wire.encode_frame(wire.START, 1, b'{"action": "stop"}'))
    frame[4] ^= 0x10
    assert expected_reading(bytes(frame)) == ([], 1, 0)
    assert expected_reading(b"\x05" * 2000 + b"\x00" + b"\x05" * 2000) == ([], 0, 2)


# ---------------------------------------------------------------- the hub: what it executes


class Hub:
    """The real listener on a board, fed whole units of bytes; counts what it executes."""

    def __init__(self, board_kind: str = "scripted", **listener_args: Any) -> None:
        self.watch = Watch()
        self.kind = board_kind
        if board_kind == "sim":
            self.sim = Simulation.from_files(seed=3)
            board = self.sim.board
            real_set_power = board.set_power

            def set_power(left, right):
                self.watch.record_power(left, right)
                real_set_power(left, right)

            board.set_power = set_power
            self.listener = self.sim.listener
        else:
            board = WatchedBoard(self.watch)
            self.listener = Listener(board, robot_id="fuzz", **listener_args)
        self.board = board
        self.sensors = tuple(board.sensor_names)
        self.output = bytearray(board.tx)  # the listener's opening delimiter
        board.tx.clear()

    def deliver(self, data: bytes, ticks: int = 3) -> bytes:
        """Hand data to the hub, run a few ticks, and return what the hub wrote meanwhile."""
        before = len(self.output)
        if self.kind == "sim":
            self.board.rx.extend(data)
        else:
            self.board.host_send(data)
        for _ in range(ticks):
            start = time.perf_counter()
            if self.kind == "sim":
                self.sim.step(20000)
            else:
                wait = self.listener.tick()
                self.board.idle_us(max(1, min(wait, 20000)))
            elapsed = time.perf_counter() - start
            assert elapsed < HANG_LIMIT_S, "one tick took %.2f s" % elapsed
        self.output += self.board.tx
        self.board.tx.clear()
        return bytes(self.output[before:])

    def replies(self) -> list[tuple[int, int, Any]]:
        """Everything the hub wrote, decoded; the hub itself must never send a bad frame."""
        reader = wire.FrameReader()
        frames = reader.feed(bytes(self.output) + b"\x00")
        assert reader.frames_bad == 0 and reader.frames_oversize == 0
        for msg_type, _seq, _body in frames:
            assert msg_type in HUB_TO_HOST
        return [(t, s, b if t == wire.TELEMETRY else json.loads(b)) for t, s, b in frames]


def check_unit(hub: Hub, oracle: Oracle, unit: bytes) -> None:
    """Deliver one unit and check that the hub executed nothing the unit did not allow."""
    before = len(hub.watch.started)
    allowed, any_frame = oracle.allowed_starts(unit)
    written = hub.deliver(unit)
    new = hub.watch.started[before:]
    if not any_frame and not hub.watch.started:
        assert written == b"", "the hub answered a unit that holds no valid frame"
    # Each action entered matches its own well-formed START of this unit, parameters included.
    unexplained = unexplained_starts(new, allowed)
    assert not unexplained, "started with no well-formed START after a HELLO: %r from %r" % (
        unexplained, unit)
    if not hub.watch.started:
        assert hub.watch.moves == [], "motor power set with no action started"


@st.composite
def hub_units(draw, sensors: tuple[str, ...]) -> list[bytes]:
    """A session's worth of delimiter-terminated units: valid frames, mutated frames, garbage,
    and sometimes a well-formed HELLO so that STARTs are judged past the session check."""
    units = [valid_hello(0)] if draw(st.booleans()) else []
    for _ in range(draw(st.integers(1, 10))):
        shape = draw(st.sampled_from(["frame"] * 3 + ["mutated"] * 2 + ["garbage", "hello"]))
        if shape == "hello":
            unit = valid_hello(draw(st.integers(0, 0xFFFF)))
        elif shape == "garbage":
            unit = draw(st.binary(max_size=300))
        else:
            unit = draw(hub_frames(sensors))
            if shape == "mutated":
                unit = mutate(unit, draw(mutation_ops))
        units.append(unit.rstrip(b"\x00") + b"\x00")
    return units


SCRIPTED_SENSORS = tuple(ScriptedBoard.sensor_names)


@FUZZ
@given(hub_units(SCRIPTED_SENSORS))
def test_listener_executes_nothing_from_bad_frames(units: list[bytes]) -> None:
    watch_hub = Hub()
    oracle = Oracle(watch_hub.sensors)
    with watched_actions(watch_hub.watch):
        for unit in units:
            check_unit(watch_hub, oracle, unit)
        watch_hub.replies()


@settings(deadline=None, max_examples=max(25, FUZZ_EXAMPLES // 5))
@given(hub_units(("left", "right", "outer_left", "outer_right", "rear")))
def test_listener_on_the_simulated_robot_executes_nothing_from_bad_frames(units: list[bytes]) -> None:
    hub = Hub("sim")
    assert hub.sensors == ("left", "right", "outer_left", "outer_right", "rear")
    oracle = Oracle(hub.sensors)
    with watched_actions(hub.watch):
        hub.deliver(valid_hello(1))  # the simulated robot starts in a session, as a host would
        oracle.allowed_starts(valid_hello(1))
        for unit in units:
            check_unit(hub, oracle, unit)
        hub.replies()


def session_hub() -> Hub:
    hub = Hub()
    reply = hub.deliver(valid_hello(1))
    assert [t for t, _s, _b in wire.FrameReader().feed(reply)] == [wire.HUB_INFO]
    return hub


@pytest.mark.parametrize("name", sorted(GOOD_STARTS))
def test_every_good_start_starts_its_action_once(name: str) -> None:
    # The positive control: the instrumentation sees a start, so the zero counts elsewhere mean
    # something. The same START twice is a retransmission and starts nothing more.
    hub = session_hub()
    frame = wire.encode_message(wire.START, 7, GOOD_STARTS[name])
    assert well_formed_start(parse_json(reference_decode(frame[:-1])[2]), hub.sensors) == name
    with watched_actions(hub.watch):
        hub.deliver(frame)
        hub.deliver(frame)
    assert [n for n, _p in hub.watch.started] == [name]
    if name != "stop":
        assert hub.watch.moves, "the action ran but never set motor power"


@pytest.mark.parametrize("name", sorted(GOOD_STARTS))
def test_every_corruption_of_a_good_start_starts_nothing(name: str) -> None:
    # Exhaustive: every single-bit flip, every single-byte deletion and every truncation of the
    # encoded START. For these frames no variant passes the reference check (a flip of a COBS code
    # byte could, with odds near 2**-16, and would then be judged as any frame), so nothing may
    # start and, by check_unit, the hub must not even answer.
    hub = session_hub()
    oracle = Oracle(hub.sensors)
    oracle.hello_ok = True
    encoded = wire.encode_message(wire.START, 7, GOOD_STARTS[name])[:-1]
    variants = []
    for pos in range(len(encoded)):
        for bit in range(8):
            variants.append(mutate(encoded, [("flip", pos, bit, b"")]))
        variants.append(mutate(encoded, [("delete", pos, 0, b"")]))
        variants.append(encoded[:pos])
    with watched_actions(hub.watch):
        for variant in variants:
            check_unit(hub, oracle, variant + b"\x00")
        assert hub.watch.started == [] and hub.watch.moves == []
        hub.deliver(encoded + b"\x00")  # then the intact START still works
    assert [n for n, _p in hub.watch.started] == [name]


@FUZZ
@given(st.sampled_from(sorted(GOOD_STARTS)), mutation_ops, st.integers(0, 0xFFFF))
def test_randomly_corrupted_good_start_starts_nothing_it_should_not(name: str, ops, seq: int) -> None:
    hub = session_hub()
    oracle = Oracle(hub.sensors)
    oracle.hello_ok = True
    encoded = wire.encode_message(wire.START, seq, GOOD_STARTS[name])[:-1]
    with watched_actions(hub.watch):
        check_unit(hub, oracle, mutate(encoded, ops) + b"\x00")


@FUZZ
@given(st.sampled_from(sorted(GOOD_STARTS)), st.data())
def test_start_with_corrupted_body_but_valid_crc_is_judged_by_the_rules(name: str, data) -> None:
    # What a corruption that passes the CRC looks like: a different message. It starts an action
    # only if it is itself a well-formed START.
    hub = session_hub()
    oracle = Oracle(hub.sensors)
    oracle.hello_ok = True
    body = json.dumps(GOOD_STARTS[name]).encode()
    body = mutate(body, data.draw(mutation_ops))[:MAX_BODY]
    msg = parse_json(body)
    if isinstance(msg, dict):
        body = json.dumps(msg).encode()[:MAX_BODY]
    with watched_actions(hub.watch):
        check_unit(hub, oracle, wire.encode_frame(wire.START, 9, body))


@FUZZ
@given(st.lists(start_messages(SCRIPTED_SENSORS), min_size=1, max_size=8))
def test_intact_starts_start_exactly_when_well_formed(messages: list[dict]) -> None:
    # Intact frames, in a session, each followed by a STOP so the next one never finds the hub
    # busy: an action is entered exactly for the well-formed STARTs, with the parameters sent.
    hub = session_hub()
    with watched_actions(hub.watch):
        for seq, msg in enumerate(messages, start=10):
            frame = encode_json_frame(wire.START, seq, msg)
            sent = parse_json(reference_decode(frame[:-1])[2])  # as sent, after any sidestep
            expected = well_formed_start(sent, hub.sensors)
            before = len(hub.watch.started)
            hub.deliver(frame)
            hub.deliver(wire.encode_message(wire.STOP, 2000 + seq, {}))
            started = hub.watch.started[before:]
            assert [n for n, _p in started] == ([expected] if expected else []), sent
            if expected:
                assert not unexplained_starts(started, [(expected, sent.get("params", {}))]), sent
    if not hub.watch.started:
        assert hub.watch.moves == []


def _just_past(kind: str, low: Any, high: Any, sensors: tuple[str, ...]) -> list[Any]:
    """Values a parameter of this kind must refuse: just outside the range, or the wrong type."""
    if kind in ("num", "int"):
        past = [low - 1, high + 1, low - 1e-9, high + 1e-9 * max(1.0, abs(high)), 10**400, -(10**400),
                True, None, str(low), [low]]
        return past + [low + 0.5] if kind == "int" else past
    if kind == "str":
        return [c.upper() for c in high] + ["", " " + high[0], None, 1, list(high[:1])]
    if kind == "sensor":
        return ["nosuch", sensors[0].upper(), None, 1, [sensors[0]]]
    return ["nosuch", [], list(sensors[:3]), [sensors[0], "nosuch"], None, 1, {sensors[0]: 1}]


def _edges(kind: str, low: Any, high: Any, sensors: tuple[str, ...]) -> list[Any]:
    """Values a parameter of this kind must accept, at the ends of what it allows."""
    if kind in ("num", "int"):
        return [low, high, math.ceil(low), math.floor(high)]
    if kind == "str":
        return list(high)
    if kind == "sensor":
        return [sensors[0], sensors[-1], ""]
    return [sensors[0], [sensors[0]], [sensors[0], sensors[-1]]]


@pytest.mark.parametrize("name", sorted(GOOD_STARTS))
def test_each_parameter_is_refused_just_past_its_contract(name: str) -> None:
    # Exhaustive over each parameter of each action: a value just past the contract starts
    # nothing; a value at its edge starts the action. Each START is followed by a STOP.
    hub = session_hub()
    base = dict(GOOD_STARTS[name].get("params", {}))
    seq = 100
    with watched_actions(hub.watch):
        for key, (kind, _default, low, high) in sorted(SPECS[name].items()):
            for value, should_start in ([(v, False) for v in _just_past(kind, low, high, hub.sensors)]
                                        + [(v, True) for v in _edges(kind, low, high, hub.sensors)]):
                msg = {"action": name, "params": dict(base, **{key: value})}
                assert (well_formed_start(msg, hub.sensors) == name) is should_start, msg
                before = len(hub.watch.started)
                hub.deliver(wire.encode_message(wire.START, seq, msg))
                hub.deliver(wire.encode_message(wire.STOP, seq + 1, {}))
                seq += 2
                assert len(hub.watch.started) - before == (1 if should_start else 0), msg


SECRET = "fuzz-secret"


@settings(deadline=None, max_examples=max(30, FUZZ_EXAMPLES // 4))
@given(hub_units(SCRIPTED_SENSORS))
def test_hub_with_a_secret_executes_nothing_for_a_host_without_it(units: list[bytes]) -> None:
    # No frame here can carry a proof of the secret, so no HELLO opens a session, and even a
    # perfect START afterwards starts nothing.
    hub = Hub(secret=SECRET)
    with watched_actions(hub.watch):
        for unit in units:
            hub.deliver(unit)
        hub.deliver(wire.encode_message(wire.START, 4242, GOOD_STARTS["turn"]))
    assert hub.watch.started == [] and hub.watch.moves == []
    hub.replies()


def test_hub_with_a_secret_starts_for_a_host_with_it() -> None:
    # The positive control for the test above: the same START works after a proven HELLO.
    hub = Hub(secret=SECRET)
    refusals = [b for t, _s, b in wire_json(hub.deliver(valid_hello(1))) if t == wire.REFUSE]
    challenge = refusals[0]["challenge"]
    proof = auth.proof(SECRET, "host", challenge, "fuzz")
    info = wire_json(hub.deliver(valid_hello(2, challenge=challenge, auth=proof)))
    assert [t for t, _s, _b in info] == [wire.HUB_INFO]
    with watched_actions(hub.watch):
        hub.deliver(wire.encode_message(wire.START, 4242, GOOD_STARTS["turn"]))
    assert [n for n, _p in hub.watch.started] == ["turn"]


def wire_json(data: bytes) -> list[tuple[int, int, Any]]:
    return [(t, s, json.loads(b)) for t, s, b in wire.FrameReader().feed(data)]


@pytest.mark.parametrize("msg_type", HUB_TO_HOST + UNKNOWN_TYPES[:8] + UNKNOWN_TYPES[-4:])
def test_hub_to_host_and_unknown_types_are_ignored(msg_type: int) -> None:
    # A perfect START body under any other type: no reply, nothing started, nothing moved.
    hub = session_hub()
    with watched_actions(hub.watch):
        for seq, name in enumerate(sorted(GOOD_STARTS)):
            assert hub.deliver(encode_json_frame(msg_type, seq, GOOD_STARTS[name])) == b""
    assert hub.watch.started == [] and hub.watch.moves == []


def test_good_starts_without_a_hello_are_refused() -> None:
    hub = Hub()
    with watched_actions(hub.watch):
        for seq, name in enumerate(sorted(GOOD_STARTS)):
            hub.deliver(wire.encode_message(wire.START, seq, GOOD_STARTS[name]))
    assert hub.watch.started == [] and hub.watch.moves == []
    codes = [b["code"] for t, _s, b in hub.replies() if t == wire.REFUSE]
    assert codes == ["no_hello"] * len(GOOD_STARTS)


@pytest.mark.parametrize("hello", [
    {"proto": wire.PROTOCOL_VERSION + 1}, {"proto": str(wire.PROTOCOL_VERSION)}, {"proto": None},
    {}, {"proto": wire.PROTOCOL_VERSION, "watchdog_ms": 10**400},
    {"proto": wire.PROTOCOL_VERSION, "watchdog_ms": True},
    {"proto": wire.PROTOCOL_VERSION, "geometry": {"track_mm": -1}},
    {"proto": wire.PROTOCOL_VERSION, "geometry": {"track_mm": "wide"}},
    {"proto": wire.PROTOCOL_VERSION, "geometry": [1, 2]},
], ids=lambda h: json.dumps(h)[:40])
def test_refused_hello_opens_no_session(hello: dict) -> None:
    hub = Hub()
    with watched_actions(hub.watch):
        hub.deliver(wire.encode_message(wire.HELLO, 1, hello))
        hub.deliver(wire.encode_message(wire.START, 2, GOOD_STARTS["turn"]))
    assert hub.watch.started == [] and hub.watch.moves == []
    assert [t for t, _s, _b in hub.replies()] == [wire.REFUSE, wire.REFUSE]


@pytest.mark.parametrize(("ratio", "ok"), [(0.9, True), (1.0, True), (1.1, True), (1.037, True),
                                           (0.8999, False), (1.1001, False), (0.5, False)])
def test_wheel_ratio_limits_agree_between_oracle_and_hub(ratio: float, ok: bool) -> None:
    """wheel_ratio (D_right / D_left) is taken within 0.9..1.1 by the oracle and by the hub alike."""
    from fuzz_oracle import GEOMETRY_LIMITS as ORACLE_LIMITS, well_formed_hello
    from hub_side.motion import GEOMETRY_LIMITS as HUB_LIMITS

    assert ORACLE_LIMITS["wheel_ratio"] == (0.9, 1.1) and set(ORACLE_LIMITS) == set(HUB_LIMITS)
    hello = {"proto": wire.PROTOCOL_VERSION, "session": "r", "watchdog_ms": 60000,
             "geometry": {"wheel_ratio": ratio}}
    assert well_formed_hello(hello) is ok
    hub = Hub()
    with watched_actions(hub.watch):
        hub.deliver(wire.encode_message(wire.HELLO, 1, hello))
        hub.deliver(wire.encode_message(wire.START, 2, GOOD_STARTS["turn"]))
    assert [name for name, _p in hub.watch.started] == (["turn"] if ok else [])
    refused = [b for t, _s, b in hub.replies() if t == wire.REFUSE]
    assert (len(refused) == 0) is ok
    if not ok:
        assert "geometry.wheel_ratio" in json.dumps(refused[0])


# ---------------------------------------------------------------- on the hub's own interpreter

MICROPYTHON_FUZZ = """
from hub_side import actions, wire
from hub_side.listener import Listener
from hub_script.scripted_board import ScriptedBoard
from fuzz_corpus import UNITS

started = []
moves = [0]


def counting(name, fn):
    def action(ctx, p):
        started.append(name)
        return (yield from fn(ctx, p))
    return action


for name in list(actions.BUILTINS):
    fn, spec = actions.BUILTINS[name]
    actions.BUILTINS[name] = (counting(name, fn), spec)


class Board(ScriptedBoard):
    def set_power(self, left, right):
        if left or right:
            moves[0] += 1
        ScriptedBoard.set_power(self, left, right)


board = Board(rx_chunk=1 << 20)
hub = Listener(board, robot_id="fuzz")
for i in range(len(UNITS)):
    if i == len(UNITS) - 1:
        print("before_last", len(started), moves[0])
    board.host_send(UNITS[i])
    for _ in range(3):
        try:
            board.idle_us(max(1, min(hub.tick(), 20000)))
        except Exception as exc:
            print("error", i, type(exc).__name__, exc)
    board.take_tx()
print("started", ",".join(started), moves[0] > 0)
"""


def micropython_corpus() -> list[bytes]:
    """A HELLO; every single-bit flip, deletion and truncation of two good STARTs; each parameter
    just past its contract; good STARTs under every other type; garbage; then one good START."""
    units = [valid_hello(1)]
    for name in ("stop", "turn"):
        encoded = wire.encode_message(wire.START, 7, GOOD_STARTS[name])[:-1]
        for pos in range(len(encoded)):
            units += [mutate(encoded, [("flip", pos, bit, b"")]) + b"\x00" for bit in range(8)]
            units += [mutate(encoded, [("delete", pos, 0, b"")]) + b"\x00", encoded[:pos] + b"\x00"]
    seq = 100
    for name in sorted(GOOD_STARTS):
        base = dict(GOOD_STARTS[name].get("params", {}))
        for key, (kind, _default, low, high) in sorted(SPECS[name].items()):
            for value in _just_past(kind, low, high, SCRIPTED_SENSORS):
                units.append(encode_json_frame(wire.START, seq, {"action": name,
                                                                  "params": dict(base, **{key: value})}))
                seq += 1
    for msg_type in HUB_TO_HOST + UNKNOWN_TYPES[:4]:
        units += [encode_json_frame(msg_type, seq, GOOD_STARTS[name]) for name in sorted(GOOD_STARTS)]
    rng = random.Random(7)
    units += [bytes(rng.randrange(256) for _ in range(rng.randrange(1, 120))) + b"\x00"
              for _ in range(200)]
    return units + [wire.encode_message(wire.START, 9999, GOOD_STARTS["turn"])]


def test_micropython_listener_executes_nothing_from_the_corpus(tmp_path) -> None:
    # The same rules on the hub's interpreter, whose json, dicts and exceptions differ.
    units = micropython_corpus()
    corpus = tmp_path / "fuzz_corpus"
    corpus.mkdir()
    (corpus / "__init__.py").write_text("UNITS = [\n%s]\n" % "".join("    %r,\n" % u for u in units))
    out = run_micropython(MICROPYTHON_FUZZ, [ROOT / "hub_side", ROOT / "tests" / "hub_script", corpus])
    lines = out.splitlines()
    assert [line for line in lines if line.startswith("error")] == []
    assert "before_last 0 0" in lines  # nothing started, no motor power, before the good START
    assert lines[-1] == "started turn True"


# ---------------------------------------------------------------- bugs found by fuzzing, fixed
#
# Each test feeds frames with valid CRCs and asserts what should happen: no exception escapes
# tick(), the message is answered, and nothing starts that should not.
#   A: an unhashable action name (a list) raised TypeError from `name in BUILTINS`.
#   B: geometry was only checked for > 0; 1e308, inf or 10**400 divided by zero or overflowed.
#   C: telemetry_hz 1e-310 passed 0..500 and int(1e6 / hz) overflowed.
#   D: an int parameter of inf overflowed in int(value).
#   E: NaN passed every range check (CPython's json reads NaN; MicroPython's does not).
#   F: refusals echoed host text unbounded and overflowed the frame cap.


def _expect_answered_start(hello: bytes, start_body: bytes) -> None:
    hub = Hub()
    with watched_actions(hub.watch):
        hub.deliver(hello)
        hub.deliver(wire.encode_frame(wire.START, 2, start_body))
        answers = [(t, b) for t, _s, b in hub.replies() if t in (wire.ACK, wire.REFUSE)
                   and isinstance(b, dict) and b.get("ref") == 2]
    assert len(answers) == 1


@pytest.mark.parametrize("action", ["[]", "{}", '["turn"]'])
def test_bug_a_unhashable_action_name(action: str) -> None:
    _expect_answered_start(valid_hello(), b'{"action": %s}' % action.encode())


@pytest.mark.parametrize("value", ["1e308", "1e999", "1" + "0" * 400],
                         ids=["1e308", "1e999", "10**400"])
def test_bug_b_geometry_huge_wheel(value: str) -> None:
    hello = wire.encode_frame(wire.HELLO, 1, b'{"proto": %d, "watchdog_ms": 60000, "geometry": '
                              b'{"wheel_diameter_mm": %s}}' % (wire.PROTOCOL_VERSION, value.encode()))
    _expect_answered_start(hello, b'{"action": "stop"}')


def test_bug_b_geometry_infinite_track_is_refused() -> None:
    hub = Hub()
    hub.deliver(wire.encode_frame(wire.HELLO, 1, b'{"proto": %d, "geometry": {"track_mm": 1e999}}'
                                  % wire.PROTOCOL_VERSION))
    assert [t for t, _s, _b in hub.replies()] == [wire.REFUSE]


def test_bug_c_tiny_telemetry_rate() -> None:
    _expect_answered_start(valid_hello(), b'{"action": "stop", "telemetry_hz": 1e-310}')


def test_bug_d_infinite_whole_number_parameter() -> None:
    _expect_answered_start(valid_hello(), b'{"action": "follow_line", "params": {"sensors": '
                                          b'"line_left", "junctions": 1e999}}')


def test_bug_e_nan_timeout() -> None:
    _expect_answered_start(valid_hello(), b'{"action": "turn", "params": {"angle_deg": 90, '
                                          b'"timeout_s": NaN}}')


def test_bug_e_nan_parameter_is_refused() -> None:
    hub = Hub()
    with watched_actions(hub.watch):
        hub.deliver(valid_hello())
        hub.deliver(wire.encode_frame(wire.START, 2,
                                      b'{"action": "turn", "params": {"angle_deg": NaN}}'))
    assert hub.watch.started == []


@pytest.mark.parametrize("kind, body", [
    (wire.START, b'{"action": "%s"}' % (b"a" * 1000)),
    (wire.START, '{"action": "{}"}'.replace("{}", "\u00e9" * 160).encode()),
    (wire.START, b'{"action": "turn", "params": {"angle_deg": "%s"}}' % (b"x" * 950)),
    (wire.START, b'{"action": "turn", "params": {"%s": 1}}' % (b"k" * 950)),
    (wire.HELLO, b'{"proto": "%s"}' % (b"p" * 1000)),
], ids=["long action", "160 non-ASCII characters", "long value", "long key", "long proto"])
def test_bug_f_long_echo_overflows_the_reply(kind: int, body: bytes) -> None:
    hub = Hub()
    hub.deliver(valid_hello(1) + wire.encode_frame(kind, 2, body))
    assert [b.get("ref") for t, _s, b in hub.replies() if t == wire.REFUSE] == [2]
