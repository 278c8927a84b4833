"""End to end on the simulator: host session -> real frames -> unchanged hub listener -> simulated
robot, checked against the simulator's truth."""

from __future__ import annotations

import numpy as np
import pytest

from conftest import connect
from harness.errors import HubRefused, LinkError, ProtocolError
from harness.links import SimLink
from harness.session import Session
from harness.sim import Simulation, truth_report, truth_snapshot
from hub_side import wire


def follow_to_junction(sim, session, **extra):
    params = sim.profile.action_defaults("follow_line", {"junctions": 3, "side": "any", "overrun_mm": 80.0,
                                                         "speed_pct": 40.0, **extra})
    return session.run("follow_line", params)


def test_follow_to_third_junction_stops_overrun_past_it(sim_session):
    sim, session = sim_session
    record = follow_to_junction(sim, session, ramp_down_mm=40.0, end_pct=12.0)
    assert record.status == "done"
    assert record.result["junctions"] == 3
    assert [e["kind"] for e in record.events] == ["junction"] * 3
    assert record.events[2]["sides"] == "left+right"  # the third junction is the crossroads
    truth = truth_snapshot(sim)
    assert truth["cross_line"]["outer_left"]["line"] == "crossroads"
    true_overrun = truth["cross_line"]["outer_left"]["distance_mm"]
    # The stop lands within a few millimetres of overrun_mm past the junction, and the hub's own
    # encoder measurement of it agrees with the truth to about a millimetre.
    assert true_overrun == pytest.approx(80.0, abs=5.0)
    assert record.result["overrun_measured_mm"] == pytest.approx(true_overrun, abs=1.5)
    assert record.telemetry.dropped == 0
    assert len(record.telemetry) == record.result["samples"]


def test_faster_stop_coasts_further(sim_session):
    # Coasting after the stop grows with speed: the point of measuring stop spread at all.
    overruns = []
    for speed in (25.0, 60.0):
        sim, session = connect(seed=3)
        follow_to_junction(sim, session, speed_pct=speed)
        overruns.append(truth_snapshot(sim)["cross_line"]["outer_left"]["distance_mm"])
    assert overruns[1] > overruns[0] + 3.0


def test_probe_edge_agrees_with_truth(sim_session):
    sim, session = sim_session
    follow_to_junction(sim, session, ramp_down_mm=40.0, end_pct=12.0)
    before = truth_snapshot(sim)["cross_line"]["outer_left"]
    true_edge_mm = before["distance_mm"] - before["half_width_mm"]
    record = session.run("probe_edge", {"sensor": "outer_left"})
    assert record.status == "done"
    assert record.result["from"] == "light"
    assert record.result["edge_mm"] == pytest.approx(true_edge_mm, abs=1.0)


@pytest.mark.parametrize("using, tolerance_deg", [("gyro", 3.0), ("encoders", 5.0)])
def test_spin_turn_90_ends_within_a_few_degrees(using, tolerance_deg):
    sim, session = connect(seed=2)
    before = truth_snapshot(sim)
    record = session.run("turn", {"angle_deg": 90.0, "mode": "spin", "using": using})
    truth = truth_report(before, truth_snapshot(sim))
    assert record.status == "done"
    assert truth["heading_change_deg"] == pytest.approx(90.0, abs=tolerance_deg)
    # A spin barely moves the axle midpoint.
    assert abs(truth["travel_mm"]) < 3.0
    # The gyro reports what really happened, to within its noise and drift.
    assert record.result["heading_change_deg"] == pytest.approx(truth["heading_change_deg"], abs=0.6)


def test_turn_offsets_aim_encoder_turns_short_and_leave_gyro_turns_alone():
    def turned(geometry_extra, angle, mode="spin", using="encoders"):
        sim = Simulation.from_files(seed=2)
        session = Session(SimLink(sim), watchdog_ms=500, session_id="offset")
        session.hello(geometry={**sim.profile.geometry(), **geometry_extra})
        before = truth_snapshot(sim)
        record = session.run("turn", {"angle_deg": angle, "mode": mode, "using": using})
        assert record.status == "done"
        return record, truth_report(before, truth_snapshot(sim))["heading_change_deg"]

    plain, plain_deg = turned({}, 90.0)
    short, short_deg = turned({"spin_offset_deg": 3.0}, 90.0)
    # The encoder target shrinks by the offset's share of the angle (87 of 90 degrees), and the
    # robot turns about 3 degrees less: 2.85 at the practice robot's true spin scale (it turns
    # 1 / 1.053 of what the profile expects), give or take one turn's slip and noise.
    assert (short.result["target_deg"], plain.result["target_deg"]) == (87.0, 90.0)
    assert short.result["target_motor_deg"] == pytest.approx(plain.result["target_motor_deg"] * 87.0 / 90.0, rel=1e-3)
    assert plain_deg - short_deg == pytest.approx(3.0 / 1.053, abs=0.75)
    # Counter-clockwise alike; a pivot takes pivot_offset_deg and ignores spin_offset_deg.
    _, ccw_deg = turned({"spin_offset_deg": 3.0}, -90.0)
    assert ccw_deg == pytest.approx(-short_deg, abs=0.5)
    pivot, _ = turned({"spin_offset_deg": 3.0}, 90.0, mode="pivot_right")
    pivot_short, _ = turned({"pivot_offset_deg": 3.0}, 90.0, mode="pivot_right")
    assert pivot_short.result["target_motor_deg"] == pytest.approx(pivot.result["target_motor_deg"] * 87.0 / 90.0,
                                                                   rel=1e-3)
    # An offset as large as the angle leaves nothing to turn.
    none, none_deg = turned({"spin_offset_deg": 5.0}, 4.0)
    assert none.result["target_deg"] == none.result["target_motor_deg"] == 0.0 and abs(none_deg) < 0.2
    # A negative offset (turns that stop short) aims further, either way; a turn of 0 stays 0.
    longer, _ = turned({"spin_offset_deg": -3.0}, -90.0)
    assert longer.result["target_deg"] == 93.0
    assert longer.result["target_motor_deg"] == pytest.approx(plain.result["target_motor_deg"] * 93.0 / 90.0, rel=1e-3)
    for mode, key in (("spin", "spin_offset_deg"), ("pivot_left", "pivot_offset_deg")):
        still, still_deg = turned({key: -5.0}, 0.0, mode=mode)
        assert still.result["target_deg"] == 0.0 and abs(still_deg) < 0.2
    # Turns by the gyro stop on the gyro's own reading: the offset is for encoder turns only.
    gyro, _ = turned({}, 90.0, using="gyro")
    gyro_offset, _ = turned({"spin_offset_deg": 3.0}, 90.0, using="gyro")
    assert gyro_offset.result["target_deg"] == gyro.result["target_deg"] == 90.0
    assert "target_motor_deg" not in gyro.result


def test_pivot_turns_about_the_stopped_wheel():
    sim, session = connect(seed=2)
    record = session.run("turn", {"angle_deg": -90.0, "mode": "pivot_left"})
    assert record.status == "done"
    assert record.result["enc_left_deg"] == 0  # the left wheel is the pivot
    assert record.result["enc_right_deg"] > 300
    assert truth_snapshot(sim)["pose"]["heading_deg"] < 10.0  # started at about 90, turned counter-clockwise


def test_backward_follow_stays_on_the_line():
    sim, session = connect(seed=4)
    params = sim.profile.action_defaults("follow_line", {"direction": "backward", "distance_mm": 120.0})
    record = session.run("follow_line", params)
    assert record.status == "done"
    assert record.result["distance_mm"] == pytest.approx(-120.0, abs=6.0)
    robot = sim.robot
    assert robot.mat.nearest_line(*robot.sensor_xy("rear"))[1] < 12.0  # still on the tape's edge


def test_drive_straight_holds_heading():
    sim, session = connect(seed=5)
    before = truth_snapshot(sim)
    record = session.run("drive_straight", {"distance_mm": 300.0, "speed_pct": 50.0})
    truth = truth_report(before, truth_snapshot(sim))
    assert record.status == "done"
    assert abs(truth["heading_change_deg"]) < 2.0
    assert truth["travel_mm"] == pytest.approx(300.0, rel=0.05)


def test_same_seed_same_bytes_different_seed_different_telemetry():
    def telemetry(seed):
        sim, session = connect(seed=seed)
        record = follow_to_junction(sim, session)
        return record.telemetry

    a, b, c = telemetry(7), telemetry(7), telemetry(8)
    for name in ("t_s", "enc_left_deg", "enc_right_deg", "heading_deg", "error_pct", "reflectance_pct"):
        assert np.array_equal(getattr(a, name), getattr(b, name))
    assert not np.array_equal(a.reflectance_pct[: len(c)], c.reflectance_pct[: len(a)])


def test_same_seed_gives_identical_wire_bytes():
    def wire_bytes(seed):
        sim, session = connect(seed=seed)
        captured = bytearray()
        read = session.link.read

        def capture(timeout_s):
            data = read(timeout_s)
            captured.extend(data)
            return data

        session.link.read = capture
        follow_to_junction(sim, session)
        return bytes(captured)

    assert wire_bytes(11) == wire_bytes(11)


def test_watchdog_stops_motors_when_host_falls_silent():
    sim, session = connect(seed=1)
    params = sim.profile.action_defaults("follow_line", {"distance_mm": 2000.0})
    frame = wire.encode_message(wire.START, 900, {"action": "follow_line", "params": params})
    session.link.write(frame)
    sim.run_for(300_000)
    assert sim.robot.power != (0.0, 0.0)
    silent_from_us = sim.t_us  # the host sends nothing from here on
    while sim.robot.power != (0.0, 0.0):
        sim.step(1000)
        assert sim.t_us - silent_from_us < 2_000_000
    stop_delay_ms = (sim.t_us - silent_from_us) / 1000
    # The hub last heard the host at the START, so it stops 500 ms after that at the latest.
    assert stop_delay_ms <= 500 + 10
    frames = wire.FrameReader().feed(bytes(sim.board.tx))
    faults = [wire.decode_json(body) for kind, _, body in frames if kind == wire.FAULT]
    results = [wire.decode_json(body) for kind, _, body in frames if kind == wire.RESULT]
    assert faults[-1]["code"] == "watchdog"
    assert results[-1]["status"] == "watchdog"


def test_a_retransmitted_start_never_starts_twice(sim_session):
    sim, session = sim_session
    params = sim.profile.action_defaults("follow_line", {"distance_mm": 100.0})
    frame = wire.encode_message(wire.START, 500, {"action": "follow_line", "params": params})
    session.link.write(frame)
    sim.run_for(50_000)
    session.link.write(frame)  # the same command again, as a retransmission after a lost ack
    sim.run_for(3_000_000)
    frames = wire.FrameReader().feed(bytes(sim.board.tx))
    kinds = [kind for kind, _, _ in frames]
    assert kinds.count(wire.ACK) == 2  # both copies are answered ...
    assert kinds.count(wire.RESULT) == 1  # ... but the action ran once
    assert wire.REFUSE not in kinds


def test_refusals_are_clear(sim_session):
    sim, session = sim_session
    with pytest.raises(HubRefused, match="unknown_action.*fly"):
        session.run("fly", {})
    with pytest.raises(HubRefused, match="bad_param.*angle_deg"):
        session.run("turn", {"angle_deg": 5000})
    with pytest.raises(HubRefused, match="bad_param.*unknown sensor 'nose'"):
        session.run("probe_edge", {"sensor": "nose"})
    with pytest.raises(HubRefused, match="junction_left"):
        session.run("follow_line", {"sensors": ["left", "right"], "junctions": 2})
    # After refusals the hub still works.
    assert session.run("turn", {"angle_deg": 10}).status == "done"


def test_protocol_mismatch_names_both_versions():
    sim, _ = connect()
    session = Session(SimLink(sim), session_id="old")
    wire_version = wire.PROTOCOL_VERSION
    session.protocol_version = wire_version + 1  # a host newer than the hub
    with pytest.raises(ProtocolError) as caught:
        session.hello()
    assert f"host speaks {wire_version + 1}" in str(caught.value)
    assert f"hub speaks {wire_version}" in str(caught.value)


def test_wrong_robot_is_refused():
    sim, _ = connect()
    session = Session(SimLink(sim), session_id="other")
    with pytest.raises(ProtocolError, match="expected 'someone-else'.*'kestrel-7' answered"):
        session.hello(expect_robot_id="someone-else")


def test_registered_routine_runs_with_telemetry():
    sim, session = connect(seed=6)

    @sim.listener.routine("out_and_back")
    def out_and_back(ctx, params):
        yield from ctx.run("drive_straight", {"distance_mm": params.get("mm", 100)})
        turned = yield from ctx.run("turn", {"angle_deg": 180, "using": "gyro"})
        return {"turned_deg": turned["heading_change_deg"]}

    session.hello(geometry=sim.profile.geometry())  # the hub now lists the routine
    assert "out_and_back" in session.hub.routines
    record = session.run("out_and_back", {"mm": 150})
    assert record.status == "done"
    assert record.result["turned_deg"] == pytest.approx(180.0, abs=4.0)
    assert record.result["distance_mm"] == pytest.approx(150.0, abs=10.0)
    assert len(record.telemetry) > 50 and record.telemetry.dropped == 0


def test_action_timeout_stops_and_reports(sim_session):
    sim, session = sim_session
    params = sim.profile.action_defaults("follow_line", {"distance_mm": 5000.0, "timeout_s": 1.0})
    record = session.run("follow_line", params)
    assert record.status == "timeout"
    assert [e["kind"] for e in record.events] == ["timeout"]
    assert record.result["duration_s"] == pytest.approx(1.0, abs=0.05)


def test_ctrl_c_stops_the_robot_before_anything_else(sim_session):
    sim, session = sim_session
    read = session.link.read
    calls = {"n": 0}

    def interrupted_read(timeout_s):
        calls["n"] += 1
        if calls["n"] == 10:
            raise KeyboardInterrupt
        return read(timeout_s)

    session.link.read = interrupted_read
    params = sim.profile.action_defaults("follow_line", {"distance_mm": 3000.0})
    with pytest.raises(KeyboardInterrupt):
        session.run("follow_line", params)
    session.link.read = read
    sim.run_for(30_000)  # the hub reads the stop at its next tick
    assert sim.robot.power == (0.0, 0.0)
    assert sim.listener.contexts == []


def test_silent_link_gives_a_clear_timeout_error():
    class DeadLink(SimLink):
        def write(self, data):
            pass  # everything the host says is lost

    sim, _ = connect()
    session = Session(DeadLink(sim), reply_timeout_s=0.2, retries=2)
    with pytest.raises(LinkError, match="no answer from the hub to hello after 3 tries"):
        session.hello()
