"""Cost of telemetry on the hub's control loop, measured on the MicroPython interpreter.

Runs the unchanged listener on the scripted board (tests/hub_script) inside MicroPython
(WebAssembly, via Node): a follow_line of SECONDS of virtual time with telemetry at 100 Hz and
again with telemetry off, the control loop at 100 Hz. Each run is timed as a whole with the host's
high-resolution clock (MicroPython's ticks_us only advances in whole milliseconds in this build).
The scripted board's sensor and motor calls count as part of the tick, as on a hub.

Timings of one process wander by tens of percent (the WebAssembly engine recompiles hot code and
collects garbage at its own times), so runs go in on/off pairs, in alternating order, after
warm-up pairs, and the median pair's ratio counts: it is steady to a few percent from one
invocation to the next. The microsecond figures scale the fastest run without telemetry, and
wander more.

A third figure repeats the pairs with the CRC and COBS replaced by no-ops: the part of the cost
that a checksum and framing done in C could remove, and what would remain.

    python bench/hub_overhead.py [--seconds 5] [--pairs 41]

Prints:
    hub_telemetry_overhead_pct: <(on - off) / off * 100, median pair> %
    hub_telemetry_us_per_sample: <(ratio - 1) x the fastest run without, per sample> us
    hub_tick_us: <wall time of one control tick with telemetry off, fastest run> us
    hub_telemetry_overhead_pct_framing_free: <as the first, CRC and COBS skipped> %
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from micropython_runner import run_micropython  # noqa: E402

SCRIPT = """
import gc
import js
from hub_side import wire
from hub_side.listener import Listener
from hub_script.scripted_board import ScriptedBoard

SECONDS = %(seconds)d
PAIRS = %(pairs)d
WARMUP_PAIRS = 3
CODEC = (wire.crc16, wire.cobs_encode)


def one_run(telemetry_hz, framing_free):
    board = ScriptedBoard(rx_chunk=64)
    hub = Listener(board, robot_id="bench", control_period_us=10000)
    board.host_send(wire.encode_message(wire.HELLO, 1, {"proto": wire.PROTOCOL_VERSION,
                                                          "session": "bench", "watchdog_ms": 60000}))
    board.host_send(wire.encode_message(wire.START, 2, {"action": "follow_line",
        "telemetry_hz": telemetry_hz, "params": {"sensors": ["line_left", "line_right"],
        "speed_pct": 40, "kp": 0.4, "time_s": SECONDS, "timeout_s": SECONDS + 10}}))
    # Read the commands and start the action outside the timed part.
    while hub._gen is None:
        board.idle_us(hub.tick())
    if framing_free:
        wire.crc16 = lambda data, crc=0xFFFF: 0
        wire.cobs_encode = bytes
    ticks = 0
    gc.collect()
    # The loop's own bookkeeping (take_tx, idle_us) is timed too; it is small and the same in
    # both modes.
    t0 = js.performance.now()
    while hub._gen is not None:
        wait = hub.tick()
        ticks += 1
        board.take_tx()
        board.idle_us(wait if wait else 1)
    spent_ms = js.performance.now() - t0
    wire.crc16, wire.cobs_encode = CODEC
    return spent_ms, ticks, hub._sample_index


def median_pair(framing_free):
    pairs = []
    for k in range(WARMUP_PAIRS + PAIRS):
        # Which mode goes first alternates, so any effect of the order cancels out.
        if k %% 2:
            off = one_run(0, framing_free)
            on = one_run(100, framing_free)
        else:
            on = one_run(100, framing_free)
            off = one_run(0, framing_free)
        if on[1] != off[1]:
            raise SystemExit("control ticks differ: %%d with telemetry, %%d without" %% (on[1], off[1]))
        if k >= WARMUP_PAIRS:
            pairs.append((on[0] / off[0], on, off))
    fastest_on = min(pair[1][0] for pair in pairs)
    fastest_off = min(pair[2][0] for pair in pairs)
    pairs.sort(key=lambda pair: pair[0])
    ratio, on, off = pairs[len(pairs) // 2]
    return ratio, fastest_on, fastest_off, off[1], on[2]


for framing_free in (False, True):
    print("framing_free=%%d ratio=%%.4f on_ms=%%.3f off_ms=%%.3f ticks=%%d samples=%%d"
          %% ((framing_free,) + median_pair(framing_free)))
"""


def measure(seconds: int, pairs: int) -> dict[int, dict[str, float]]:
    out = run_micropython(SCRIPT % {"seconds": seconds, "pairs": pairs},
                          [ROOT / "hub_side", ROOT / "tests" / "hub_script"], timeout_s=900)
    rows = {}
    for line in out.splitlines():
        fields = {key: float(value) for key, value in (kv.split("=") for kv in line.split())}
        rows[int(fields.pop("framing_free"))] = fields
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=int, default=5, help="virtual seconds of follow_line per run")
    parser.add_argument("--pairs", type=int, default=41, help="timed on/off pairs per figure; the median counts")
    args = parser.parse_args()
    rows = measure(args.seconds, args.pairs)
    full, free = rows[0], rows[1]
    print(f"hub_telemetry_overhead_pct: {(full['ratio'] - 1) * 100:.1f} %")
    per_sample_us = (full["ratio"] - 1) * full["off_ms"] * 1000 / full["samples"]
    print(f"hub_telemetry_us_per_sample: {per_sample_us:.1f} us")
    print(f"hub_tick_us: {full['off_ms'] * 1000 / full['ticks']:.1f} us")
    print(f"hub_telemetry_overhead_pct_framing_free: {(free['ratio'] - 1) * 100:.1f} %")
    print(f"# {full['ticks']:.0f} control ticks and {full['samples']:.0f} samples a run; fastest runs "
          f"{full['on_ms']:.2f} ms with telemetry, {full['off_ms']:.2f} ms without", file=sys.stderr)


if __name__ == "__main__":
    main()
