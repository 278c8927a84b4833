"""Links: the byte path between the host and a hub (see base.py for the link strings).

    base.py         the Link interface and link strings
    simlink.py      the simulated robot in this process, virtual time
    serial_port.py  USB serial (pyserial), and the port list for `trackproof links`
    ble.py          Bluetooth LE (bleak), our byte-pipe service
    faults.py       a wrapper that damages bytes, for rehearsal and tests
"""

from harness.links.base import Link, LinkSpec, parse_link
from harness.links.faults import Faults, FaultyLink, parse_faults
from harness.links.simlink import SimLink

__all__ = ["Faults", "FaultyLink", "Link", "LinkSpec", "SimLink", "parse_faults", "parse_link"]
