"""sim_realtime_factor: simulated seconds per wall second for a 60 s line follow, with the real
hub listener, the codec and the host session in the loop (100 Hz control, 100 Hz telemetry).

Run: python bench/sim_speed.py
"""

from __future__ import annotations

import time

from harness.links import SimLink
from harness.session import Session
from harness.sim import Simulation


def main() -> None:
    best = 0.0
    for seed in range(3):
        sim = Simulation.from_files(seed=seed)
        session = Session(SimLink(sim), session_id=f"bench-{seed}")
        session.hello(geometry=sim.profile.geometry())
        params = sim.profile.action_defaults("follow_line", {"time_s": 60.0, "timeout_s": 70.0})
        start_wall = time.perf_counter()
        start_sim = sim.t_us
        record = session.run("follow_line", params, telemetry_hz=100)
        wall = time.perf_counter() - start_wall
        simulated = (sim.t_us - start_sim) / 1e6
        assert record.status == "done" and record.telemetry.dropped == 0, record.result
        best = max(best, simulated / wall)
    print(f"sim_realtime_factor: {best:.0f} x")
    print(f"sim_samples_per_run: {len(record.telemetry)} samples")


if __name__ == "__main__":
    main()
