"""Two `trackproof run`s of the same suite and seed, one after the other, against one hub that
keeps running (`trackproof sim serve`, as a hub on native USB does): the second run's resets must
be carried out, not answered from the hub's reply cache as retransmissions of the first run's.

The hub is the real listener in wall-clock time behind a real pseudo-terminal, reached with the
real serial link. (Found by a user: every second session's first run started where the last
session had left the robot, because both said hello with the same session id.)"""

from __future__ import annotations

import time

from harness.robot import RobotConnector
from harness.runner import Runner
from harness.sim import DEFAULT_COURSE, Simulation
from harness.sim.realtime import add_sim_routines
from harness.sim.serve import serve_pty
from harness.store import Store
from harness.suites import load_suite

from conftest import write_suite

_BETWEEN_HOSTS_S = 0.3  # two command runs are a process start apart
_START_TOLERANCE_MM = 10.0  # the course's placement error is 1.5 mm (sd)


def _served_sim(seed: int) -> tuple[Simulation, list[float]]:
    """A simulation with the sim routines; the list gets the robot's x after each re-placement."""
    sim = Simulation.from_files(seed=seed)
    add_sim_routines(sim)
    placed_x: list[float] = []
    reset = sim.reset

    def recording_reset() -> None:
        reset()
        placed_x.append(sim.robot.pose.x_mm)

    sim.reset = recording_reset  # the routine looks sim.reset up when it runs
    return sim, placed_x


def test_suite_sessions_one_after_another_each_start_from_the_reset_pose(tmp_path):
    suite = load_suite(write_suite(tmp_path, 'seed = 4\n[[cases]]\nname = "s"\naction = "drive_straight"\n'
                                             'reset = "sim"\nparams = { distance_mm = 150, speed_pct = 60 }\n'
                                             'repeat = 2\n'))
    sim, placed_x = _served_sim(seed=8)
    start_x = sim.course.start.x_mm
    with serve_pty(sim) as (device, hub), Store(tmp_path / "r.sqlite") as store:
        for session_number in range(2):
            report = Runner(suite, store, link=f"serial:{device}").run()
            assert report.status == "finished"
            assert [r.status for r in report.cases[0].runs] == ["pass", "pass"], session_number
            time.sleep(_BETWEEN_HOSTS_S)
        assert hub.error is None
    # Every run of both sessions began with a reset the hub really did, at the course start.
    assert len(placed_x) == 4, placed_x
    assert all(abs(x - start_x) < _START_TOLERANCE_MM for x in placed_x), placed_x


def test_each_connection_says_hello_with_its_own_session_id():
    sim = Simulation.from_files(seed=4)
    ids = [RobotConnector(sim.profile, "sim", course=DEFAULT_COURSE, seed=4).connect().session_id for _ in range(3)]
    assert len(set(ids)) == 3 and all(i.startswith("run-4-1-") for i in ids)
