"""The `trackproof` command's entry point.

Loading the program takes about a second (numpy, pandas, scipy); Ctrl-C in that second ends it
with exit 130 and one line, as it does later, instead of a traceback through the imports.
"""

from __future__ import annotations

import sys


def main() -> int:
    try:
        from harness.cli import main as run_command

        return run_command()  # handles Ctrl-C itself once a command runs
    except KeyboardInterrupt:  # while loading or reading the command line
        print("trackproof: interrupted while starting; nothing ran", file=sys.stderr)
        return 130
