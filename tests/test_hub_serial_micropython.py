"""The real hub listener on the MicroPython interpreter, over its USB serial link code, behind a
pseudo-terminal, driven by the host's real serial link (pyserial) and session."""

from __future__ import annotations

import os
import select
import subprocess
import threading
import tty
from pathlib import Path

from harness.links.serial_port import SerialLink
from harness.session import Session
from hub_side import wire

from micropython_runner import NODE_DIR, _node

ROOT = Path(__file__).resolve().parent.parent
BRIDGE = NODE_DIR / "serial_bridge.mjs"


def _pump(master: int, hub: subprocess.Popen, stop: threading.Event) -> None:
    """Bytes between the pty (the host's side) and the MicroPython process (the hub's side)."""
    out = hub.stdout.fileno()
    while not stop.is_set():
        ready, _, _ = select.select([master, out], [], [], 0.05)
        if master in ready:
            try:
                data = os.read(master, 4096)
            except OSError:
                return
            hub.stdin.write(data)
            hub.stdin.flush()
        if out in ready:
            try:
                data = os.read(out, 4096)
            except OSError:
                return
            if not data:
                return
            os.write(master, data)


def test_host_runs_an_action_on_a_micropython_hub_over_serial():
    master, slave = os.openpty()
    tty.setraw(slave)
    hub = subprocess.Popen([_node(), str(BRIDGE), "--pkg", str(ROOT / "hub_side"),
                            "--pkg", str(ROOT / "tests" / "hub_script"),
                            str(ROOT / "tests" / "hub_script" / "serial_main.py")],
                           stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    stop = threading.Event()
    pump = threading.Thread(target=_pump, args=(master, hub, stop), daemon=True)
    pump.start()
    link = SerialLink(os.ttyname(slave), 115200)
    sent = bytearray()
    write = link.write
    link.write = lambda data: (sent.extend(data), write(data))[1]  # type: ignore[method-assign]
    try:
        # Node needs a moment to start: a generous reply time, and a session long enough to reach
        # sequence numbers whose bytes include 0x03 (Ctrl-C), which must pass as plain data.
        session = Session(link, session_id="wasm", reply_timeout_s=2.0, watchdog_ms=2000)
        info = session.hello(expect_robot_id="wasm-hub")
        assert info.sensors == ("line_left", "line_right", "side_left", "side_right")
        for _ in range(3):
            assert session.run("stop", {}).status == "done"
        record = session.run("follow_line", {"sensors": ["line_left", "line_right"], "speed_pct": 30,
                                             "kp": 0.4, "time_s": 1.0}, telemetry_hz=50)
    finally:
        link.close()
        stop.set()
        pump.join(timeout=5)
        hub.kill()
        _, err = hub.communicate(timeout=10)
        os.close(master)
        os.close(slave)
    assert record.status == "done", err
    assert 0.95 <= record.result["duration_s"] <= 1.1
    assert record.result["distance_mm"] > 50  # the wheels turned: the move really ran on the hub
    assert record.telemetry.dropped == 0 and len(record.telemetry) == record.result["samples"] >= 45
    assert 3 in sent and wire.PROTOCOL_VERSION == info.proto  # a Ctrl-C byte went through as data
