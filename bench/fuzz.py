"""Fuzzing throughput of the frame decoder and of the hub's command handling, with the invariants
checked on every frame.

    python bench/fuzz.py [--frames 120000] [--seed 1]

A seeded generator builds the frames: intact frames of every type with JSON bodies (STARTs for
the known actions, each with one flaw; HELLOs; junk objects, non-objects, broken JSON), binary
bodies, mutated copies of well-formed STARTs and of other frames (bit flips, inserted and deleted
bytes, truncation, splices, oversize runs, stray delimiters), and plain garbage. One frame in 40
is a well-formed HELLO, so STARTs are judged past the session check. No START sent intact is
well-formed, so no action may start, unless a mutation happens to yield a well-formed START that
passes the CRC; the oracle (tests/fuzz_oracle.py) then allows exactly that one.

The frames go (1) as one stream, cut into random chunks, through a FrameReader, which must yield
the same frames and count the same dropped pieces as the reference codecs (cobs, crcmod); then
(2) one per tick through the real Listener on the scripted board, with every built-in action
wrapped to record its entry and the board recording non-zero motor power. Afterwards an intact
good START must start exactly one action (the instruments work). The six listener bugs this
fuzzing found (see the end of tests/test_fuzz.py) are fixed, so their inputs are sent as they are.

Prints:
    fuzz_frames: <frames pushed through the reader and through the listener>
    fuzz_frames_per_s: <frames per second of feed and tick time, each frame through both> frames/s
    fuzz_reader_frames_per_s: <frames per second through the FrameReader alone> frames/s
    fuzz_listener_frames_per_s: <frames per second through Listener.tick> frames/s
    fuzz_bad_frames_dropped: <pieces the reader dropped: bad COBS or CRC, too short, oversize>
    fuzz_actions_started: <actions the fuzz frames started: 0 unless the oracle allowed one>

Exits with a message naming the frame if an invariant breaks: an exception out of feed() or
tick(), an action started that no well-formed START explains, motor power with no action started,
one feed or tick taking over 1 s, a bad frame written by the hub, or the reader disagreeing with
the reference codecs. Generation and the oracle's own work are not timed.
"""

from __future__ import annotations

import argparse
import json
import random
import sys
import time
import traceback
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from fuzz_oracle import (  # noqa: E402
    GOOD_STARTS, HANG_LIMIT_S, HOST_TO_HUB, HUB_TO_HOST, KEYS, KNOWN_ACTIONS, MAX_BODY, MUTATIONS,
    ODD_NUMBERS, ODD_STRINGS, SPECS, Oracle, Watch, WatchedBoard, expected_reading, mutate,
    parse_json, unexplained_starts, valid_hello, watched_actions,
    well_formed_start)

from hub_side import wire  # noqa: E402
from hub_side.listener import Listener  # noqa: E402

DEFAULT_FRAMES = 120_000
SCALARS = ODD_NUMBERS + ODD_STRINGS + [None, True, False, 0, 1, 100, 0.5, "x"]
START_FLAWS = ("action", "param", "param", "unknown_param", "missing", "params_type", "hz")


class Generator:
    """Seeded frames for the fuzz; every START it sends intact is ill-formed."""

    def __init__(self, seed: int, sensors: tuple[str, ...]) -> None:
        self.rng = random.Random(seed)
        self.sensors = sensors
        self.recent: list[bytes] = [valid_hello(1)]

    def seq(self) -> int:
        return self.rng.randrange(0x10000)

    def junk(self, depth: int = 0) -> Any:
        rng = self.rng
        r = rng.random()
        if depth >= 3 or r < 0.4:
            return rng.choice(SCALARS)
        if r < 0.5:
            return rng.uniform(-1e6, 1e6) if rng.random() < 0.5 else rng.randrange(-10**6, 10**6)
        if r < 0.75:
            return [self.junk(depth + 1) for _ in range(rng.randrange(4))]
        return {rng.choice(KEYS): self.junk(depth + 1) for _ in range(rng.randrange(5))}

    def valid_value(self, kind: str, low: Any, high: Any) -> Any:
        rng = self.rng
        if kind == "int":
            return rng.randint(int(low), int(high))
        if kind == "num":
            return rng.choice([low, high, rng.uniform(low, high)])
        if kind == "str":
            return rng.choice(high)
        if kind == "sensor":
            return rng.choice(self.sensors)
        return rng.sample(self.sensors, rng.randint(1, 2))

    def flawed_value(self, kind: str, low: Any, high: Any) -> Any:
        rng = self.rng
        if kind in ("num", "int"):
            past = [low - 1, high + 1, low - 1e-9, True, None, str(low)]
            if kind == "int":
                past.append(low + 0.5)
            return rng.choice(past) if rng.random() < 0.6 else self.junk()
        if kind == "str":
            return rng.choice([high[0].upper(), "", " " + high[0], None, 1])
        if kind == "sensor":
            return rng.choice(["nosuch", self.sensors[0].upper(), None, [self.sensors[0]]])
        return rng.choice(["nosuch", [], list(self.sensors[:3]), None, 7])

    def valid_params(self, name: str) -> dict:
        params = {}
        for key, (kind, default, low, high) in SPECS[name].items():
            if default is None or self.rng.random() < 0.3:
                params[key] = self.valid_value(kind, low, high)
        return params

    def json_frame(self, msg_type: int, obj: Any) -> bytes:
        body = json.dumps(obj).encode()[:MAX_BODY]
        return wire.encode_frame(msg_type, self.seq(), body)

    def flawed_start(self) -> bytes:
        rng = self.rng
        while True:
            name = rng.choice(KNOWN_ACTIONS)
            spec = SPECS[name]
            params: Any = self.valid_params(name)
            msg: dict[str, Any] = {"action": name, "params": params}
            flaw = rng.choice(START_FLAWS)
            if flaw == "action":
                near = ODD_STRINGS + [name.upper(), name + " "]
                msg["action"] = rng.choice(near) if rng.random() < 0.5 else self.junk()
            elif flaw == "param" and spec:
                key = rng.choice(sorted(spec))
                kind, _default, low, high = spec[key]
                params[key] = self.flawed_value(kind, low, high)
            elif flaw == "unknown_param":
                params[rng.choice(KEYS + ["x", ""])] = self.junk()
            elif flaw == "missing" and params:
                del params[rng.choice(sorted(params))]
            elif flaw == "params_type":
                msg["params"] = rng.choice([[], "x", 1, None, [params]])
            elif flaw == "hz":
                msg["telemetry_hz"] = rng.choice([501, -1, 500.0001, True, "100", None, 1e308])
            frame = self.json_frame(wire.START, msg)
            if not self.is_good_start(frame):
                return frame

    def is_good_start(self, frame: bytes) -> bool:
        msg_type, _seq, body = wire.decode_frame(frame[:-1])
        return msg_type == wire.START and well_formed_start(parse_json(body), self.sensors) is not None

    def good_start(self) -> bytes:
        name = self.rng.choice(KNOWN_ACTIONS)
        return self.json_frame(wire.START, {"action": name, "params": self.valid_params(name)})

    def corrupted_good_start(self) -> bytes:
        """A well-formed START, mutated so that it no longer arrives intact (a mutation at the
        very end can leave the frame whole, followed by a stray delimiter or by nothing)."""
        good = self.good_start()
        while True:
            unit = mutate(good, self.mutation_ops())
            if good[:-1] not in unit.split(b"\x00"):
                return unit

    def hello(self) -> bytes:
        msg = {"proto": wire.PROTOCOL_VERSION, "watchdog_ms": 60000, "session": "bench"}
        key = self.rng.choice(["proto", "watchdog_ms", "geometry", "session", "auth"])
        msg[key] = self.junk()
        return self.json_frame(wire.HELLO, msg)

    def mutation_ops(self) -> list[tuple[str, int, int, bytes]]:
        rng = self.rng
        ops = []
        for _ in range(rng.randint(1, 3)):
            kind = rng.choice(MUTATIONS) if rng.random() < 0.9 else "flip"
            extra = bytes(rng.randrange(256) for _ in range(rng.randrange(12)))
            ops.append((kind, rng.randrange(1 << 16), rng.randrange(256), extra))
        return ops

    def frame(self) -> bytes:
        """One unit for the hub, ending in a delimiter."""
        rng = self.rng
        r = rng.random()
        if r < 0.025:
            unit = valid_hello(self.seq())
        elif r < 0.32:
            unit = self.flawed_start()
        elif r < 0.57:
            unit = self.corrupted_good_start()
        elif r < 0.67:
            unit = mutate(rng.choice(self.recent), self.mutation_ops(), rng.choice(self.recent))
        elif r < 0.77:
            msg_type = rng.choice([rng.choice(HOST_TO_HUB), rng.choice(HUB_TO_HOST),
                                   rng.randrange(256)])
            unit = self.json_frame(msg_type, self.junk())
        elif r < 0.85:
            if rng.random() < 0.5:
                unit = self.hello()
            else:
                unit = self.json_frame(rng.choice(HOST_TO_HUB), self.junk())
        elif r < 0.90:
            body = json.dumps(self.junk()).encode()[:MAX_BODY]
            cut = rng.randrange(len(body) + 1)  # broken JSON
            unit = wire.encode_frame(rng.choice(HOST_TO_HUB), self.seq(), body[:cut])
        elif r < 0.95:
            body = bytes(rng.randrange(256) for _ in range(rng.randrange(64)))
            unit = wire.encode_frame(rng.randrange(256), self.seq(), body)
        elif r < 0.997:
            unit = bytes(rng.randrange(256) for _ in range(rng.randrange(1, 200)))
        else:
            unit = bytes([rng.randrange(1, 256)]) * rng.randrange(wire.MAX_ENCODED_BYTES + 1, 3000)
        if 0.67 <= r < 0.90 and self.is_good_start(unit):  # junk can be, by chance, a good START
            unit = self.flawed_start()
        # Corrupted good STARTs stay out of the pool: mutating one again could undo the damage.
        if r < 0.32 or (r >= 0.57 and rng.random() < 0.2):
            self.recent = (self.recent + [unit])[-16:]
        return unit + b"\x00"


def fail(text: str) -> None:
    raise SystemExit("fuzz: invariant broken: " + text)


def reader_pass(stream: bytes, rng: random.Random) -> tuple[float, int]:
    """Feed the stream in random chunks; (seconds spent in feed, pieces dropped)."""
    cuts = sorted(rng.randrange(len(stream) + 1) for _ in range(len(stream) // 256))
    bounds = [0, *cuts, len(stream)]
    chunks = [stream[a:b] for a, b in zip(bounds, bounds[1:])]
    expected, bad, oversize = expected_reading(stream)
    reader = wire.FrameReader()
    frames = []
    spent = 0.0
    for i, chunk in enumerate(chunks):
        start = time.perf_counter()
        try:
            got = reader.feed(chunk)
        except Exception:
            fail("FrameReader.feed raised on chunk %d (%s):\n%s"
                 % (i, chunk.hex(), traceback.format_exc()))
        elapsed = time.perf_counter() - start
        if elapsed > HANG_LIMIT_S:
            fail("feeding chunk %d (%d bytes) took %.2f s" % (i, len(chunk), elapsed))
        spent += elapsed
        frames.extend(got)
    if frames != expected:
        first = next(i for i, (a, b) in enumerate(zip(frames + [None], expected + [None])) if a != b)
        fail("the reader's frame %d differs from the reference: %r vs %r" % (
            first, (frames + [None])[first], (expected + [None])[first]))
    counts = (reader.frames_ok, reader.frames_bad, reader.frames_oversize)
    if counts != (len(expected), bad, oversize):
        fail("reader counts (ok, bad, oversize) %r, reference %r"
             % (counts, (len(expected), bad, oversize)))
    return spent, bad + oversize


def listener_pass(units: list[bytes], sensors: tuple[str, ...]) -> tuple[float, int]:
    """Each unit through one tick; (seconds spent in tick, actions the units started)."""
    oracle = Oracle(sensors)
    allowed = [oracle.allowed_starts(unit)[0] for unit in units]
    watch = Watch()
    board = WatchedBoard(watch)
    hub = Listener(board, robot_id="bench")
    written = bytearray()
    spent = 0.0
    with watched_actions(watch):
        for i, unit in enumerate(units):
            before = len(watch.started)
            board.host_send(unit)
            start = time.perf_counter()
            try:
                wait = hub.tick()
            except Exception:
                fail("Listener.tick raised on frame %d (%s):\n%s"
                     % (i, unit.hex(), traceback.format_exc()))
            elapsed = time.perf_counter() - start
            if elapsed > HANG_LIMIT_S:
                fail("the tick for frame %d took %.2f s (%s)" % (i, elapsed, unit.hex()))
            spent += elapsed
            board.idle_us(max(1, min(wait, 20000)))
            written += board.tx
            board.tx.clear()
            if len(watch.started) != before:
                unexplained = unexplained_starts(watch.started[before:], allowed[i])
                if unexplained:
                    fail("frame %d started %r with no well-formed START after a HELLO (%s)" % (
                        i, unexplained, unit.hex()))
            if watch.moves and not watch.started:
                fail("motor power %r with no action started, at frame %d" % (watch.moves[0], i))
        started = len(watch.started)
        # The instruments work: an intact good START after a STOP starts exactly one action.
        board.host_send(wire.encode_message(wire.STOP, 1, {}) + valid_hello(2)
                        + wire.encode_message(wire.START, 3, GOOD_STARTS["turn"]))
        hub.tick()
        if [n for n, _p in watch.started[started:]] != ["turn"]:
            fail("a good START after the fuzz started %r, not one turn" % (watch.started[started:],))
    reader = wire.FrameReader()
    reader.feed(bytes(written))
    if reader.frames_bad or reader.frames_oversize:
        fail("the hub wrote %d bad frames" % (reader.frames_bad + reader.frames_oversize))
    return spent, started


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--frames", type=int, default=DEFAULT_FRAMES, help="frames to generate")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    if args.frames < 1:
        raise SystemExit("fuzz: --frames must be at least 1")
    sensors = tuple(WatchedBoard(Watch()).sensor_names)
    gen = Generator(args.seed, sensors)
    units = [gen.frame() for _ in range(args.frames)]
    reader_s, dropped = reader_pass(b"".join(units), random.Random(args.seed + 1))
    listener_s, started = listener_pass(units, sensors)
    n = len(units)
    print("fuzz_frames: %d" % n)
    print("fuzz_frames_per_s: %d frames/s" % (n / (reader_s + listener_s)))
    print("fuzz_reader_frames_per_s: %d frames/s" % (n / reader_s))
    print("fuzz_listener_frames_per_s: %d frames/s" % (n / listener_s))
    print("fuzz_bad_frames_dropped: %d" % dropped)
    print("fuzz_actions_started: %d" % started)


if __name__ == "__main__":
    main()
