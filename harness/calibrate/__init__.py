"""`trackproof calibrate ...`: measure the robot and recommend correction factors.

    distance.py   distance correction factor, and stop overrun by speed
    turns.py      spin_scale and pivot_scale from gyro-measured turns
    odometry.py   the UMBmark bidirectional square test (Borenstein & Feng, 1996)
    writeback.py  recommended values into the robot profile, keeping its comments and layout

Each command module offers add_parser(subparsers) to register itself.
"""

from __future__ import annotations

import argparse
import importlib

COMMANDS = ("distance", "turns", "odometry")


def add_calibrate_parser(sub: argparse._SubParsersAction) -> None:
    calibrate = sub.add_parser("calibrate", help="measure the robot and recommend correction factors")
    calibrate_sub = calibrate.add_subparsers(dest="calibrate_command", required=True)
    for name in COMMANDS:
        importlib.import_module(f"harness.calibrate.{name}").add_parser(calibrate_sub)
