from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from harness.links import SimLink
from harness.session import Session
from harness.sim import SUITES_DIR, Simulation


def connect(seed: int = 1) -> tuple[Simulation, Session]:
    """A simulated robot on the bundled practice course, with a host session that said hello."""
    sim = Simulation.from_files(seed=seed)
    session = Session(SimLink(sim), watchdog_ms=sim.profile.watchdog_ms, session_id=f"test-{seed}")
    session.hello(geometry=sim.profile.geometry(), expect_robot_id=sim.profile.id)
    return sim, session


@pytest.fixture
def results_in_tmp(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Commands that keep their moves in the default results store (calibrate, tune) write it
    into the test's own folder, not wherever pytest was started."""
    monkeypatch.chdir(tmp_path)
    return tmp_path


@pytest.fixture
def sim_session() -> tuple[Simulation, Session]:
    return connect()


def write_suite(tmp_path: Path, body: str, name: str = "suite.toml") -> Path:
    """A suite file in tmp_path on copies of the bundled robot profile and practice course."""
    for f in ("practice_robot.toml", "practice_course.toml"):
        shutil.copy(SUITES_DIR / f, tmp_path / f)
    path = tmp_path / name
    path.write_text('robot = "practice_robot.toml"\ncourse = "practice_course.toml"\n' + body)
    return path
