"""One robot to talk to: opens its link (the simulated robot, or a real one over serial or
Bluetooth LE, optionally through the fault injector) and says hello as its profile says.

The runner, calibration and tuning all reach the robot through this, so they share the same
wrong-robot check, shared secret, watchdog and reconnect behaviour.
"""

from __future__ import annotations

import random
import secrets
import time
from collections.abc import Callable
from pathlib import Path

from harness.errors import InputError, LinkError, TrackproofError
from harness.links import Faults, FaultyLink, Link, LinkSpec, SimLink, parse_link
from harness.operator import Ask, OperatorStopped
from harness.profile import RobotProfile
from harness.session import Session
from harness.sim import Simulation
from harness.sim.course import load_course


def open_real_link(spec: LinkSpec, profile: RobotProfile) -> Link:
    """A serial or Bluetooth LE link to the hub, with the profile's settings."""
    if spec.kind == "serial":
        from harness.links.serial_port import SerialLink, auto_port

        port = auto_port() if spec.target == "auto" else spec.target
        return SerialLink(port, spec.baud or profile.baud)
    from harness.links.ble import BleLink

    return BleLink(spec.target, scan_timeout_s=profile.scan_timeout_s)


class RobotConnector:
    """Opens sessions to one robot. With a sim link it owns the Simulation (truth lives there)."""

    def __init__(self, profile: RobotProfile, link: str = "sim", *, course: Path | None = None,
                 seed: int = 0, faults: Faults | None = None, source: str | None = None,
                 reset_routine: str | None = None,
                 open_link: Callable[[LinkSpec, RobotProfile], Link] = open_real_link) -> None:
        self.profile = profile
        self.reset_routine = reset_routine
        self.link_name = link
        self.spec = parse_link(link)
        self.seed = seed
        self.faults = faults
        self.connections = 0
        self._open_real_link = open_link
        self._fault_rng = random.Random(faults.seed if faults else 0)
        self.sim: Simulation | None = None
        if self.spec.kind == "sim":
            course_path = self.spec.target or course
            if course_path is None:
                raise InputError("the simulated link needs a course: set course in the suite or use "
                                 "--link sim:COURSE", file=source, key="course")
            self.sim = Simulation(load_course(course_path), profile, seed=seed)

    def connect(self) -> Session:
        """A new link and a hello on it; LinkError or ProtocolError if that fails."""
        profile = self.profile
        self.connections += 1
        link = SimLink(self.sim) if self.sim is not None else self._open_real_link(self.spec, profile)
        if self.faults is not None:
            link = FaultyLink(link, self.faults, random.Random(self._fault_rng.getrandbits(32)))
        # Unique per connection: the hub answers a hello or command it has seen (same session id,
        # sequence number and body) from its reply cache without running it again, so a second
        # `trackproof run` with the same seed must not say hello as the first did.
        session = Session(link, watchdog_ms=profile.watchdog_ms, secret=profile.secret or None,
                          session_id=f"run-{self.seed}-{self.connections}-{secrets.token_hex(4)}")
        try:
            hub = session.hello(geometry=profile.geometry(), expect_robot_id=profile.id)
            # Before anything moves: a reset routine the hub lacks would only show after the first run.
            if self.reset_routine and self.reset_routine not in hub.routines:
                raise InputError(f"hub {hub.robot_id} has no routine {self.reset_routine!r} (it has: "
                                 f"{', '.join(hub.routines) or 'none'})", key="--reset")
        except BaseException:
            session.close()
            raise
        return session

    def place_at_start(self, session: Session, ask: Ask, prompt: str, *, can_skip: bool = False) -> bool:
        """Put the robot back at the start before a run. The simulator re-places it; a hub with a
        reset routine (the one asked for, or a simulated hub's sim_reset) drives itself back;
        otherwise the operator does it when the prompt says. False if the operator skips the run."""
        if self.sim is not None:
            self.sim.reset()
            return True
        assert session.hub is not None
        routine = self.reset_routine or ("sim_reset" if "sim_reset" in session.hub.routines else None)
        if routine is not None:
            if routine not in session.hub.routines:
                raise InputError(f"hub {session.hub.robot_id} has no routine {routine!r} (it has: "
                                 f"{', '.join(session.hub.routines) or 'none'})", key="--reset")
            record = session.run(routine, {})
            if record.status != "done":
                raise TrackproofError(f"reset routine {routine} ended {record.status}; nothing concluded")
            return True
        answer = ask(f"{prompt}; Enter to go{', s to skip' if can_skip else ''}, q to quit: ").strip().lower()
        if answer == "q":
            raise OperatorStopped("stopped by the operator; nothing concluded or written")
        return not (can_skip and answer == "s")

    def reconnect(self, lost: Session | None, why: Exception) -> Session:
        """Close the lost session and open a new one, up to the profile's `reconnects` tries."""
        if lost is not None:
            lost.close()
        tries = self.profile.reconnects
        last: Exception = why
        for attempt in range(tries):
            if self.sim is None:
                time.sleep(min(4.0, 0.5 * 2**attempt))  # give a rebooting hub or a radio a moment
            try:
                return self.connect()
            except LinkError as exc:
                last = exc
        raise LinkError(f"link lost and {tries} tries to reconnect failed; last: {last}")
