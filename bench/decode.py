"""Telemetry decoding throughput: the vectorised host decoder against the codec's plain one.

Run as `python bench/decode.py`. Batches are built by the hub's own TelemetryBatch, 32 samples
and 4 sensors each, as an action would send them. Prints samples per second, best of a few runs.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable

from harness.telemetry import decode_batches
from hub_side import wire
from recording import synthetic_batches

SENSORS = ("left_outer", "left", "right", "right_outer")
SAMPLES = 2_000_000
PLAIN_SAMPLES = 200_000  # the plain decoder is far slower; keep its run to a few seconds
SAMPLE_PERIOD_US = 5_000
REPEATS = 5


def decode_plain(bodies: list[bytes]) -> int:
    return sum(len(wire.unpack_telemetry(body)[4]) for body in bodies)


def decode_vectorised(bodies: list[bytes]) -> int:
    return len(decode_batches(bodies, SENSORS))


def best_rate(decode: Callable[[list[bytes]], int], bodies: list[bytes], n_samples: int) -> int:
    """Samples per second of the fastest of REPEATS runs (the least disturbed by other load)."""
    best = math.inf
    for _ in range(REPEATS):
        start = time.perf_counter()
        decoded = decode(bodies)
        best = min(best, time.perf_counter() - start)
        if decoded != n_samples:
            raise SystemExit("decoded %d samples, expected %d" % (decoded, n_samples))
    return int(n_samples / best)


def main() -> None:
    bodies = synthetic_batches(SAMPLES, len(SENSORS), SAMPLE_PERIOD_US)
    print("decode_samples_per_s: %d samples/s" % best_rate(decode_vectorised, bodies, SAMPLES))
    plain = bodies[: PLAIN_SAMPLES // wire.MAX_BATCH_SAMPLES]
    print("decode_plain_samples_per_s: %d samples/s" % best_rate(decode_plain, plain, PLAIN_SAMPLES))


if __name__ == "__main__":
    main()
