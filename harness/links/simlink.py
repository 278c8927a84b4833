"""The simulated link: real frames to and from the hub listener on the simulated robot, in
virtual time."""

from __future__ import annotations

import math

from harness.links.base import Link
from harness.sim import Simulation


class SimLink(Link):
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
