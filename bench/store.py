"""Results store throughput: telemetry written through finish_run, and one run loaded back.

Run as `python bench/store.py [--dir DIR]`. Each run is 60 s at 200 Hz (12 000 samples, 5
sensors), decoded from batches built by the hub's own TelemetryBatch, recorded with a few
measurements exactly as a runner would. The file goes in a temporary directory inside DIR
(default: the current directory), because that is where results files live; a RAM-backed /tmp
would hide the cost of the fsync each finished run pays.
"""

from __future__ import annotations

import argparse
import math
import tempfile
import time
from pathlib import Path

from harness.store import Store
from harness.telemetry import Telemetry, decode_batches
from recording import synthetic_batches

SENSORS = ("outer_left", "left", "centre", "right", "outer_right")
RATE_HZ = 200
RUN_S = 60
SAMPLES = RATE_HZ * RUN_S
RUNS = 25
LOADS = 20


def build_telemetry() -> Telemetry:
    """One 60 s line-following recording, as the host would have decoded it."""
    return decode_batches(synthetic_batches(SAMPLES, len(SENSORS), 1_000_000 // RATE_HZ), SENSORS)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dir", type=Path, default=Path.cwd(), help="where to put the temporary results file")
    args = parser.parse_args()
    telemetry = build_telemetry()
    if len(telemetry) != SAMPLES:
        raise SystemExit("built %d samples, expected %d" % (len(telemetry), SAMPLES))
    measurements = [("overrun_mm", 80.4, "mm", "robot"), ("overrun_mm", 80.1, "mm", "truth"),
                    ("error_rms_pct", 8.5, "%", "robot")]
    with tempfile.TemporaryDirectory(prefix="trackproof-bench-", dir=args.dir) as tmp:
        with Store(Path(tmp) / "bench.sqlite") as store:
            uid = store.begin_session(suite_name="bench", suite_path="bench.toml", suite_text="", profile_text="",
                                      robot_id="bench", link="sim", seed=1, tool_version="bench")
            writing = 0.0
            run_ids = []
            for rep in range(1, RUNS + 1):
                run_id = store.begin_run(uid, "follow", rep, {"speed_pct": 40})
                start = time.perf_counter()
                store.finish_run(run_id, "pass", {"samples": SAMPLES}, [], measurements, telemetry)
                writing += time.perf_counter() - start
                run_ids.append(run_id)
            store.end_session(uid, "finished")

            best = math.inf
            for k in range(LOADS):
                start = time.perf_counter()
                frame = store.telemetry(run_ids[k % len(run_ids)])
                best = min(best, time.perf_counter() - start)
                if len(frame) != SAMPLES:
                    raise SystemExit("loaded %d samples, expected %d" % (len(frame), SAMPLES))
    print("store_ingest_samples_per_s: %d samples/s" % int(RUNS * SAMPLES / writing))
    print("store_load_run_ms: %.2f ms" % (best * 1000))


if __name__ == "__main__":
    main()
