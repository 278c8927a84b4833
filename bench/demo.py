"""demo_wall_s and demo_realtime_factor: the bundled demo suite (4 cases x 20 runs) on the
simulated robot, stored in a throw-away database, as `trackproof demo` runs it.

Run: python bench/demo.py
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

from harness.cli import DEMO_SUITE
from harness.runner import Runner
from harness.store import Store
from harness.suites import load_suite


def main() -> None:
    with tempfile.TemporaryDirectory() as folder:
        start = time.perf_counter()
        with Store(Path(folder) / "bench.sqlite") as store:
            report = Runner(load_suite(DEMO_SUITE), store).run()
        wall = time.perf_counter() - start
    assert report.passed, "the demo suite should pass"
    print(f"demo_wall_s: {wall:.2f} s")
    print(f"demo_realtime_factor: {report.link_seconds / wall:.0f} x")


if __name__ == "__main__":
    main()
