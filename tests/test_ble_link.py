"""The Bluetooth LE link through bleak's real BleakClient and BleakScanner, over a fake radio.

Only the bleak backend is fake (tests/ble_fake.py); the hubs behind it run the real hub listener
on the simulated robot in wall-clock time, so these tests take real seconds (about 15 in all).
"""

from __future__ import annotations

import gc
import threading
import time
import warnings
from pathlib import Path

import pytest
from bleak.exc import BleakDBusError

from ble_fake import FakeHub, FakeRadio, bluetooth_off
from harness.errors import LinkError
from harness.links.ble import BleHub, BleLink, is_address, scan_hubs
from harness.runner import Runner
from harness.session import Session
from harness.store import Store
from harness.suites import load_suite
from hub_side import wire
from conftest import write_suite

HUB_ADDRESS = "AA:BB:CC:DD:EE:01"


@pytest.fixture
def radio():
    with FakeRadio() as air:
        yield air


def connect(radio: FakeRadio, target: str, **kw) -> BleLink:
    kw.setdefault("scan_timeout_s", 2.0)
    kw.setdefault("connect_timeout_s", 2.0)
    return BleLink(target, client_backend=radio.client_backend, scanner_backend=radio.scanner_backend, **kw)


def hello(link: BleLink, hub: FakeHub) -> Session:
    session = Session(link, watchdog_ms=hub.sim.profile.watchdog_ms, session_id="ble-test")
    session.hello(geometry=hub.sim.profile.geometry(), expect_robot_id=hub.sim.profile.id)
    return session


def record_starts(hub: FakeHub) -> list[str]:
    """The actions the hub is asked to start, decoded from what reaches RX (retransmissions once)."""
    reader, seen, actions = wire.FrameReader(), set(), []

    def on_write(data: bytes) -> None:
        for msg_type, seq, body in reader.feed(data):
            if msg_type == wire.HELLO:
                seen.clear()  # a new session numbers its commands from 1 again
            elif msg_type == wire.START and seq not in seen:
                seen.add(seq)
                actions.append(wire.decode_json(body)["action"])

    hub.on_write.append(on_write)
    return actions


def wait_for(condition, timeout_s: float) -> float:
    """Seconds until condition() held; fails the test after timeout_s."""
    start = time.monotonic()
    while not condition():
        assert time.monotonic() - start < timeout_s, "condition not met in time"
        time.sleep(0.005)
    return time.monotonic() - start


# ------------------------------------------------------------------ finding the hub


def test_target_kinds():
    assert is_address("AA:BB:CC:DD:EE:FF") and is_address("aa:bb:cc:dd:ee:0f")
    assert is_address("3F2504E0-4F89-11D3-9A0C-0305E82C3301")  # a platform device UUID
    assert not is_address(wire.BLE_SERVICE_UUID)  # our service: means "the one hub in range"
    assert not is_address("kestrel-7") and not is_address("AA:BB:CC:DD:EE")


def test_finds_the_hub_by_its_advertised_name(radio):
    radio.add_device("kestrel-7x", "AA:BB:CC:DD:EE:09", rssi=-30)  # a near miss, heard louder
    other = radio.add_hub("kestrel-8", "AA:BB:CC:DD:EE:02", rssi=-40)
    hub = radio.add_hub("kestrel-7", HUB_ADDRESS)
    link = connect(radio, "kestrel-7")
    try:
        assert link.address == HUB_ADDRESS and link.name == "ble:kestrel-7"
        assert hub.central is not None and other.connections == 0
        info = hello(link, hub).hub
        assert info.robot_id == "kestrel-7" and "sim_reset" in info.routines
    finally:
        link.close()
    assert hub.central is None and hub.disconnects == 1


def test_finds_the_hub_by_address_in_any_case(radio):
    radio.add_hub("kestrel-8", "AA:BB:CC:DD:EE:02")
    hub = radio.add_hub("kestrel-7", HUB_ADDRESS)
    link = connect(radio, HUB_ADDRESS.lower())
    try:
        assert link.address == HUB_ADDRESS and hub.connections == 1
        hello(link, hub)
    finally:
        link.close()


@pytest.mark.parametrize("target, words", [("nobody", "named 'nobody'"),
                                           ("AA:BB:CC:DD:EE:77", "with address AA:BB:CC:DD:EE:77")])
def test_nothing_found_is_a_clear_link_error_within_the_timeout(radio, target, words):
    radio.add_hub("kestrel-7", HUB_ADDRESS)
    start = time.monotonic()
    with pytest.raises(LinkError) as caught:
        connect(radio, target, scan_timeout_s=0.4)
    elapsed = time.monotonic() - start
    assert 0.35 < elapsed < 1.5, elapsed
    assert str(caught.value) == (f"no Bluetooth LE hub {words} advertising the trackproof service within 0.4 s; "
                                 "is it on and advertising? `trackproof links --ble` lists what is in range")


def test_a_hub_already_connected_elsewhere_is_not_found(radio):
    hub = radio.add_hub("kestrel-7", HUB_ADDRESS)
    first = connect(radio, "kestrel-7")
    try:
        # A connected hub stops advertising, so a second host cannot find it.
        with pytest.raises(LinkError, match="no Bluetooth LE hub named 'kestrel-7'"):
            connect(radio, "kestrel-7", scan_timeout_s=0.3)
        assert hub.connections == 1
    finally:
        first.close()


def test_a_device_without_our_service_is_refused_and_released(radio):
    device = radio.add_device("kestrel-7", "AA:BB:CC:DD:EE:05")
    with pytest.raises(LinkError, match=r"kestrel-7 \(AA:BB:CC:DD:EE:05\) does not offer the trackproof "
                                        r"byte-pipe service \(no RX or TX characteristic\)"):
        connect(radio, "kestrel-7")
    assert device.connections == 1 and device.central is None  # connected, looked, let go


@pytest.mark.parametrize("error, words", [
    (bluetooth_off(), "Bluetooth is not available (looking for kestrel-7): the Bluetooth radio is off; turn it on"),
    # What dbus-fast raises with no system bus at all (TECH-NOTES §1): an OSError, not a BleakError.
    (FileNotFoundError(2, "No such file or directory"), "no D-Bus system bus"),
    # With a system bus but no BlueZ on it (seen with a throwaway dbus-daemon, TECH-NOTES §1).
    (BleakDBusError("org.freedesktop.DBus.Error.ServiceUnknown",
                    ["The name org.bluez was not provided by any .service files"]),
     "BlueZ, the Linux Bluetooth service, is not running"),
    (BleakDBusError("org.bluez.Error.NotReady", ["Resource Not Ready"]), "the Bluetooth adapter is off"),
])
def test_bluetooth_unavailable_is_a_link_error(radio, error, words):
    radio.add_hub("kestrel-7", HUB_ADDRESS)
    radio.scan_error = error
    with pytest.raises(LinkError) as caught:
        connect(radio, "kestrel-7")
    assert words in str(caught.value)
    with pytest.raises(LinkError, match="scanning for hubs"):
        scan_hubs(0.2, scanner_backend=radio.scanner_backend)


def test_the_platform_backend_fails_as_a_link_error():
    # This machine's own Bluetooth stack: absent here (no D-Bus), present on a developer's laptop,
    # where no hub of this name is in range. Either way a LinkError, never a traceback.
    with pytest.raises(LinkError):
        BleLink("trackproof-test-no-such-hub", scan_timeout_s=0.5, connect_timeout_s=0.5)
    assert not [t for t in threading.enumerate() if t.name.startswith("ble-")]


def test_auto_takes_the_one_hub_and_refuses_to_guess_between_two(radio):
    radio.add_device("band", "AA:BB:CC:DD:EE:09", rssi=-30)
    hub = radio.add_hub("kestrel-7", HUB_ADDRESS)
    link = connect(radio, "auto", scan_timeout_s=0.3)
    try:
        assert link.address == HUB_ADDRESS
    finally:
        link.close()
    radio.add_hub("kestrel-8", "AA:BB:CC:DD:EE:02")
    with pytest.raises(LinkError, match=r"more than one hub .*kestrel-7 \(AA:BB:CC:DD:EE:01\).*kestrel-8"):
        connect(radio, wire.BLE_SERVICE_UUID, scan_timeout_s=0.3)
    assert hub.connections == 1


def test_scan_lists_only_advertising_hubs_strongest_first(radio):
    radio.add_device("band", "AA:BB:CC:DD:EE:09", rssi=-30)  # loudest, but not ours
    radio.add_hub("far", "AA:BB:CC:DD:EE:03", rssi=-80)
    radio.add_hub("near", "AA:BB:CC:DD:EE:02", rssi=-45)
    busy = radio.add_hub("busy", "AA:BB:CC:DD:EE:04", rssi=-35)
    link = connect(radio, "busy")  # a connected hub does not advertise
    try:
        hubs = scan_hubs(0.3, scanner_backend=radio.scanner_backend)
    finally:
        link.close()
    assert hubs == [BleHub("near", "AA:BB:CC:DD:EE:02", -45), BleHub("far", "AA:BB:CC:DD:EE:03", -80)]
    assert busy.disconnects == 1


# ------------------------------------------------------------------ carrying frames


def test_a_run_over_a_small_mtu_arrives_complete(radio):
    hub = radio.add_hub("kestrel-7", HUB_ADDRESS)  # MTU 23: 20 bytes a notification or write
    link = connect(radio, "kestrel-7")
    try:
        session = hello(link, hub)
        params = hub.sim.profile.action_defaults("follow_line", {"junctions": 1, "side": "any", "overrun_mm": 30})
        record = session.run("follow_line", params)
    finally:
        link.close()
    assert record.status == "done"
    assert record.telemetry.dropped == 0 and len(record.telemetry) == record.result["samples"] > 100
    assert record.frames_lost == 0
    # Frames really were split: every notification and write at most 20 bytes, most exactly 20.
    assert max(hub.notifications) == 20 and hub.notifications.count(20) > len(hub.notifications) / 2
    sizes = [size for _, size, _ in hub.writes]
    assert max(sizes) == 20 and sizes.count(20) >= 5  # the hello alone is several writes


def test_writes_follow_the_size_allowed_at_each_moment(radio):
    hub = radio.add_hub("kestrel-7", HUB_ADDRESS, mtu=185, mtu_exchange_s=0.3)
    link = connect(radio, "kestrel-7")
    try:
        link.write(bytes(50))  # before the MTU exchange: 20-byte pieces
        assert [size for _, size, _ in hub.writes] == [20, 20, 10]
        wait_for(lambda: hub.central.mtu_now == 185, 1.0)  # the exchange finished
        link.write(bytes(400))  # after it: MTU 185 allows 182
        assert [size for _, size, _ in hub.writes[3:]] == [182, 182, 36]
        session = hello(link, hub)
        record = session.run("turn", {"angle_deg": 30, "mode": "spin", "speed_pct": 40, "using": "gyro"})
    finally:
        link.close()
    assert record.status == "done" and record.telemetry.dropped == 0
    assert all(size <= limit for _, size, limit in hub.writes)
    assert 20 < max(hub.notifications) <= 182


def test_a_peripheral_drop_mid_run_is_a_lost_link_and_the_watchdog_stops_the_robot(radio):
    hub = radio.add_hub("kestrel-7", HUB_ADDRESS)
    robot = hub.sim.robot
    link = connect(radio, "kestrel-7")
    session = hello(link, hub)
    threading.Timer(0.6, hub.drop).start()
    params = hub.sim.profile.action_defaults("follow_line", {"time_s": 4.0})
    try:
        with pytest.raises(LinkError, match="Bluetooth LE link to kestrel-7 lost"):
            session.run("follow_line", params)
        assert hub.dropped_at is not None and time.monotonic() - hub.dropped_at < 0.3
        assert robot.power != (0.0, 0.0)  # the session's stop could not get through: still driving
        with pytest.raises(LinkError, match="lost"):
            link.write(b"\x00")
        wait_for(lambda: robot.power == (0.0, 0.0), 2.0)
        stopped_after_s = time.monotonic() - hub.dropped_at
    finally:
        link.close()
    # The hub's watchdog stopped the motors: the host's last ping came at most a quarter of the
    # watchdog time before the drop, and nothing reached the hub after it.
    watchdog_s = hub.sim.profile.watchdog_ms / 1000
    assert watchdog_s * 0.75 - 0.05 < stopped_after_s < watchdog_s + 0.3, stopped_after_s
    assert not [t for t, _, _ in hub.writes if t > hub.dropped_at]


def test_a_waiting_read_wakes_up_when_the_peripheral_drops(radio):
    hub = radio.add_hub("kestrel-7", HUB_ADDRESS)
    link = connect(radio, "kestrel-7")
    try:
        hello(link, hub)  # then the idle hub sends nothing: only the drop can end the wait
        threading.Timer(0.2, hub.drop).start()
        start = time.monotonic()
        with pytest.raises(LinkError, match=r"^Bluetooth LE link to kestrel-7 lost \(out of range"):
            link.read(3.0)
        assert time.monotonic() - start < 0.5
    finally:
        link.close()


# ------------------------------------------------------------------ the runner over Bluetooth LE


def ble_runner(radio: FakeRadio, tmp_path: Path, body: str, store: Store) -> Runner:
    suite = load_suite(write_suite(tmp_path, 'reset = "sim"\n' + body))
    return Runner(suite, store, link="ble:kestrel-7", confirm=False,
                  open_link=lambda spec, suite: connect(radio, spec.target))


def test_the_runner_runs_a_suite_over_ble(radio, tmp_path):
    hub = radio.add_hub("kestrel-7", HUB_ADDRESS)
    starts = record_starts(hub)
    body = ('name = "ble turns"\nrepeat = 2\n[[cases]]\nname = "quarter"\naction = "turn"\n'
            'params = { angle_deg = 45, mode = "spin", speed_pct = 40, using = "gyro" }\n'
            'expect = { angle_error_deg = { mean_abs_max = 5.0 } }\n')
    with Store(tmp_path / "r.sqlite") as store:
        report = ble_runner(radio, tmp_path, body, store).run()
        runs = store.runs(report.uid)
        sessions = store.sessions()
    assert report.status == "finished" and report.passed
    assert [r.status for r in report.cases[0].runs] == ["pass", "pass"]
    assert list(runs["status"]) == ["pass", "pass"]
    assert sessions.loc[sessions["uid"] == report.uid, "link"].item() == "ble:kestrel-7"
    assert starts == ["sim_reset", "turn", "sim_reset", "turn"]  # reset = "sim" through the hub's routine
    assert hub.connections == 1 and hub.central is None


def test_the_runner_marks_a_dropped_run_link_lost_and_reconnects(radio, tmp_path):
    hub = radio.add_hub("kestrel-7", HUB_ADDRESS)
    starts = record_starts(hub)

    timers: list[threading.Timer] = []

    def drop_during_second_follow(data: bytes) -> None:
        if starts.count("follow_line") == 2 and not timers:
            timers.append(threading.Timer(0.3, hub.drop))
            timers[0].start()

    hub.on_write.append(drop_during_second_follow)
    body = ('name = "ble follow"\nrepeat = 3\n[[cases]]\nname = "follow a second"\naction = "follow_line"\n'
            'params = { time_s = 1.0 }\n')
    with Store(tmp_path / "r.sqlite") as store:
        report = ble_runner(radio, tmp_path, body, store).run()
        runs = store.runs(report.uid)
    assert report.status == "finished"
    assert [r.status for r in report.cases[0].runs] == ["pass", "link_lost", "pass"]
    assert list(runs["status"]) == ["pass", "link_lost", "pass"]
    assert "Bluetooth LE link to kestrel-7 lost" in report.cases[0].runs[1].note
    assert hub.connections == 2 and hub.central is None
    assert starts.count("follow_line") == 3


# ------------------------------------------------------------------ closing


def test_close_leaves_no_thread_task_or_warning(radio, caplog):
    hub = radio.add_hub("kestrel-7", HUB_ADDRESS)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for drop_first in (False, True):
            link = connect(radio, "kestrel-7")
            hello(link, hub)
            if drop_first:
                hub.drop()
                wait_for(lambda: hub.central is None, 1.0)
            link.close()
            link.close()  # twice is harmless
            with pytest.raises(LinkError, match="closed" if not drop_first else "lost|closed"):
                link.read(0.01)
        gc.collect()
    assert not [t for t in threading.enumerate() if t.name.startswith("ble-")]
    assert not [w for w in caught if issubclass(w.category, (RuntimeWarning, ResourceWarning))]
    assert not [r for r in caplog.records if r.name.startswith("asyncio")]
