"""A synthetic line-following recording for the benchmarks, built by the hub's own TelemetryBatch
exactly as an action sends it (imported by the bench scripts beside this file)."""

from __future__ import annotations

import math

from hub_side import wire


def synthetic_batches(n_samples: int, n_sensors: int, period_us: int) -> list[bytes]:
    """Telemetry batch bodies for n_samples of a plausible run: a wavering controller error,
    steering power that follows it, and reflectance that moves with it."""
    batch = wire.TelemetryBatch(n_sensors)
    bodies = []
    for i in range(n_samples):
        if batch.full():
            bodies.append(batch.body(7400 - i // 10_000))
            batch.reset(i)
        error = 12.0 * math.sin(i * 0.01)
        reflectance = [(30 + int(error) + 15 * k) % 90 + 5 for k in range(n_sensors)]
        batch.add(i * period_us, i // 2, i // 2 + i // 50, (i * 0.003) % 360.0, error,
                  40 + int(error), 40 - int(error), reflectance)
    if batch.count:
        bodies.append(batch.body(7400))
    return bodies
