"""One robot to talk to: opens its link (the simulated robot, or a real one over serial or
Bluetooth LE, optionally through the fault injector) and says hello as its profile says.

The runner, calibration and tuning all reach the robot through this, so they share the same
wrong-robot check, shared secret, watchdog and reconnect behaviour.
"""

from __future__ import annotations

import random
import time
from collections.abc import Callable
from pathlib import Path

from harness.errors import InputError, LinkError
from harness.links import Faults, FaultyLink, Link, LinkSpec, SimLink, parse_link
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
                 open_link: Callable[[LinkSpec, RobotProfile], Link] = open_real_link) -> None:
        self.profile = profile
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
        session = Session(link, watchdog_ms=profile.watchdog_ms, secret=profile.secret or None,
                          session_id=f"run-{self.seed}-{self.connections}")
        try:
            session.hello(geometry=profile.geometry(), expect_robot_id=profile.id)
        except BaseException:
            session.close()
            raise
        return session

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
