"""Links: the byte path between the host and a hub, chosen by a string (`sim`, `sim:COURSE`,
`serial:PORT`, `ble:NAME_OR_ADDRESS`).

Every link offers the same small synchronous interface, and its own clock: the simulated link's
clock is virtual, so waiting on it advances the simulation instead of sleeping.
"""

from __future__ import annotations

import math
import time
from abc import ABC, abstractmethod

from harness.errors import InputError, LinkError
from harness.sim import Simulation


class Link(ABC):
    name: str = "link"

    @abstractmethod
    def write(self, data: bytes) -> None:
        """Send bytes to the hub."""

    @abstractmethod
    def read(self, timeout_s: float) -> bytes:
        """Bytes that arrived within timeout_s (returns as soon as any did); b"" if none."""

    def now(self) -> float:
        """Seconds on this link's clock."""
        return time.monotonic()

    def close(self) -> None:
        pass


class SimLink(Link):
    """Real frames to and from the hub listener running on the simulated robot."""

    def __init__(self, sim: Simulation) -> None:
        self.sim = sim
        self.name = "sim"

    def write(self, data: bytes) -> None:
        self.sim.board.rx.extend(data)

    def read(self, timeout_s: float) -> bytes:
        sim = self.sim
        tx = sim.board.tx
        # Round up: a wait shorter than a microsecond must still let virtual time move on.
        end_us = sim.t_us + max(1, math.ceil(timeout_s * 1e6))
        while not tx and sim.t_us < end_us:
            sim.step(end_us - sim.t_us)
        data = bytes(tx)
        tx.clear()
        return data

    def now(self) -> float:
        return self.sim.t_us / 1e6


def parse_link(spec: str) -> tuple[str, str]:
    """('sim' | 'serial' | 'ble', argument) from a link string; InputError if malformed."""
    kind, _, arg = spec.partition(":")
    if kind not in ("sim", "serial", "ble"):
        raise InputError(f"unknown link {spec!r}: expected sim, sim:COURSE, serial:PORT or ble:NAME_OR_ADDRESS",
                         key="--link")
    if kind in ("serial", "ble") and not arg:
        raise InputError(f"link {spec!r} needs a {'port' if kind == 'serial' else 'name or address'}",
                         key="--link")
    return kind, arg


def require_sim(spec: str) -> str:
    """The course argument of a sim link; a clear error for links this version cannot open."""
    kind, arg = parse_link(spec)
    if kind != "sim":
        raise LinkError(f"{kind} links are not available in this version yet; use --link sim")
    return arg
