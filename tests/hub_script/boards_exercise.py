"""Exercise the real-hardware hub modules (machine_board, usb_serial, ble_uart) against the fake
`machine` and `bluetooth` modules in tests/hub_fakes, with the unchanged listener on top.

Runs under CPython (PYTHONPATH = repo root and tests/hub_fakes) and under MicroPython (hub_side,
hub_fakes and this folder copied to /lib). Prints one "name json" line per check;
tests/test_hub_boards.py runs both and compares.
"""

import sys

if sys.implementation.name == "micropython":
    sys.path.insert(0, "/lib/hub_fakes")

import time

import bluetooth
import machine

from hub_side import wire
from hub_side.ble_uart import BleUartLink, advertising_payloads
from hub_side.boards.machine_board import MachineBoard
from hub_side.listener import Listener
from hub_side.usb_serial import UsbSerialLink

try:
    from exercise import canon  # CPython: this file's folder is sys.path[0]
    from memory_link import MemoryLink
except ImportError:
    from hub_script.exercise import canon  # MicroPython: copied to /lib/hub_script
    from hub_script.memory_link import MemoryLink

MICROPYTHON = sys.implementation.name == "micropython"




def out(name, value):
    print(name + " " + canon(value))


def hexs(data):
    return "".join("%02x" % b for b in data)


class VirtualClock:
    """ticks_us / sleep_us in virtual time. On MicroPython it starts 1 s before the 2**30 tick
    wrap, so the board's tick arithmetic is exercised across a wrap."""

    def __init__(self):
        self.now_us = 0
        self.origin = (1 << 30) - 1000000 if MICROPYTHON else 0

    def ticks_us(self):
        if MICROPYTHON:
            return time.ticks_add(self.origin, self.now_us)
        return self.now_us

    def sleep_us(self, us):
        if us > 0:
            self.now_us += us


class Imu:
    """A 6-axis IMU on the fake I2C bus: gyro Z raw = bias + rate (+ a wobble while shaken)."""

    def __init__(self, bias_raw):
        self.bias_raw = bias_raw
        self.rate_raw = 0
        self.shake = 0
        self.writes = []
        self._n = 0

    def read(self, reg, n):
        if reg != 0x47 or n != 2:
            raise OSError(5)
        self._n += 1
        value = self.bias_raw + self.rate_raw + (self.shake if self._n % 2 else -self.shake)
        value &= 0xFFFF
        return bytes(((value >> 8) & 0xFF, value & 0xFF))

    def write(self, reg, data):
        self.writes.append([reg, hexs(data)])


PINS = {
    "left_motor_pins": (10, 11),
    "right_motor_pins": (12, 13),
    "left_encoder_pins": (20, 21),
    "right_encoder_pins": (22, 23),
    "encoder_counts_per_rev": 1440,
    "right_motor_reversed": True,
    "right_encoder_reversed": True,
    "reflectance": [("line_left", 30, 50000, 10000), ("line_right", 31, 8000, 56000)],
    "imu_scl_pin": 5,
    "imu_sda_pin": 4,
    "battery_adc_pin": 40,
    "battery_divider": 3.0,
    "stop_button_pin": 15,
}

# Quadrature states (A << 1 | B) with A leading B: the wheel driving forward.
FORWARD = ((1, 0), (1, 1), (0, 1), (0, 0))


def turn_encoder(pins, edges, backward=False):
    """Drive an encoder's two pins through `edges` single-channel changes."""
    a, b = pins
    seq = FORWARD
    if backward:
        seq = ((0, 1), (1, 1), (1, 0), (0, 0))
    for i in range(edges):
        level_a, level_b = seq[i % 4]
        machine.drive_pin(a, level_a)
        machine.drive_pin(b, level_b)


def make_board(link, imu_bias=40, shake=0):
    machine.reset()
    for pin in PINS["left_encoder_pins"] + PINS["right_encoder_pins"]:
        machine.drive_pin(pin, 0)  # encoders rest with both channels low
    imu = Imu(imu_bias)
    imu.shake = shake
    machine.attach_i2c(0, 0x68, imu)
    clock = VirtualClock()
    board = MachineBoard(PINS, link, clock=clock)
    return board, imu, clock


def check_machine_board():
    link = MemoryLink()
    board, imu, clock = make_board(link)
    out("sensor_names", list(board.sensor_names))
    out("capabilities", board.capabilities)
    out("imu_writes", imu.writes)
    out("gyro_bias", board.gyro_bias_raw)
    out("pwm_freq", [machine.pwm_freq(p) for p in (10, 11, 12, 13)])
    out("irq_hard", [p.hard for p in machine._pins[20]])

    # Encoders: 720 edges forward on the left (half a revolution at 1440 counts). The right
    # encoder is mounted mirrored: its wheel driving forward gives the backward waveform.
    turn_encoder((20, 21), 720)
    turn_encoder((22, 23), 360, backward=True)
    out("encoders_after_turning", list(board.encoders_deg()))
    turn_encoder((22, 23), 720)
    out("encoders_right_back", list(board.encoders_deg()))
    turn_encoder((20, 21), 4, backward=True)  # one full cycle back: -4 counts = -1 degree
    out("encoders_after_back", list(board.encoders_deg()))
    # A missed edge (both channels change at once) must count neither way.
    before = board._encoders[0].count
    machine.drive_pin(20, 1)
    machine.drive_pin(21, 1)  # from state 0 to 2 to 3 is normal; now jump 3 -> 0:
    levels_before = board._encoders[0].count
    machine._levels[20] = 0  # both change "at once", then one interrupt fires
    machine.drive_pin(21, 0)
    out("missed_edge_counts", [levels_before - before, board._encoders[0].count - levels_before])

    # Motors: left forward 50 %, right (mirrored motor) backward 25 %, then brake.
    board.set_power(50, -25)
    out("pwm_50_m25", [machine.pwm_duty(p) for p in (10, 11, 12, 13)])
    board.set_power(-100, 100)
    out("pwm_m100_100", [machine.pwm_duty(p) for p in (10, 11, 12, 13)])
    board.set_power(0, 0)
    out("pwm_0_0", [machine.pwm_duty(p) for p in (10, 11, 12, 13)])
    board.set_power(250, -0.4)
    out("pwm_clamped", [machine.pwm_duty(p) for p in (10, 11, 12, 13)])

    # Reflectance: line_left reads high over black (50000) and low over white (10000).
    readings = []
    for raw_left, raw_right in ((30000, 32000), (60000, 2000), (5000, 60000), (50000, 8000)):
        machine.set_adc(30, raw_left)
        machine.set_adc(31, raw_right)
        readings.append([board.reflectance_pct("line_left"), board.reflectance_pct("line_right")])
    out("reflectance", readings)
    board.calibrate("line_right", 0, 40000)
    machine.set_adc(31, 10000)
    out("reflectance_recalibrated", board.reflectance_pct("line_right"))
    try:
        board.reflectance_pct("nose")
        out("unknown_sensor", "no error")
    except ValueError as exc:
        out("unknown_sensor", str(exc))

    # Gyro: the chip turns at -90 deg/s about its Z (clockwise seen from above, chip face up)
    # for one second of idling, then +45 deg/s for 1 s read only through heading_deg().
    out("heading_start", board.heading_deg())
    imu.rate_raw = -90 * 131
    for _ in range(500):
        board.idle_us(2000)
    out("heading_after_cw_90", round(board.heading_deg(), 3))
    imu.rate_raw = 45 * 131
    for _ in range(100):
        clock.sleep_us(10000)
        board.heading_deg()
    out("heading_after_ccw_45", round(board.heading_deg(), 3))
    imu.rate_raw = 0
    board.idle_us(100000)
    out("virtual_time_us", clock.now_us)

    # Battery: 40000 / 65535 of 3.3 V, times a 3:1 divider.
    machine.set_adc(40, 40000)
    out("battery_mv", board.battery_mv())

    # Stop button to ground with the pull-up.
    pressed = [board.button_pressed()]
    machine.drive_pin(15, 0)
    pressed.append(board.button_pressed())
    machine.drive_pin(15, 1)
    pressed.append(board.button_pressed())
    out("button", pressed)

    board.close()
    out("closed", [link.closed, machine._pins[20][-1]._handler is None, machine.pwm_duty(10)])

    # A robot moved during start-up: the bias cannot be trusted, and the board says so.
    shaken, _, _ = make_board(MemoryLink(), imu_bias=-25, shake=400)
    out("shaken_capabilities", [shaken.gyro_still, shaken.capabilities["gyro_still_at_start"]])
    still, _, _ = make_board(MemoryLink(), imu_bias=-25, shake=30)  # 60 LSB spread < 131
    out("small_noise_still", [still.gyro_still, still.gyro_bias_raw])

    try:
        MachineBoard({"left_motor_pins": (1, 2)}, MemoryLink(), clock=VirtualClock())
        out("missing_key", "no error")
    except ValueError as exc:
        out("missing_key", str(exc))
    bad = dict(PINS)
    bad["left_motor_pin"] = 3
    try:
        MachineBoard(bad, MemoryLink(), clock=VirtualClock())
        out("unknown_key", "no error")
    except ValueError as exc:
        out("unknown_key", str(exc))


# ---------------------------------------------------------------- USB serial

if MICROPYTHON:
    import io

    class PipeStream(io.IOBase):
        """A byte stream select.poll understands (MicroPython's stream ioctl protocol)."""

        def __init__(self):
            self.data = bytearray()
            self.reads = 0

        def readinto(self, buf):
            self.reads += 1
            n = min(len(buf), len(self.data))
            for i in range(n):
                buf[i] = self.data[i]
            self.data = self.data[n:]
            return n

        def write(self, data):
            self.data.extend(data)
            return len(data)

        def ioctl(self, req, arg):
            if req == 3:  # MP_STREAM_POLL: report readable only with data waiting
                return 1 if (arg & 1) and self.data else 0
            return 0

    def make_streams():
        rx = PipeStream()
        tx = PipeStream()
        return rx, rx.write, tx, lambda: bytes(tx.data)

else:
    import os

    def make_streams():
        r, w = os.pipe()
        rx = os.fdopen(r, "rb", buffering=0)
        writer = os.fdopen(w, "wb", buffering=0)
        tx = bytearray()

        class Sink:
            def write(self, data):
                tx.extend(data)
                return len(data)

        return rx, writer.write, Sink(), lambda: bytes(tx)


def check_usb_serial():
    calls = []
    rx, feed, tx, sent = make_streams()
    link = UsbSerialLink(stdin=rx, stdout=tx, read_max=16, kbd_intr=calls.append)
    out("kbd_intr_open", calls)
    out("usb_read_empty", hexs(link.read()))
    payload = bytes(range(40))  # holds 0x03 (Ctrl-C) and 0x00
    feed(payload)
    pieces = []
    while True:
        piece = link.read()
        if not piece:
            break
        pieces.append(len(piece))
        if len(pieces) > 10:
            break
    out("usb_read_pieces", pieces)

    # The listener over this link: a HELLO in, HUB_INFO out.
    board, _, clock = make_board(link)
    listener = Listener(board, robot_id="usb-bot")
    hello = wire.encode_message(wire.HELLO, 1, {"proto": wire.PROTOCOL_VERSION, "session": "s1",
                                                "watchdog_ms": 1000})
    feed(hello)
    reader = wire.FrameReader()
    frames = []
    seen = 0
    for _ in range(20):
        board.idle_us(min(listener.tick(), 2000))
        got = sent()
        frames.extend(reader.feed(got[seen:]))
        seen = len(got)
        if any(t == wire.HUB_INFO for t, s, b in frames):
            break
    info = [wire.decode_json(body) for t, s, body in frames if t == wire.HUB_INFO]
    out("usb_hub_info", [info[0]["robot_id"], info[0]["sensors"]] if info else None)
    board.close()
    out("kbd_intr_closed", calls)
    out("usb_read_after_close", hexs(link.read()))
    try:
        link.write(b"x")
        out("usb_write_after_close", "no error")
    except OSError:
        out("usb_write_after_close", "OSError")

    if MICROPYTHON:
        # The real console and the real micropython.kbd_intr: the WebAssembly stdin is empty
        # and always "ready"; read() must still return at once.
        real = UsbSerialLink()
        out("real_console_read", hexs(real.read()))
        real.close()


# ---------------------------------------------------------------- Bluetooth LE


def run_until(listener, board, central, msg_type, limit=200):
    reader = wire.FrameReader()
    seen = 0
    for _ in range(limit):
        board.idle_us(min(listener.tick(), 2000))
        got = central.received()
        frames = reader.feed(got[seen:])
        seen = len(got)
        for frame in frames:
            if frame[0] == msg_type:
                return frame
    return None


def send_chunked(central, handle, frame):
    step = central.mtu - 3
    sizes = []
    for start in range(0, len(frame), step):
        central.write(handle, frame[start:start + step])
        sizes.append(len(frame[start:start + step]))
    return sizes


def check_ble():
    bluetooth.reset()
    ble = bluetooth.BLE()
    link = BleUartLink("trk-bot-7")
    board, _, _ = make_board(link)
    listener = Listener(board, robot_id="trk-bot-7")
    tx_handle, rx_handle = link._tx_handle, link._rx_handle
    adv, resp = advertising_payloads("trk-bot-7")
    out("ble_adv", [hexs(ble.adv_data), hexs(ble.resp_data), ble.advertising, ble.adv_interval_us])
    out("ble_payloads_match", [hexs(adv) == hexs(ble.adv_data), hexs(resp) == hexs(ble.resp_data)])
    out("ble_mtu_offered", ble.config("mtu"))
    out("ble_connected_before", link.connected)

    central = bluetooth.Central()
    central.connect()
    out("ble_after_connect", [link.connected, ble.advertising])

    hello = wire.encode_message(wire.HELLO, 1, {"proto": wire.PROTOCOL_VERSION, "session": "b1",
                                                "watchdog_ms": 2000})
    out("ble_hello_chunks", send_chunked(central, rx_handle, hello))
    frame = run_until(listener, board, central, wire.HUB_INFO)
    info = wire.decode_json(frame[2]) if frame else {}
    out("ble_hub_info", [info.get("robot_id"), info.get("proto") == wire.PROTOCOL_VERSION])
    sizes = [len(d) for h, d in central.notifications]
    out("ble_notify_before_exchange", [max(sizes), len(sizes), sorted(set(h for h, d in central.notifications)) == [tx_handle]])

    # After an MTU exchange: writes and notifications of up to 97 bytes.
    out("ble_mtu_agreed", central.exchange_mtu(100))
    central.notifications = []
    hello2 = wire.encode_message(wire.HELLO, 2, {"proto": wire.PROTOCOL_VERSION, "session": "b2",
                                                 "watchdog_ms": 2000, "geometry": {"track_mm": 120.0}})
    out("ble_hello2_chunks", send_chunked(central, rx_handle, hello2))
    frame = run_until(listener, board, central, wire.HUB_INFO)
    info = wire.decode_json(frame[2]) if frame else {}
    sizes = [len(d) for h, d in central.notifications]
    out("ble_notify_after_exchange", [max(sizes), sizes[:-1] == [97] * (len(sizes) - 1), len(frame[2]) if frame else 0])
    out("ble_hub_info2", info.get("geometry", {}).get("track_mm"))

    # The central goes away: the hub advertises again; writes meanwhile go nowhere, quietly.
    starts = ble.advertise_starts
    central.disconnect()
    out("ble_after_disconnect", [link.connected, ble.advertising, ble.advertise_starts - starts])
    link.write(b"\x01\x02\x03")

    # A new central connects and talks at the default MTU again.
    again = bluetooth.Central(addr=b"\xc0\x09\x08\x07\x06\x05")
    again.connect()
    ping = wire.encode_message(wire.PING, 3, {})
    send_chunked(again, rx_handle, ping)
    frame = run_until(listener, board, again, wire.PONG)
    out("ble_reconnect_pong", [frame is not None, wire.decode_json(frame[2]).get("ref") if frame else None,
                               max(len(d) for h, d in again.notifications)])

    # Writes that pile up between two reads all arrive, in order.
    for i in range(5):
        again.write(rx_handle, bytes((i,)) * 20)
    queued = link.read()
    out("ble_queued", [len(queued), hexs([queued[i] for i in range(0, len(queued), 20)])])

    # The stack's transmit buffers fill up: a few refusals are retried, and room() tells the
    # listener to hold telemetry back for a moment; a stack that keeps refusing loses the rest.
    again.notifications = []
    out("ble_room_before", link.room() > 1000)
    ble.refuse_notifies = 3
    link.write(b"\x11" * 30)
    out("ble_retried", [hexs(again.received()), link.tx_dropped_bytes, link.room()])
    ble.refuse_notifies = 1000
    link.write(b"\x22" * 30)
    out("ble_refused", [len(again.received()), link.tx_dropped_bytes])
    ble.refuse_notifies = 0
    time.sleep_ms(60) if MICROPYTHON else time.sleep(0.06)
    out("ble_room_later", link.room() > 1000)

    link.close()
    out("ble_closed", [ble.advertising, ble.active(), len(ble.connections)])
    try:
        BleUartLink("a-name-far-too-long-for-the-advert")
        out("ble_long_name", "no error")
    except ValueError as exc:
        out("ble_long_name", str(exc))


def check_main_example():
    from hub_side import main_example

    machine.reset()
    config = main_example.CONFIG
    for pin in config["left_encoder_pins"] + config["right_encoder_pins"]:
        machine.drive_pin(pin, 0)
    machine.attach_i2c(0, 0x68, Imu(12))
    link = MemoryLink()
    clock = VirtualClock()
    board, listener = main_example.build(link=link, clock=clock)
    reader = wire.FrameReader()
    link.rx.extend(wire.encode_message(wire.HELLO, 1, {"proto": wire.PROTOCOL_VERSION, "session": "m",
                                                       "watchdog_ms": 5000}))
    link.rx.extend(wire.encode_message(wire.START, 2, {"action": "square", "params": {"side_mm": 5}}))
    replies = {}
    for _ in range(5):
        board.idle_us(min(listener.tick(), 2000))
        for t, seq, body in reader.feed(link.tx):
            replies[wire.MESSAGE_NAMES[t]] = wire.decode_json(body)
        link.tx = bytearray()
    out("example_routines", replies["hub_info"]["routines"])
    out("example_refusal", [replies["refuse"]["code"], replies["refuse"]["text"]])
    start_us = clock.now_us
    machine.drive_pin(config["stop_button_pin"], 0)
    main_example.serve_until_button(board, listener)
    out("example_button_hold_ms", (clock.now_us - start_us) // 1000)
    board.close()
    out("example_closed", link.closed)


check_machine_board()
check_usb_serial()
check_ble()
check_main_example()
print("done")
