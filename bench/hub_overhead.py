"""Cost of telemetry on the hub's control loop, measured on the MicroPython interpreter.

Runs the unchanged listener on the scripted board (tests/hub_script) inside MicroPython
(WebAssembly, via Node): a follow_line of DURATION_S seconds of virtual time with telemetry at
100 Hz and again with telemetry off, timed with MicroPython's own time.ticks_us around the whole
run (that clock only advances in whole milliseconds in the WebAssembly build, too coarse to time
one tick). The scripted board's sensor and motor calls count as part of the tick, as on a hub; its
reflectance sensors hold each reading for 1 ms, so telemetry re-reading them is cheap, as
re-reading a real sensor's latest value is. Modes alternate over several rounds and the fastest
round of each counts, which keeps interpreter warm-up and host noise out of the comparison.

    python bench/hub_overhead.py [--seconds 20] [--rounds 5]

Prints:
    hub_telemetry_overhead_pct: <(on - off) / off * 100> %
    hub_tick_us: <mean wall time of one control tick with telemetry on> us
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
import time
from hub_side import wire
from hub_side.listener import Listener
from hub_script.scripted_board import ScriptedBoard

DURATION_S = %(seconds)d
ROUNDS = %(rounds)d


def one_run(telemetry_hz):
    board = ScriptedBoard(rx_chunk=64)
    hub = Listener(board, robot_id="bench", control_period_us=10000)
    board.host_send(wire.encode_message(wire.HELLO, 1, {"proto": wire.PROTOCOL_VERSION,
                                                          "session": "bench", "watchdog_ms": 60000}))
    board.host_send(wire.encode_message(wire.START, 2, {"action": "follow_line",
        "telemetry_hz": telemetry_hz, "params": {"sensors": ["line_left", "line_right"],
        "speed_pct": 40, "kp": 0.4, "time_s": DURATION_S, "timeout_s": DURATION_S + 10}}))
    # Read the commands and start the action outside the timed part.
    while hub._gen is None:
        board.idle_us(hub.tick())
    ticks = 0
    gc.collect()
    # The loop's own bookkeeping (take_tx, idle_us) is timed too; it is small and the same in
    # both modes.
    t0 = time.ticks_us()
    while hub._gen is not None:
        wait = hub.tick()
        ticks += 1
        board.take_tx()
        board.idle_us(wait if wait else 1)
    return time.ticks_diff(time.ticks_us(), t0), ticks


results = {100: [], 0: []}
for _ in range(ROUNDS):
    for hz in (100, 0):
        results[hz].append(one_run(hz))
for hz in (100, 0):
    best = min(results[hz])
    print("hz=%%d spent_us=%%d ticks=%%d" %% (hz, best[0], best[1]))
"""


def measure(seconds: int, rounds: int) -> dict[int, tuple[int, int]]:
    out = run_micropython(SCRIPT % {"seconds": seconds, "rounds": rounds},
                          [ROOT / "hub_side", ROOT / "tests" / "hub_script"], timeout_s=600)
    rows = {}
    for line in out.splitlines():
        fields = dict(kv.split("=") for kv in line.split())
        rows[int(fields["hz"])] = (int(fields["spent_us"]), int(fields["ticks"]))
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=int, default=20, help="virtual seconds of follow_line per run")
    parser.add_argument("--rounds", type=int, default=5, help="runs per mode; the fastest counts")
    args = parser.parse_args()
    rows = measure(args.seconds, args.rounds)
    on_us, on_ticks = rows[100]
    off_us, off_ticks = rows[0]
    if on_ticks != off_ticks:  # both modes must run the same number of control steps
        raise SystemExit(f"control ticks differ: {on_ticks} with telemetry, {off_ticks} without")
    print(f"hub_telemetry_overhead_pct: {(on_us - off_us) / off_us * 100:.1f} %")
    print(f"hub_tick_us: {on_us / on_ticks:.1f} us")
    print(f"# {on_ticks} control ticks: {on_us} us with telemetry, {off_us} us without",
          file=sys.stderr)


if __name__ == "__main__":
    main()
