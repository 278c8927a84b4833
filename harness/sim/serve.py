"""`trackproof sim serve`: the simulated robot behind a new pseudo-terminal, so any suite runs over a
real serial link (pyserial, the real port code) with no hardware."""

from __future__ import annotations

import argparse
import contextlib
import errno
import os
import select
import sys
import threading
from collections.abc import Iterator

from harness.errors import LinkError
from harness.links.base import check_baud
from harness.profile import load_profile
from harness.sim import DEFAULT_COURSE, DEFAULT_PROFILE, Simulation
from harness.sim.course import load_course
from harness.sim.realtime import RealtimeHub, add_sim_routines


@contextlib.contextmanager
def serve_pty(sim: Simulation, baud: int | None = None) -> Iterator[tuple[str, RealtimeHub]]:
    """Serve sim's hub on a new pseudo-terminal; yields (device path, hub) until the block ends."""
    try:
        import tty
    except ImportError:
        raise LinkError("sim serve needs a pseudo-terminal, which this system does not have") from None
    master, slave = os.openpty()
    # Raw at once: a fresh pty echoes, and the hub's first bytes would come back as input.
    tty.setraw(slave)
    os.set_blocking(master, False)

    def send(data: bytes) -> int:
        """Bytes taken: what the pty accepted, or all of them when nobody reads (lost, as on a
        USB port with no host connected)."""
        try:
            return os.write(master, data)
        except BlockingIOError:
            return len(data)
        except OSError as exc:
            if exc.errno != errno.EIO:
                raise
            return len(data)

    hub = RealtimeHub(sim, send, baud=baud)
    stop = threading.Event()

    def pump() -> None:
        while not stop.is_set():
            ready, _, _ = select.select([master], [], [], 0.05)
            if not ready:
                continue
            try:
                data = os.read(master, 4096)
            except (BlockingIOError, InterruptedError):
                continue
            except OSError:
                return
            if data:
                hub.feed(data)

    reader = threading.Thread(target=pump, name="pty-reader", daemon=True)
    try:
        with hub:
            reader.start()
            try:
                # The slave stays open here too, so the pty lives on while hosts come and go.
                yield os.ttyname(slave), hub
            finally:
                stop.set()
                reader.join(timeout=2)
    finally:
        os.close(master)
        os.close(slave)


def serve_on_pty(args: argparse.Namespace) -> int:
    if args.baud is not None:
        check_baud(args.baud, key="--baud")
    profile = load_profile(args.robot or DEFAULT_PROFILE)
    course = load_course(args.course or DEFAULT_COURSE)
    sim = Simulation(course, profile, seed=args.seed)
    if args.secret:
        sim.listener.secret = args.secret
    add_sim_routines(sim)
    with serve_pty(sim, baud=args.baud) as (device, hub):
        pace = f", paced at {args.baud} baud" if args.baud else ""
        print(f"simulated {profile.id} on {course.name}{pace}; link:\n  serial:{device}\n"
              "Stop with Ctrl-C.", flush=True)
        try:
            while hub.error is None:
                threading.Event().wait(0.5)
        except KeyboardInterrupt:
            print("stopped", file=sys.stderr)
            return 0
    raise LinkError(f"the simulated hub stopped: {hub.error!r}")
