"""The simulated robot in wall-clock time, behind a real link (a pseudo-terminal or a Bluetooth LE
fake), for `trackproof sim serve` and the link tests.

A thread steps the simulation to keep pace with the wall clock, hands it the bytes the host sent,
and passes the hub's output on no faster than the baud rate allows, the way a UART would. The
hub's transmit buffer is bounded like a real one, so a link too slow for the telemetry rate makes
the hub drop telemetry batches (which the host counts) instead of falling behind.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable

from harness.sim import Simulation

DEFAULT_TX_BUFFER_BYTES = 2048  # what the hub can queue for the link (common for a UART or USB CDC buffer)
_LOOP_S = 0.0005


def add_sim_routines(sim: Simulation) -> None:
    """Routines only a simulated hub has: `sim_reset` re-places the robot at the course start
    (with placement error), so suites whose reset is `sim` also run over a real link."""

    @sim.listener.routine("sim_reset")
    def sim_reset(ctx, params):
        sim.reset()
        return {"placed": True}
        yield  # a routine is a generator; this one finishes at once

    del sim_reset


class RealtimeHub:
    def __init__(self, sim: Simulation, send: Callable[[bytes], int], *, baud: int | None = None,
                 tx_buffer_bytes: int = DEFAULT_TX_BUFFER_BYTES) -> None:
        self.sim = sim
        self.send = send
        self.baud = baud
        sim.board.tx_capacity_bytes = tx_buffer_bytes
        self._incoming = bytearray()
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.error: BaseException | None = None

    def feed(self, data: bytes) -> None:
        """Bytes from the host (any thread)."""
        with self._lock:
            self._incoming += data

    def start(self) -> RealtimeHub:
        self._thread = threading.Thread(target=self._run, name="sim-hub", daemon=True)
        self._thread.start()
        return self

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)

    def __enter__(self) -> RealtimeHub:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def _run(self) -> None:
        try:
            self._loop()
        except BaseException as exc:  # kept for whoever runs the hub, who reports it
            self.error = exc

    def _loop(self) -> None:
        sim, board = self.sim, self.sim.board
        start_wall, start_us = time.perf_counter(), sim.t_us
        last = start_wall
        credit = 0.0
        while not self._stop.is_set():
            now = time.perf_counter()
            with self._lock:
                if self._incoming:
                    board.rx.extend(self._incoming)
                    self._incoming.clear()
            target_us = start_us + int((now - start_wall) * 1e6)
            while sim.t_us < target_us:
                sim.step(target_us - sim.t_us)
            tx = board.tx
            if self.baud:
                # 10 bits a byte on the wire (start, 8 data, stop); a short burst may queue up.
                rate = self.baud / 10.0
                credit = min(credit + (now - last) * rate, 64 + rate * 0.002)
                count = min(len(tx), int(credit))
                credit -= count
            else:
                count = len(tx)
            if count:
                # send() says how much it took; the rest stays queued, so link_room() feels it.
                del tx[: self.send(bytes(tx[:count]))]
            last = now
            time.sleep(_LOOP_S)
