"""The link interface: the byte path between the host and one hub, chosen by a link string.

    sim | sim:COURSE             the simulated robot in this process, in virtual time
    serial:PORT | serial:PORT@BAUD   USB serial (or any pyserial URL, e.g. socket://host:port);
                                 PORT auto: the one likely hub `trackproof links` shows
    ble:NAME_OR_ADDRESS          Bluetooth LE, our byte-pipe service; ble:auto takes the one
                                 hub advertising it

Every link offers the same small synchronous interface and its own clock: the simulated link's
clock is virtual, so waiting on it advances the simulation instead of sleeping. A link that is
lost raises LinkError from read() or write(); the runner then opens a new one.
"""

from __future__ import annotations

import time
from abc import ABC, abstractmethod
from dataclasses import dataclass

from harness.errors import InputError

KINDS = ("sim", "serial", "ble")


class Link(ABC):
    name: str = "link"

    @abstractmethod
    def write(self, data: bytes) -> None:
        """Send bytes to the hub; LinkError if the link is lost."""

    @abstractmethod
    def read(self, timeout_s: float) -> bytes:
        """Bytes that arrived within timeout_s (returns as soon as any did); b"" if none.
        LinkError if the link is lost."""

    def now(self) -> float:
        """Seconds on this link's clock."""
        return time.monotonic()

    def close(self) -> None:
        pass


@dataclass(frozen=True)
class LinkSpec:
    kind: str  # sim, serial or ble
    target: str  # course file, port, or BLE name or address ("" for the default course)
    baud: int | None = None

    def __str__(self) -> str:
        text = f"{self.kind}:{self.target}" if self.target else self.kind
        return f"{text}@{self.baud}" if self.baud else text


def parse_link(spec: str) -> LinkSpec:
    """A link string parsed; InputError naming what is wrong if malformed."""
    kind, _, target = spec.partition(":")
    if kind not in KINDS:
        raise InputError(f"unknown link {spec!r}: expected sim, sim:COURSE, serial:PORT[@BAUD] or "
                         "ble:NAME_OR_ADDRESS", key="--link")
    if kind in ("serial", "ble") and not target:
        raise InputError(f"link {spec!r} needs a {'port' if kind == 'serial' else 'name or address'}",
                         key="--link")
    baud = None
    if kind == "serial" and "@" in target:
        port, _, text = target.rpartition("@")
        if not text.isdigit() or not port:
            raise InputError(f"link {spec!r}: expected serial:PORT@BAUD with a whole-number baud rate",
                             key="--link")
        target, baud = port, int(text)
        check_baud(baud, key="--link")
    return LinkSpec(kind, target, baud)


def check_baud(baud: int, key: str) -> None:
    # 1200 baud is refused on purpose: closing a port at 1200 baud reboots many boards into
    # their bootloader (the "1200-baud touch", common practice in USB CDC firmware).
    if not 2400 <= baud <= 4_000_000:
        why = " (1200 would reboot many boards into their bootloader)" if 0 < baud < 2400 else ""
        raise InputError(f"baud rate {baud} is out of range 2400..4000000{why}", key=key)
