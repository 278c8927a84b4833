"""The serial link through a real pseudo-terminal: command round trip and telemetry throughput.

The simulated robot runs its unchanged hub listener in wall-clock time behind a pseudo-terminal
(`trackproof sim serve` does the same), and the host talks to it with the real serial link
(pyserial). For throughput the hub paces its output like a UART at the given baud rate (10 bits
a byte) with a bounded transmit buffer, so a link too slow for the telemetry rate shows up as
dropped samples, and the figure sits beside the link's own limit in samples per second.

    python bench/links.py [--pings 300] [--seconds 4]

Prints:
    link_rtt_ms: median (p95) round trip of a ping command and its answer
    serial_telemetry_samples_per_s: samples received per second at 500 Hz telemetry, 1 000 000 baud
    serial_dropped_samples: samples the host never got in that run
    serial_link_limit_samples_per_s: what 1 000 000 baud can carry at the measured bytes per sample
    and the same three with a _115200 suffix.
    watchdog_stop_delay_ms: from the hub's last byte from the host to its motors stopping, when the
        host closes the port in the middle of a move (the watchdog is 500 ms)
"""

from __future__ import annotations

import argparse
import statistics
import time

from harness.links.serial_port import SerialLink
from harness.session import Session
from harness.sim import Simulation
from harness.sim.serve import serve_pty
from hub_side import wire

TELEMETRY_HZ = 500


def connect(device: str, sim: Simulation, resend: bool = True) -> tuple[SerialLink, Session]:
    link = SerialLink(device, 1_000_000)
    session = Session(link, session_id="bench", resend_telemetry=resend)
    session.hello(geometry=sim.profile.geometry(), expect_robot_id=sim.profile.id)
    return link, session


def round_trips(pings: int) -> list[float]:
    sim = Simulation.from_files(seed=1)
    times = []
    with serve_pty(sim) as (device, _hub):
        link, _session = connect(device, sim)
        reader = wire.FrameReader()
        try:
            for seq in range(1, pings + 1):
                start = time.perf_counter()
                link.write(wire.encode_message(wire.PING, seq, {}))
                answered = False
                while not answered:
                    data = link.read(1.0)
                    if not data:
                        raise SystemExit(f"no answer to ping {seq} within 1 s")
                    answered = any(t == wire.PONG and wire.decode_json(b).get("ref") == seq
                                   for t, _, b in reader.feed(data))
                times.append((time.perf_counter() - start) * 1000)
        finally:
            link.close()
    return times


def throughput(baud: int, seconds: float) -> tuple[float, int, float]:
    """(samples received per second, samples dropped, link limit in samples per second)."""
    sim = Simulation.from_files(seed=1)
    with serve_pty(sim, baud=baud) as (device, _hub):
        link, session = connect(device, sim, resend=False)  # measure the live stream, not the repair
        received = 0
        read = link.read

        def counting_read(timeout_s: float) -> bytes:
            nonlocal received
            data = read(timeout_s)
            received += len(data)
            return data

        link.read = counting_read  # type: ignore[method-assign]
        try:
            params = sim.profile.action_defaults("follow_line", {"time_s": seconds, "speed_pct": 30})
            record = session.run("follow_line", params, telemetry_hz=TELEMETRY_HZ)
        finally:
            link.close()
    samples = len(record.telemetry)
    duration = float(record.result["duration_s"])
    bytes_per_sample = received / max(1, samples)
    limit = baud / 10 / bytes_per_sample
    return samples / duration, record.telemetry.dropped, limit


def watchdog_stop_delay() -> float:
    sim = Simulation.from_files(seed=1)
    with serve_pty(sim) as (device, _hub):
        link, session = connect(device, sim)
        params = sim.profile.action_defaults("follow_line", {"distance_mm": 3000})
        session._command(wire.START, {"action": "follow_line", "params": params, "telemetry_hz": 100})
        link.close()  # the host is gone mid-move
        deadline = time.perf_counter() + 5
        while sim.robot.power != (0.0, 0.0):
            if time.perf_counter() > deadline:
                raise SystemExit("the motors still run 5 s after the host went silent")
            time.sleep(0.0002)
        stopped_us = sim.t_us
    return (stopped_us - sim.listener._last_rx_us) / 1000


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--pings", type=int, default=300)
    parser.add_argument("--seconds", type=float, default=4.0)
    args = parser.parse_args()
    rtt = sorted(round_trips(args.pings))
    p95 = rtt[int(0.95 * (len(rtt) - 1))]
    print(f"link_rtt_ms: {statistics.median(rtt):.2f} ms (p95 {p95:.2f} ms, {len(rtt)} pings over a pseudo-terminal)")
    for baud, suffix in ((1_000_000, ""), (115_200, "_115200")):
        rate, dropped, limit = throughput(baud, args.seconds)
        print(f"serial_telemetry_samples_per_s{suffix}: {rate:.0f} samples/s (asked for {TELEMETRY_HZ})")
        print(f"serial_dropped_samples{suffix}: {dropped} samples")
        print(f"serial_link_limit_samples_per_s{suffix}: {limit:.0f} samples/s")
    print(f"watchdog_stop_delay_ms: {watchdog_stop_delay():.1f} ms (watchdog 500 ms, control period 10 ms)")


if __name__ == "__main__":
    main()
