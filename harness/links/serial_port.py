"""USB serial links with pyserial, and the list of candidate ports for `trackproof links`."""

from __future__ import annotations

from dataclasses import dataclass

import serial
from serial.tools import list_ports

from harness.errors import LinkError
from harness.links.base import Link

DEFAULT_BAUD = 115200

# USB vendor:product ids of MicroPython's own USB stacks and of common USB-UART bridge chips
# (TECH-NOTES §2: the first three read in MicroPython's source, the bridges known from practice).
# A port with one of these ids is a likely hub; any USB serial port can still be chosen by name.
LIKELY_HUB_IDS = {
    (0x2E8A, 0x0005), (0xF055, 0x9800), (0xF055, 0x9801), (0xF055, 0x9802),
    (0x10C4, 0xEA60), (0x1A86, 0x7523), (0x1A86, 0x55D4), (0x0403, 0x6001), (0x0403, 0x6015),
}
LIKELY_HUB_VENDORS = {0x303A}  # boards with native USB that set their own product id


@dataclass(frozen=True)
class PortInfo:
    device: str
    description: str
    vid: int | None
    pid: int | None
    serial_number: str | None

    @property
    def usb_id(self) -> str:
        return f"{self.vid:04X}:{self.pid:04X}" if self.vid is not None and self.pid is not None else "-"

    @property
    def likely_hub(self) -> bool:
        return (self.vid, self.pid) in LIKELY_HUB_IDS or self.vid in LIKELY_HUB_VENDORS


def serial_ports() -> list[PortInfo]:
    """USB serial ports, likely hubs first, then by device name."""
    ports = [PortInfo(p.device, p.description or "", p.vid, p.pid, p.serial_number)
             for p in list_ports.comports() if p.vid is not None]
    return sorted(ports, key=lambda p: (not p.likely_hub, p.device))


def pick_port(ports: list[PortInfo]) -> PortInfo | None:
    """The port `--link serial:auto` would use: the one likely hub, or None if there is not
    exactly one (guessing between two robots at a venue is how the wrong one moves)."""
    likely = [p for p in ports if p.likely_hub]
    return likely[0] if len(likely) == 1 else None


def auto_port() -> str:
    """The port for `--link serial:auto`; LinkError saying why when there is no single choice."""
    ports = serial_ports()
    chosen = pick_port(ports)
    if chosen is None:
        found = ", ".join(f"{p.device} ({p.usb_id})" for p in ports) or "no USB serial ports"
        raise LinkError(f"serial:auto needs exactly one likely hub; found {found}. "
                        "Name the port: --link serial:PORT")
    return chosen.device


class SerialLink(Link):
    """A serial port opened raw and exclusive; reads return as soon as any byte arrives."""

    def __init__(self, port: str, baud: int = DEFAULT_BAUD) -> None:
        self.name = f"serial:{port}"
        self.port_name = port
        try:
            # exclusive: a second program on the same port would steal half the frames.
            self._port = serial.serial_for_url(port, baudrate=baud, timeout=0, write_timeout=2.0,
                                               exclusive=True)
        except (serial.SerialException, OSError, ValueError) as exc:
            raise LinkError(f"cannot open serial port {port}: {exc}{_hint(exc)}") from None
        self._timeout: float | None = 0
        # A native USB port may hold bytes the hub sent before we connected: start clean.
        self._port.reset_input_buffer()

    def write(self, data: bytes) -> None:
        try:
            self._port.write(data)
        except (serial.SerialException, OSError) as exc:
            raise LinkError(f"serial link {self.port_name} lost while writing: {exc}") from None

    def read(self, timeout_s: float) -> bytes:
        port = self._port
        try:
            waiting = port.in_waiting
            if waiting:
                return port.read(waiting)
            if timeout_s <= 0:
                return b""
            # Setting the timeout reconfigures the port, so only do it when it really changes.
            timeout_s = round(timeout_s, 3) or 0.001
            if timeout_s != self._timeout:
                port.timeout = self._timeout = timeout_s
            first = port.read(1)
            if not first:
                return b""
            waiting = port.in_waiting
            return first + port.read(waiting) if waiting else first
        except (serial.SerialException, OSError) as exc:
            raise LinkError(f"serial link {self.port_name} lost: {exc}") from None

    def close(self) -> None:
        try:
            self._port.close()
        except (serial.SerialException, OSError):
            pass


def _hint(exc: Exception) -> str:
    text = str(exc).lower()
    if "permission" in text:
        return " (on Linux, add yourself to the dialout group and log in again)"
    if "lock" in text or "busy" in text:
        return " (another program has it open; close it first)"
    if "no such file" in text or "could not open" in text:
        return " (is the hub plugged in? `trackproof links` lists the ports)"
    return ""
