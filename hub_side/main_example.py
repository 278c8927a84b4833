"""How a team starts the trackproof listener on its hub. Copy this file to the board as /main.py
(`trackproof hub install PORT --main-example` does that), then edit ROBOT_ID, LINK and CONFIG.

SAFETY. A robot that drives by itself can pinch fingers and run off a table: try new moves with
the wheels off the ground first, keep the course away from table edges, and keep a hand near the
stop button. Lithium batteries: charge them only with a matching charger, never unattended or
overnight, stop using a swollen or damaged pack, and store them part-charged. Follow the venue's
rules and the maker's instructions for the hub, motors and battery.

At power-on: keep the robot still for about two seconds while the gyro bias is measured. Hold
the stop button while powering on to skip the listener (the REPL stays free for tools); hold it
for two seconds while the listener runs to end the program.
"""

import time

from hub_side.boards.machine_board import MachineBoard
from hub_side.board import ticks_diff
from hub_side.listener import Listener

ROBOT_ID = "robot-1"  # the id in your robot profile; over Bluetooth also the advertised name
LINK = "usb"  # "usb" (the USB serial console) or "ble" (Bluetooth LE)
# The same text as [link] secret in the robot profile, or None. With a secret set, the hub only
# obeys a host that proves it knows it (see docs/links.md); keep this file private then.
SECRET = None
START_DELAY_MS = 1500  # Ctrl-C still works during this pause, so tools can break in
STOP_HOLD_MS = 2000

# Pin numbers are examples: use your board's. See hub_side/boards/machine_board.py for every key.
CONFIG = {
    "left_motor_pins": (0, 1),
    "right_motor_pins": (2, 3),
    "right_motor_reversed": True,  # motors mounted mirror-image: one turns the other way
    "left_encoder_pins": (4, 5),
    "right_encoder_pins": (6, 7),
    "right_encoder_reversed": True,
    "encoder_counts_per_rev": 1440,  # x4 edges per wheel-shaft turn: lines x 4 x gear ratio
    # (name, ADC pin, raw over black, raw over white); names must match the robot profile.
    "reflectance": [
        ("line_left", 26, 52000, 9000),
        ("line_right", 27, 52000, 9000),
    ],
    "imu_scl_pin": 9,
    "imu_sda_pin": 8,
    "battery_adc_pin": 28,
    "battery_divider": 3.0,
    "stop_button_pin": 15,
}


def make_link(kind, name):
    if kind == "ble":
        from hub_side.ble_uart import BleUartLink

        return BleUartLink(name)
    from hub_side.usb_serial import UsbSerialLink

    return UsbSerialLink()


def build(config=CONFIG, link=None, clock=None, robot_id=ROBOT_ID, secret=SECRET):
    """The board, the link and the listener with the team's routines registered."""
    board = MachineBoard(config, link if link is not None else make_link(LINK, robot_id), clock=clock)
    listener = Listener(board, robot_id=robot_id, secret=secret)

    # A team routine: run it from a suite like an action, e.g. action = "square".
    @listener.routine("square", {"side_mm": ("num", 200.0, 20.0, 2000.0),
                                 "speed_pct": ("num", 40.0, 5.0, 100.0),
                                 "timeout_s": ("num", 60.0, 1.0, 600.0)})
    def square(ctx, params):
        for _ in range(4):
            yield from ctx.run("drive_straight", {"distance_mm": params["side_mm"],
                                                  "speed_pct": params["speed_pct"]})
            yield from ctx.run("turn", {"angle_deg": 90, "mode": "spin", "speed_pct": 30})
        return {"sides": 4}

    return board, listener


def serve_until_button(board, listener, hold_ms=STOP_HOLD_MS):
    """listener.serve(), except that holding the stop button for hold_ms ends it. (A short press
    while a move runs stops the move: the listener checks the button itself.)"""
    held_since = None
    while True:
        board.idle_us(min(listener.tick(), 2000))
        if not board.button_pressed():
            held_since = None
        elif held_since is None:
            held_since = board.ticks_us()
        elif ticks_diff(board.ticks_us(), held_since) >= hold_ms * 1000:
            return


def main():
    time.sleep_ms(START_DELAY_MS)
    board, listener = build()
    try:
        if not board.button_pressed():
            serve_until_button(board, listener)
    finally:
        board.close()  # motors off; Ctrl-C and the REPL work again


if __name__ == "__main__":
    main()
