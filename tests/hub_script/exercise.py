"""Drive the unchanged hub listener through a fixed script on the scripted board.

Runs under CPython (repo root on sys.path) and under MicroPython (hub_side and this folder
installed in /lib). Prints every frame the hub wrote, one per line:

    TYPE SEQ HEX_BODY    telemetry (binary batches)
    TYPE SEQ JSON        control messages, keys sorted by canon() below

and lines starting with "#" for the script's own steps and counters. tests/test_hub_micropython.py
compares the two interpreters' output.
"""

try:
    from scripted_board import ScriptedBoard  # CPython: this file's folder is sys.path[0]
except ImportError:
    from hub_script.scripted_board import ScriptedBoard  # MicroPython: copied to /lib/hub_script

import json

from hub_side import wire
from hub_side.listener import Listener

TICK_COST_US = 173  # virtual time one pass of the loop takes, so ticks are never exactly on time
MAX_WAIT_US = 20000
SESSION = "exercise-1"


def canon(obj):
    """JSON with sorted keys: MicroPython's json.dumps has no sort_keys and dicts are unordered."""
    if isinstance(obj, dict):
        return "{" + ", ".join(json.dumps(k) + ": " + canon(obj[k]) for k in sorted(obj)) + "}"
    if isinstance(obj, (list, tuple)):
        return "[" + ", ".join(canon(v) for v in obj) + "]"
    return json.dumps(obj)


class Exercise:
    def __init__(self, telemetry=True):
        self.board = ScriptedBoard()
        self.listener = Listener(self.board, robot_id="scripted", control_period_us=10000)
        self.reader = wire.FrameReader()
        self.frames = []  # (type, seq, body) in the order the hub wrote them
        self.telemetry = telemetry
        self.tick_count = 0

    def send(self, msg_type, seq, obj):
        frame = wire.encode_message(msg_type, seq, obj)
        self.board.host_send(frame)
        return frame

    def _collect(self, out):
        for frame in self.reader.feed(self.board.take_tx()):
            self.frames.append(frame)
            if out is not None:
                out(frame)

    def run(self, until_us, stop_on=None, out=None):
        """Tick for up to until_us of virtual time; stop early once a frame of type stop_on
        arrives. Returns that frame, or None."""
        board = self.board
        end = board.now_us + until_us
        while board.now_us < end:
            wait = self.listener.tick()
            self.tick_count += 1
            board.idle_us(TICK_COST_US)
            before = len(self.frames)
            self._collect(out)
            if stop_on is not None:
                for frame in self.frames[before:]:
                    if frame[0] == stop_on:
                        return frame
            board.idle_us(min(wait, MAX_WAIT_US))
        return None


def describe(frame):
    msg_type, seq, body = frame
    name = wire.MESSAGE_NAMES.get(msg_type, "type%d" % msg_type)
    if msg_type == wire.TELEMETRY:
        text = "".join("%02x" % b for b in body)
    else:
        text = canon(wire.decode_json(body))
    return "%s %d %s" % (name, seq, text)


def emit(frame):
    print(describe(frame))


def main():
    ex = Exercise()
    first_ticks = ex.board.ticks_us()
    send = ex.send
    run = ex.run

    print("# garbage before anything")
    # Ends in a delimiter: bytes left pending without one would swallow the next frame.
    ex.board.host_send(b"\x13\x37noise\xff\x00\x00\x05\x01\x00")
    run(30000, out=emit)

    print("# hello")
    send(wire.HELLO, 1, {"proto": wire.PROTOCOL_VERSION, "session": SESSION, "watchdog_ms": 20000,
                         "geometry": {"wheel_diameter_mm": 56.0, "track_mm": 112.0, "spin_offset_deg": 1.5}})
    run(500000, stop_on=wire.HUB_INFO, out=emit)

    print("# follow_line to the second junction, then a retransmitted start")
    follow = {"action": "follow_line", "telemetry_hz": 100, "params": {
        "sensors": ["line_left", "line_right"], "speed_pct": 40, "kp": 0.4, "kd": 0.002,
        "junctions": 2, "side": "any", "junction_left": "side_left",
        "junction_right": "side_right", "arm_after_mm": 30, "overrun_mm": 20}}
    start = send(wire.START, 2, follow)
    run(150000, stop_on=wire.RESULT, out=emit)
    ex.board.host_send(start)  # same seq, same body: the host never saw the ACK
    run(10000000, stop_on=wire.RESULT, out=emit)

    print("# probe_edge back to the junction mark the side sensor overran")
    send(wire.START, 5, {"action": "probe_edge", "telemetry_hz": 0,
                         "params": {"sensor": "side_left", "direction": "backward", "max_mm": 100}})
    run(10000000, stop_on=wire.RESULT, out=emit)

    print("# turn spin 90 by encoders")
    send(wire.START, 3, {"action": "turn", "telemetry_hz": 100,
                         "params": {"angle_deg": 90, "mode": "spin", "using": "encoders", "speed_pct": 30}})
    run(5000000, stop_on=wire.RESULT, out=emit)

    print("# drive_straight 150 mm with a ramp")
    send(wire.START, 4, {"action": "drive_straight", "telemetry_hz": 50,
                         "params": {"distance_mm": 150, "speed_pct": 50, "ramp_up_mm": 30,
                                    "ramp_down_mm": 40}})
    run(5000000, stop_on=wire.RESULT, out=emit)

    print("# refusals: unknown action, bad params, a start the action itself rejects")
    send(wire.START, 6, {"action": "moonwalk", "params": {}})
    run(200000, stop_on=wire.REFUSE, out=emit)
    send(wire.START, 7, {"action": "turn", "params": {"angle_deg": "ninety"}})
    run(200000, stop_on=wire.REFUSE, out=emit)
    send(wire.START, 8, {"action": "follow_line", "params": {"sensors": ["line_left", "line_right"]}})
    run(200000, stop_on=wire.REFUSE, out=emit)

    print("# a long drive stopped by the host")
    send(wire.START, 9, {"action": "drive_straight", "telemetry_hz": 100, "params": {"distance_mm": 2000}})
    run(300000, out=emit)
    send(wire.STOP, 10, {})
    run(2000000, stop_on=wire.RESULT, out=emit)
    run(100000, out=emit)  # the ACK follows the RESULT

    print("# ping")
    send(wire.PING, 11, {})
    run(200000, stop_on=wire.PONG, out=emit)

    print("# garbage, then a START with a corrupted byte, then a ping to show the stream resyncs")
    ex.board.host_send(b"\x01\x02\x03garbage-without-delimiter\x00")
    bad = bytearray(wire.encode_message(wire.START, 12, {"action": "turn", "params": {"angle_deg": 45}}))
    bad[len(bad) // 2] ^= 0x20  # the CRC catches it; COBS framing stays intact
    ex.board.host_send(bad)
    send(wire.PING, 13, {})
    run(300000, stop_on=wire.PONG, out=emit)
    run(100000, out=emit)  # anything the corrupted start might (wrongly) have caused

    print("# a new hello with a short watchdog, a long drive, then the host goes silent")
    send(wire.HELLO, 14, {"proto": wire.PROTOCOL_VERSION, "session": SESSION + "b", "watchdog_ms": 300})
    run(200000, stop_on=wire.HUB_INFO, out=emit)
    send(wire.START, 15, {"action": "drive_straight", "telemetry_hz": 20, "params": {"distance_mm": 2000}})
    run(2000000, stop_on=wire.RESULT, out=emit)

    reader = ex.listener._reader
    print("# hub_reader ok=%d bad=%d oversize=%d" % (reader.frames_ok, reader.frames_bad, reader.frames_oversize))
    print("# host_reader ok=%d bad=%d oversize=%d" % (ex.reader.frames_ok, ex.reader.frames_bad,
                                                      ex.reader.frames_oversize))
    # Differs by design: MicroPython's tick counter wraps during the script, CPython's does not.
    print("# ticks first=%d last=%d" % (first_ticks, ex.board.ticks_us()))
    print("# pose s_mm=%d x_mm=%d heading_cdeg=%d t_us=%d" % (ex.board.pose() + (ex.board.now_us,)))


if __name__ == "__main__":
    main()
