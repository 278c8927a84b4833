"""The vectorised telemetry decoder (harness.telemetry) against the codec's plain decoder."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from harness import telemetry
from hub_side import wire

SENSORS = ("left", "centre", "right", "rear", "s5", "s6", "s7", "s8")


def make_batch(first_index: int, n: int, n_sensors: int, battery_mv: int = 7400, t0_us: int = 0) -> bytes:
    """A batch of n samples whose values are easy to tell apart (derived from the index)."""
    batch = wire.TelemetryBatch(n_sensors)
    batch.reset(first_index)
    for k in range(n):
        i = first_index + k
        batch.add(t0_us + 10_000 * k, i, -2 * i, i / 7, -i / 3, i % 101 - 50, 50 - i % 101,
                  [(i + s) % 101 for s in range(n_sensors)])
    return batch.body(battery_mv)


def consecutive_batches(total: int, per_batch: int, n_sensors: int) -> list[bytes]:
    return [
        make_batch(start, min(per_batch, total - start), n_sensors, t0_us=start * 10_000)
        for start in range(0, total, per_batch)
    ]


@st.composite
def recordings(draw):
    """Random batches with random field values, consecutive indices, as the hub would send them."""
    n_sensors = draw(st.integers(0, wire.MAX_SENSORS))
    sizes = draw(st.lists(st.integers(0, wire.MAX_BATCH_SAMPLES), max_size=6))
    index = draw(st.integers(0, 10_000))
    bodies = []
    for size in sizes:
        batch = wire.TelemetryBatch(n_sensors)
        batch.reset(index)
        t_us = draw(st.integers(0, 2**31))
        for _ in range(size):
            t_us += draw(st.integers(0, 20_000))
            batch.add(
                t_us,
                draw(st.integers(-(2**31) + 1, 2**31 - 1)),
                draw(st.integers(-(2**31) + 1, 2**31 - 1)),
                draw(st.floats(-2e7, 2e7)),
                draw(st.floats(-3276.7, 3276.7)),
                draw(st.integers(-127, 127)),
                draw(st.integers(-127, 127)),
                draw(st.lists(st.integers(0, 255), min_size=n_sensors, max_size=n_sensors)),
            )
        bodies.append(batch.body(draw(st.integers(0, 2**16 - 1))))
        index += size
    return SENSORS[:n_sensors], bodies


def plain_columns(bodies: list[bytes]) -> dict[str, list]:
    """Per-sample columns from the codec's plain decoder, one sample at a time."""
    cols: dict[str, list] = {k: [] for k in ("index", "t_s", "left", "right", "heading", "error",
                                             "p_left", "p_right", "refl", "battery")}
    for body in bodies:
        first_index, _, battery_mv, _, samples = wire.unpack_telemetry(body)
        for k, (t_us, left, right, heading, error, p_left, p_right, refl) in enumerate(samples):
            cols["index"].append(first_index + k)
            cols["t_s"].append(t_us / 1e6)
            cols["left"].append(left)
            cols["right"].append(right)
            cols["heading"].append(heading)
            cols["error"].append(error)
            cols["p_left"].append(p_left)
            cols["p_right"].append(p_right)
            cols["refl"].append(list(refl))
            cols["battery"].append(battery_mv)
    return cols


@settings(max_examples=100, deadline=None)
@given(recordings())
def test_agrees_exactly_with_plain_decoder(case) -> None:
    sensors, bodies = case
    tel = telemetry.decode_batches(bodies, sensors)
    plain = plain_columns(bodies)
    n = len(plain["index"])
    assert len(tel) == n
    assert tel.index.tolist() == plain["index"]
    assert tel.t_s.tolist() == plain["t_s"]  # exact float equality, not approximate
    assert tel.enc_left_deg.tolist() == plain["left"]
    assert tel.enc_right_deg.tolist() == plain["right"]
    assert tel.heading_deg.tolist() == plain["heading"]
    assert tel.error_pct.tolist() == plain["error"]
    assert tel.power_left_pct.tolist() == plain["p_left"]
    assert tel.power_right_pct.tolist() == plain["p_right"]
    assert tel.reflectance_pct.shape == (n, len(sensors))
    assert tel.reflectance_pct.tolist() == plain["refl"]
    assert tel.battery_mv.tolist() == plain["battery"]
    assert tel.dropped == (plain["index"][0] if n else 0)  # indices start where the strategy chose
    assert tel.sensor_names == sensors


def test_dtypes_and_read_only() -> None:
    tel = telemetry.decode_batches(consecutive_batches(40, 32, 2), SENSORS[:2])
    assert tel.index.dtype == np.int64 and tel.t_s.dtype == np.float64
    assert tel.enc_left_deg.dtype == np.int64 and tel.heading_deg.dtype == np.float64
    assert tel.reflectance_pct.dtype == np.uint8
    with pytest.raises(ValueError):
        tel.index[0] = 99


@pytest.mark.parametrize("missing", [[], [0], [2], [1, 2], [0, 3]], ids=str)
def test_dropped_counts_missing_batches(missing: list[int]) -> None:
    bodies = consecutive_batches(5 * 32, 32, 3)
    received = [b for k, b in enumerate(bodies) if k not in missing]
    tel = telemetry.decode_batches(received, SENSORS[:3])
    # A lost final batch cannot be noticed (nothing comes after it); any earlier loss can.
    noticed = [k for k in missing if k < max(set(range(5)) - set(missing))]
    assert tel.dropped == 32 * len(noticed)
    assert len(tel) == 32 * (5 - len(missing))
    assert np.all(np.diff(tel.index) > 0)


def test_out_of_order_and_duplicate_batches() -> None:
    bodies = consecutive_batches(4 * 32 + 5, 32, 4)
    shuffled = [bodies[3], bodies[0], bodies[4], bodies[1], bodies[0], bodies[2], bodies[3]]
    tel = telemetry.decode_batches(shuffled, SENSORS[:4])
    in_order = telemetry.decode_batches(bodies, SENSORS[:4])
    assert len(tel) == 4 * 32 + 5
    assert tel.dropped == 0
    for name in ("index", "t_s", "enc_left_deg", "enc_right_deg", "heading_deg", "error_pct",
                 "power_left_pct", "power_right_pct", "reflectance_pct", "battery_mv"):
        assert np.array_equal(getattr(tel, name), getattr(in_order, name)), name


@settings(max_examples=50, deadline=None)
@given(recordings(), st.data())
def test_any_arrival_order_with_repeats_decodes_like_in_order(case, data) -> None:
    sensors, bodies = case
    repeats = data.draw(st.lists(st.sampled_from(bodies), max_size=3)) if bodies else []
    arrived = data.draw(st.permutations(bodies + repeats))
    tel = telemetry.decode_batches(arrived, sensors)
    in_order = telemetry.decode_batches(bodies, sensors)
    assert len(tel) == len(in_order) and tel.dropped == in_order.dropped
    # Repeats here are exact copies, so every field, battery included, must match.
    for name in ("index", "t_s", "enc_left_deg", "enc_right_deg", "heading_deg", "error_pct",
                 "power_left_pct", "power_right_pct", "reflectance_pct", "battery_mv"):
        assert np.array_equal(getattr(tel, name), getattr(in_order, name)), name


def test_duplicate_keeps_the_first_copy_to_arrive() -> None:
    first = make_batch(0, 4, 1, battery_mv=7000)
    again = make_batch(0, 4, 1, battery_mv=6000)  # same indices, different header
    tel = telemetry.decode_batches([first, again], SENSORS[:1])
    assert tel.battery_mv.tolist() == [7000] * 4


def test_partly_overlapping_batches() -> None:
    tel = telemetry.decode_batches([make_batch(0, 10, 2), make_batch(5, 10, 2)], SENSORS[:2])
    assert tel.index.tolist() == list(range(15))
    assert tel.dropped == 0


def test_to_dataframe_columns() -> None:
    sensors = ("left", "right")
    tel = telemetry.decode_batches(consecutive_batches(50, 32, 2), sensors)
    frame = tel.to_dataframe()
    assert list(frame.columns) == list(telemetry.CHANNELS) + ["refl_left_pct", "refl_right_pct"]
    assert list(frame.columns) == list(tel.channels)
    assert frame.index.tolist() == tel.index.tolist()
    assert frame["refl_right_pct"].tolist() == tel.reflectance_pct[:, 1].tolist()
    assert frame["heading_deg"].tolist() == tel.heading_deg.tolist()


def test_summary() -> None:
    bodies = consecutive_batches(3 * 32, 32, 1)
    tel = telemetry.decode_batches([bodies[0], bodies[2]], SENSORS[:1])
    summary = tel.summary()
    assert summary["samples"] == 64 and summary["dropped"] == 32
    assert summary["duration_s"] == pytest.approx((3 * 32 - 1) * 0.01)
    assert summary["channels"] == list(telemetry.CHANNELS) + ["refl_left_pct"]


def test_empty() -> None:
    for tel in (telemetry.empty_telemetry(SENSORS[:3]), telemetry.decode_batches([], SENSORS[:3])):
        assert len(tel) == 0 and tel.dropped == 0
        assert tel.reflectance_pct.shape == (0, 3)
        assert tel.to_dataframe().shape == (0, len(telemetry.CHANNELS) + 3)
        assert tel.summary()["duration_s"] == 0.0
    # Batches that hold no samples decode to an empty recording too.
    assert len(telemetry.decode_batches([make_batch(7, 0, 2)], SENSORS[:2])) == 0


@pytest.mark.parametrize("cut", [1, 5, 20], ids=lambda c: "%d bytes short" % c)
def test_length_mismatch_is_a_frame_error(cut: int) -> None:
    bodies = consecutive_batches(96, 32, 2)
    bodies[1] = bodies[1][:-cut]
    with pytest.raises(wire.FrameError, match="batch 1 "):
        telemetry.decode_batches(bodies, SENSORS[:2])


def test_extra_bytes_and_short_header_are_frame_errors() -> None:
    good = make_batch(0, 3, 2)
    with pytest.raises(wire.FrameError, match="batch 0 "):
        telemetry.decode_batches([good + b"\x00"], SENSORS[:2])
    with pytest.raises(wire.FrameError, match="shorter than its header"):
        telemetry.decode_batches([good, good[: wire.TELEMETRY_HEADER_BYTES - 1]], SENSORS[:2])


def test_sensor_count_must_match_the_names() -> None:
    with pytest.raises(wire.FrameError, match="sensors"):
        telemetry.decode_batches([make_batch(0, 3, 3)], SENSORS[:2])
    with pytest.raises(ValueError):
        telemetry.decode_batches([make_batch(0, 3, 2)], ("left", "left"))


def test_layout_is_derived_from_the_codec() -> None:
    assert telemetry.HEADER_DTYPE.itemsize == wire.TELEMETRY_HEADER_BYTES
    assert telemetry.SAMPLE_DTYPE.itemsize == wire.TELEMETRY_SAMPLE_BYTES
    assert telemetry.sample_dtype(5).itemsize == wire.telemetry_sample_bytes(5)
    with pytest.raises(ValueError):
        telemetry.struct_dtype(">Hi", ("a", "b"))  # big-endian is not the wire's byte order
    with pytest.raises(ValueError):
        telemetry.struct_dtype("<Hq", ("a", "b"))  # a code the mapping does not know
