"""Vectorised (numpy) decoding of telemetry batches on the host.

The codec's plain decoder (hub_side.wire.unpack_telemetry) walks samples one at a time with
struct, which suits the hub but is slow for long recordings. This module decodes a whole action's
batches at once. It never declares the layout itself: the numpy record types are derived from the
codec's struct formats and checked against its byte counts at import, so the two cannot drift
apart; the tests check they agree sample for sample.
"""

from __future__ import annotations

import struct
from collections.abc import Sequence
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from hub_side import wire

# numpy equivalents of the struct codes the wire formats use.
_STRUCT_TO_NUMPY = {"B": "u1", "b": "i1", "H": "u2", "h": "i2", "I": "u4", "i": "i4"}

# Field names in wire order (the codec's comments spell this order out; the types come from its
# struct formats).
HEADER_FIELDS = ("first_index", "t0_us", "battery_mv", "n_samples", "n_sensors")
SAMPLE_FIELDS = ("dt", "enc_left", "enc_right", "heading", "error", "power_left", "power_right")

CHANNELS = (
    "t_s",
    "enc_left_deg",
    "enc_right_deg",
    "heading_deg",
    "error_pct",
    "power_left_pct",
    "power_right_pct",
)

_US_PER_S = 1_000_000


def struct_dtype(fmt: str, names: Sequence[str]) -> np.dtype:
    """A packed numpy record type with exactly the layout of a little-endian struct format.

    Refuses formats it cannot map one code per field, so a change in the codec fails loudly here
    instead of decoding garbage.
    """
    if not fmt.startswith("<"):
        raise ValueError("struct format %r is not explicitly little-endian" % fmt)
    codes = fmt[1:]
    if len(codes) != len(names) or any(code not in _STRUCT_TO_NUMPY for code in codes):
        raise ValueError("struct format %r does not map onto fields %r" % (fmt, tuple(names)))
    dtype = np.dtype([(name, "<" + _STRUCT_TO_NUMPY[code]) for name, code in zip(names, codes)])
    if dtype.itemsize != struct.calcsize(fmt):
        raise ValueError(
            "numpy layout of %r is %d bytes, struct says %d" % (fmt, dtype.itemsize, struct.calcsize(fmt))
        )
    return dtype


HEADER_DTYPE = struct_dtype(wire.TELEMETRY_HEADER, HEADER_FIELDS)
SAMPLE_DTYPE = struct_dtype(wire.TELEMETRY_SAMPLE, SAMPLE_FIELDS)
if (HEADER_DTYPE.itemsize, SAMPLE_DTYPE.itemsize) != (wire.TELEMETRY_HEADER_BYTES, wire.TELEMETRY_SAMPLE_BYTES):
    raise ImportError("telemetry layout in hub_side.wire disagrees with its own byte counts")


def sample_dtype(n_sensors: int) -> np.dtype:
    """The record type of one sample with n_sensors reflectance bytes after the fixed part."""
    fields = SAMPLE_DTYPE.fields
    return np.dtype(
        {
            "names": list(SAMPLE_FIELDS),
            "formats": [fields[name][0] for name in SAMPLE_FIELDS],
            "offsets": [fields[name][1] for name in SAMPLE_FIELDS],
            "itemsize": wire.telemetry_sample_bytes(n_sensors),
        }
    )


def reflectance_channel(sensor: str) -> str:
    return "refl_%s_pct" % sensor


def channel_names(sensor_names: Sequence[str]) -> tuple[str, ...]:
    """All channels of a recording: the fixed ones, then one reflectance channel per sensor."""
    return CHANNELS + tuple(reflectance_channel(name) for name in sensor_names)


def _frozen(array: np.ndarray) -> np.ndarray:
    # A frozen dataclass should not hide arrays that can be changed in place.
    array.setflags(write=False)
    return array


# eq=False: element-wise == on numpy arrays has no single truth value.
@dataclass(frozen=True, eq=False)
class Telemetry:
    """Decoded telemetry of one action, one entry per sample, in sample-index order."""

    index: np.ndarray  # int64, samples since the action started
    t_s: np.ndarray  # float64, seconds since the action started
    enc_left_deg: np.ndarray  # int64
    enc_right_deg: np.ndarray  # int64
    heading_deg: np.ndarray  # float64, clockwise positive
    error_pct: np.ndarray  # float64, controller error
    power_left_pct: np.ndarray  # int16
    power_right_pct: np.ndarray  # int16
    reflectance_pct: np.ndarray  # uint8, shape (n, n_sensors)
    sensor_names: tuple[str, ...]
    battery_mv: np.ndarray  # int32, from each sample's batch header
    dropped: int = 0  # samples missing: gaps in the index sequence, and a lost tail when known
    channels: tuple[str, ...] = field(init=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "channels", channel_names(self.sensor_names))

    def __len__(self) -> int:
        return int(self.index.shape[0])

    def to_dataframe(self) -> pd.DataFrame:
        """One column per channel, indexed by sample index (gaps show where samples were lost)."""
        columns = {name: getattr(self, name) for name in CHANNELS}
        for k, sensor in enumerate(self.sensor_names):
            columns[reflectance_channel(sensor)] = self.reflectance_pct[:, k]
        return pd.DataFrame(columns, index=pd.Index(self.index, name="index"))

    def summary(self) -> dict:
        duration_s = float(self.t_s[-1] - self.t_s[0]) if len(self) else 0.0
        return {
            "samples": len(self),
            "dropped": self.dropped,
            "duration_s": duration_s,
            "channels": list(self.channels),
        }


def _check_sensor_names(sensor_names: Sequence[str]) -> tuple[str, ...]:
    names = tuple(sensor_names)
    if len(set(names)) != len(names) or not all(names):
        raise ValueError("sensor names must be unique and non-empty: %r" % (names,))
    return names


def empty_telemetry(sensor_names: Sequence[str]) -> Telemetry:
    """A recording with no samples, for actions that produced none."""
    names = _check_sensor_names(sensor_names)
    return Telemetry(
        index=_frozen(np.zeros(0, np.int64)),
        t_s=_frozen(np.zeros(0, np.float64)),
        enc_left_deg=_frozen(np.zeros(0, np.int64)),
        enc_right_deg=_frozen(np.zeros(0, np.int64)),
        heading_deg=_frozen(np.zeros(0, np.float64)),
        error_pct=_frozen(np.zeros(0, np.float64)),
        power_left_pct=_frozen(np.zeros(0, np.int16)),
        power_right_pct=_frozen(np.zeros(0, np.int16)),
        reflectance_pct=_frozen(np.zeros((0, len(names)), np.uint8)),
        sensor_names=names,
        battery_mv=_frozen(np.zeros(0, np.int32)),
        dropped=0,
    )


def _read_headers(buf: np.ndarray, starts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The header records at the given offsets, and the byte positions they occupy."""
    positions = starts[:, None] + np.arange(wire.TELEMETRY_HEADER_BYTES)
    headers = buf[positions].view(HEADER_DTYPE).reshape(-1)
    return headers, positions


def _check_lengths(lengths: np.ndarray, headers: np.ndarray, n_sensors: int) -> None:
    """FrameError naming the first batch whose header disagrees with its body or the sensor list."""
    wrong_sensors = np.flatnonzero(headers["n_sensors"] != n_sensors)
    if wrong_sensors.size:
        k = int(wrong_sensors[0])
        raise wire.FrameError(
            "telemetry batch %d has %d sensors, expected %d" % (k, headers["n_sensors"][k], n_sensors)
        )
    counts = headers["n_samples"].astype(np.int64)
    expected = wire.TELEMETRY_HEADER_BYTES + counts * wire.telemetry_sample_bytes(n_sensors)
    wrong = np.flatnonzero(lengths != expected)
    if wrong.size:
        k = int(wrong[0])
        raise wire.FrameError(
            "telemetry batch %d is %d bytes but its header announces %d samples (%d bytes)"
            % (k, lengths[k], counts[k], expected[k])
        )


def _keep_order(index: np.ndarray) -> np.ndarray | None:
    """Positions that put samples in index order without repeats, or None if already so.

    Batches can arrive out of order or twice (a retransmission); a stable sort keeps the first
    copy to arrive. The common in-order case costs one comparison pass.
    """
    if index.size < 2 or bool(np.all(index[1:] > index[:-1])):
        return None
    order = np.argsort(index, kind="stable")
    ordered = index[order]
    first = np.ones(ordered.size, dtype=bool)
    first[1:] = ordered[1:] != ordered[:-1]
    return order[first]


def decode_batches(bodies: Sequence[bytes], sensor_names: Sequence[str],
                   expected_samples: int | None = None) -> Telemetry:
    """Decode telemetry batch bodies (as sent by TelemetryBatch.body) into one Telemetry.

    All bodies must come from one action with the given sensor list. Batches may arrive out of
    order or more than once (a retransmission): samples come back in index order, each once, and
    `dropped` counts the indices never seen; with expected_samples (the count the hub reported in
    its result) that includes a lost tail. FrameError if any body's length does not match its
    header or its sensor count differs from len(sensor_names).
    """
    names = _check_sensor_names(sensor_names)
    if len(bodies) == 0:
        return replace(empty_telemetry(names), dropped=expected_samples or 0)
    n_sensors = len(names)
    lengths = np.array([len(body) for body in bodies], dtype=np.int64)
    short = np.flatnonzero(lengths < wire.TELEMETRY_HEADER_BYTES)
    if short.size:
        k = int(short[0])
        raise wire.FrameError("telemetry batch %d is %d bytes, shorter than its header" % (k, lengths[k]))

    buf = np.frombuffer(b"".join(bodies), dtype=np.uint8)
    starts = np.cumsum(lengths) - lengths
    headers, header_positions = _read_headers(buf, starts)
    _check_lengths(lengths, headers, n_sensors)

    # With the headers cut out, all samples lie back to back in arrival order, one row each.
    is_sample = np.ones(buf.size, dtype=bool)
    is_sample[header_positions.ravel()] = False
    rows = buf[is_sample].reshape(-1, wire.telemetry_sample_bytes(n_sensors))

    counts = headers["n_samples"].astype(np.int64)
    first_sample = np.cumsum(counts) - counts
    index = np.arange(rows.shape[0], dtype=np.int64)
    index += np.repeat(headers["first_index"].astype(np.int64) - first_sample, counts)
    t0_us = np.repeat(headers["t0_us"].astype(np.int64), counts)
    battery_mv = np.repeat(headers["battery_mv"].astype(np.int32), counts)

    keep = _keep_order(index)
    if keep is not None:
        # Reorder whole byte rows: indexing the record view would not copy the unnamed
        # reflectance bytes at the end of each record.
        rows, index, t0_us, battery_mv = rows[keep], index[keep], t0_us[keep], battery_mv[keep]

    samples = rows.reshape(-1).view(sample_dtype(n_sensors))
    t_us = t0_us + samples["dt"].astype(np.int64) * wire.TELEMETRY_DT_UNIT_US
    seen_up_to = int(index[-1] + 1) if index.size else 0
    dropped = max(seen_up_to, expected_samples or 0) - int(index.size)
    return Telemetry(
        index=_frozen(index),
        t_s=_frozen(t_us / _US_PER_S),
        enc_left_deg=_frozen(samples["enc_left"].astype(np.int64) - wire.BIAS_32),
        enc_right_deg=_frozen(samples["enc_right"].astype(np.int64) - wire.BIAS_32),
        heading_deg=_frozen((samples["heading"].astype(np.int64) - wire.BIAS_32) / wire.HEADING_SCALE),
        error_pct=_frozen((samples["error"].astype(np.int64) - wire.BIAS_16) / wire.ERROR_SCALE),
        power_left_pct=_frozen(samples["power_left"].astype(np.int16) - wire.BIAS_8),
        power_right_pct=_frozen(samples["power_right"].astype(np.int16) - wire.BIAS_8),
        reflectance_pct=_frozen(np.ascontiguousarray(rows[:, wire.TELEMETRY_SAMPLE_BYTES :])),
        sensor_names=names,
        battery_mv=_frozen(battery_mv),
        dropped=dropped,
    )
