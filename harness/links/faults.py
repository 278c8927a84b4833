"""A fault-injecting wrapper around any link, for rehearsal and tests: `--link-faults SPEC`.

SPEC is a comma list of key=value:

    corrupt=P          damage: one byte of a frame gets random bits flipped
    drop=P             loss: one byte of a frame vanishes (the frame fails its CRC, or two merge)
    duplicate=P        the whole frame arrives twice (commands must not run twice)
    delay_ms=MS        every chunk arrives MS milliseconds late
    disconnect_after=N the link is lost after N bytes in either direction (each connection)
    per=frame|byte     what P is the chance of, per 0x00-delimited frame (default) or per byte
    seed=N             the faults' own random seed (default 0)

Faults apply in both directions. Rates are per frame by default, not per byte, on purpose: at
5 % per byte a 300-byte telemetry frame would arrive whole once in four million tries, which no
framed protocol without forward error correction survives, and real USB and Bluetooth LE links
guard their bytes with their own checks and lose whole packets instead. `per=byte` is there to
show what that looks like: every run ends `link_lost`, and nothing is ever wrongly accepted.
"""

from __future__ import annotations

import random
from dataclasses import dataclass

from harness.errors import InputError, LinkError
from harness.links.base import Link


@dataclass(frozen=True)
class Faults:
    corrupt: float = 0.0
    drop: float = 0.0
    duplicate: float = 0.0
    delay_ms: float = 0.0
    disconnect_after: int = 0
    per: str = "frame"
    seed: int = 0

    def __str__(self) -> str:
        return ",".join(f"{k}={v}" for k, v in vars(self).items() if v != getattr(Faults, k))


def parse_faults(text: str) -> Faults:
    """Faults from a SPEC string; InputError naming the item that is wrong."""
    values: dict[str, float | int | str] = {}
    for item in filter(None, (part.strip() for part in text.split(","))):
        key, sep, raw = item.partition("=")
        where = repr(item)  # the key (--link-faults) is named by the error itself
        if not sep or key not in Faults.__dataclass_fields__:
            raise InputError(f"{where}: expected key=value with key one of "
                             f"{', '.join(Faults.__dataclass_fields__)}", key="--link-faults")
        if key in values:
            raise InputError(f"{where}: {key} given twice", key="--link-faults")
        if key == "per":
            if raw not in ("frame", "byte"):
                raise InputError(f"{where}: per must be frame or byte", key="--link-faults")
            values[key] = raw
            continue
        try:
            number = int(raw) if key in ("disconnect_after", "seed") else float(raw)
        except ValueError:
            raise InputError(f"{where}: {raw!r} is not a number", key="--link-faults") from None
        if key in ("corrupt", "drop", "duplicate") and not 0.0 <= number <= 1.0:
            raise InputError(f"{where}: a chance must be between 0 and 1", key="--link-faults")
        if key in ("delay_ms", "disconnect_after") and number < 0:
            raise InputError(f"{where}: must not be negative", key="--link-faults")
        values[key] = number
    return Faults(**values)  # type: ignore[arg-type]


class FaultyLink(Link):
    """Wraps a link and damages what passes through it, as `faults` says."""

    def __init__(self, inner: Link, faults: Faults, rng: random.Random) -> None:
        self.inner = inner
        self.faults = faults
        self.name = f"{inner.name} with faults {faults}"
        self._rng = rng
        self._passed = 0
        self._lost = False
        self._partial = {"out": bytearray(), "in": bytearray()}  # frame mode: bytes before a 0x00
        self._late: list[tuple[float, str, bytes]] = []  # (due, direction, bytes)
        self._arrived = bytearray()  # from the hub, due, not yet read
        self.injected = {"corrupt": 0, "drop": 0, "duplicate": 0}

    def now(self) -> float:
        return self.inner.now()

    def close(self) -> None:
        self.inner.close()

    def write(self, data: bytes) -> None:
        self._check()
        self._pass("out", data)
        self._release_due()

    def read(self, timeout_s: float) -> bytes:
        self._check()
        end = self.now() + timeout_s
        while True:
            self._release_due()
            if self._arrived:
                got = bytes(self._arrived)
                self._arrived.clear()
                return got
            wait = max(0.0, end - self.now())
            if self._late:
                wait = min(wait, max(0.0, self._late[0][0] - self.now()))
            data = self.inner.read(wait)
            if data:
                self._pass("in", data)
            elif self.now() >= end:
                self._release_due()
                got = bytes(self._arrived)
                self._arrived.clear()
                return got

    # ------------------------------------------------------------ damage

    def _check(self) -> None:
        if self._lost:
            raise LinkError(f"link lost (injected: disconnected after {self.faults.disconnect_after} bytes)")

    def _pass(self, direction: str, data: bytes) -> None:
        limit = self.faults.disconnect_after
        if limit:
            room = limit - self._passed
            if len(data) >= room:
                data = data[: max(0, room)]
                self._lost = True
        self._passed += len(data)
        damaged = self._damage_bytes(data) if self.faults.per == "byte" else self._damage_frames(direction, data)
        if damaged:
            self._late.append((self.now() + self.faults.delay_ms / 1000.0, direction, damaged))

    def _damage_bytes(self, data: bytes) -> bytes:
        f, rng, out = self.faults, self._rng, bytearray()
        for byte in data:
            if rng.random() < f.drop:
                self.injected["drop"] += 1
                continue
            if rng.random() < f.corrupt:
                self.injected["corrupt"] += 1
                byte ^= rng.randrange(1, 256)
            out.append(byte)
            if rng.random() < f.duplicate:
                self.injected["duplicate"] += 1
                out.append(byte)
        return bytes(out)

    def _damage_frames(self, direction: str, data: bytes) -> bytes:
        partial = self._partial[direction]
        partial += data
        end = partial.rfind(0)
        if end < 0:
            return b""
        frames = bytes(partial[: end + 1]).split(b"\x00")[:-1]
        del partial[: end + 1]
        f, rng, out = self.faults, self._rng, bytearray()
        for frame in frames:
            frame = bytearray(frame + b"\x00")
            if rng.random() < f.drop:
                self.injected["drop"] += 1
                del frame[rng.randrange(len(frame))]
            if rng.random() < f.corrupt and frame:
                self.injected["corrupt"] += 1
                frame[rng.randrange(len(frame))] ^= rng.randrange(1, 256)
            out += frame
            if rng.random() < f.duplicate:
                self.injected["duplicate"] += 1
                out += frame
        return bytes(out)

    def _release_due(self) -> None:
        """Deliver what is due: bytes for the hub are written, bytes from it wait for read()."""
        now, keep = self.now(), []
        for due, direction, data in self._late:
            if due > now:
                keep.append((due, direction, data))
            elif direction == "out":
                self.inner.write(data)
            else:
                self._arrived += data
        self._late = keep
