from __future__ import annotations

import pytest

from harness.links import SimLink
from harness.session import Session
from harness.sim import Simulation


def connect(seed: int = 1) -> tuple[Simulation, Session]:
    """A simulated robot on the bundled practice course, with a host session that said hello."""
    sim = Simulation.from_files(seed=seed)
    session = Session(SimLink(sim), watchdog_ms=sim.profile.watchdog_ms, session_id=f"test-{seed}")
    session.hello(geometry=sim.profile.geometry(), expect_robot_id=sim.profile.id)
    return sim, session


@pytest.fixture
def sim_session() -> tuple[Simulation, Session]:
    return connect()
