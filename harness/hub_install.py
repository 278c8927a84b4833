"""`trackproof hub install PORT`: copy the hub_side package onto a MicroPython board over USB.

Every .py file of hub_side (sub-packages included) goes to /lib/hub_side on the board, through
the board's raw REPL with mpremote's SerialTransport (TECH-NOTES §6). Files of an older install
that no longer exist are removed, each copy is checked by its SHA-256 on the board, and the
board's /main.py is left alone unless the example is asked for (and an existing one is only
replaced when that is asked for too).
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import io
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import serial
from serial.tools import list_ports

import hub_side
from harness.errors import InputError, LinkError

HUB_DIR = Path(hub_side.__file__).resolve().parent
TARGET_DIR = "/lib/hub_side"
MAIN_PATH = "/main.py"
EXAMPLE_NAME = "main_example.py"
DEFAULT_BAUD = 115200
CHUNK_BYTES = 512  # per raw-REPL command; small enough for the heap of any board

# What a device-side snippet prints; names are printed with repr() so any name survives.
_LIST_SNIPPET = """import os
try:
 for e in os.ilistdir({path!r}):
  print(repr((e[0], e[1] & 0x4000 != 0)))
except OSError:
 pass"""
_MKDIR_SNIPPET = """import os
try:
 os.mkdir({path!r})
except OSError:
 if not os.stat({path!r})[0] & 0x4000:
  raise"""
_EXISTS_SNIPPET = """import os
try:
 os.stat({path!r})
 print(1)
except OSError:
 print(0)"""


def hub_files(root: Path = HUB_DIR) -> list[tuple[Path, str]]:
    """(host file, path relative to the package, with '/') of every .py file, sorted."""
    found = []
    for path in sorted(root.rglob("*.py")):
        rel = path.relative_to(root)
        if "__pycache__" in rel.parts:
            continue
        found.append((path, rel.as_posix()))
    return found


def _serial_transport(port: str, baudrate: int, timeout_s: float) -> Any:
    from mpremote.transport_serial import SerialTransport

    # A read timeout: on a pseudo-terminal mpremote reads byte by byte and would otherwise wait
    # forever for a device that says nothing.
    transport = SerialTransport(port, baudrate=baudrate, timeout=min(timeout_s, 2.0))
    return transport


def _open_problem(port: str, baudrate: int) -> str:
    """Why the port cannot be opened, in words a user can act on (mpremote only says 'failed')."""
    if port.startswith("/") and not os.path.exists(port):
        return _missing(port)
    try:
        probe = serial.serial_for_url(port, baudrate=baudrate, exclusive=True, timeout=0)
    except (serial.SerialException, OSError, ValueError) as exc:
        code = getattr(exc, "errno", None)
        text = str(exc).lower()
        if code == errno.ENOENT or "no such file" in text or "cannot find the file" in text:
            return _missing(port)
        # Some systems say "access is denied" for a port another program holds.
        if code in (errno.EBUSY, errno.EAGAIN) or "lock" in text or "busy" in text or "access is denied" in text:
            return (f"serial port {port} is busy: another program has it open (a terminal, an "
                    "editor's REPL, or a trackproof session); close it and try again")
        if code == errno.EACCES or "permission" in text:
            return (f"no permission to open serial port {port} (on Linux, add yourself to the "
                    "dialout group and log in again)")
        return f"cannot open serial port {port}: {exc}"
    probe.close()
    return f"cannot open serial port {port} (it opened on a second try; try again)"


def _missing(port: str) -> str:
    ports = sorted(p.device for p in list_ports.comports())
    listed = ", ".join(ports) if ports else "none"
    return f"serial port {port} does not exist: is the board plugged in? (serial ports now: {listed})"


def _not_a_repl(port: str, seen: str, timeout_s: float) -> LinkError:
    shown = seen.strip()[-200:] or "nothing"
    return LinkError(
        f"{port} did not answer like a MicroPython REPL within {timeout_s:g} s (it sent: {shown}). "
        "Is MicroPython installed on the board? If its main.py runs the trackproof listener, "
        "that ignores Ctrl-C: hold the stop button while resetting the board (the example "
        "main.py then skips the listener) and try again.")


def _device_path(rel: str) -> str:
    return f"{TARGET_DIR}/{rel}"


def install_hub(port: str, *, main_example: bool = False, replace_main: bool = False,
                baudrate: int = DEFAULT_BAUD, timeout_s: float = 10.0, raw_paste: bool = True,
                source_dir: Path = HUB_DIR,
                transport_factory: Callable[[str, int, float], Any] | None = None,
                echo: Callable[[str], None] = print) -> list[str]:
    """Copy hub_side to /lib/hub_side on the MicroPython board at `port`; return the paths
    written on the board.

    main_example: also install hub_side/main_example.py as the board's /main.py, so the
    listener starts at power-on. An existing /main.py is then only replaced with
    replace_main=True; without it nothing is copied and InputError says so. Without
    main_example the board's /main.py is never touched.

    raw_paste: use the REPL's flow-controlled raw-paste mode where the board offers it (mpremote
    falls back by itself where it does not); False sends plain raw-REPL commands, slower but
    needed for the WebAssembly REPL used in tests, which stalls in raw-paste mode.

    Raises LinkError when the port is missing, busy or not a MicroPython REPL, or the copy
    fails; InputError for a /main.py that would be replaced without replace_main.
    """
    from mpremote.transport import TransportError

    files = hub_files(source_dir)
    if not files:
        raise InputError(f"no .py files in {source_dir}", key="hub_side")
    example = source_dir / EXAMPLE_NAME
    if main_example and not example.is_file():
        raise InputError(f"{example} is missing", key="main_example")

    factory = transport_factory or _serial_transport
    try:
        transport = factory(port, baudrate, timeout_s)
    except TransportError:
        raise LinkError(_open_problem(port, baudrate)) from None
    except (serial.SerialException, OSError) as exc:
        raise LinkError(f"cannot open serial port {port}: {exc}") from None
    transport.use_raw_paste = raw_paste
    try:
        noise = io.StringIO()
        try:
            with contextlib.redirect_stdout(noise):  # mpremote prints what it saw on failure
                transport.enter_raw_repl(soft_reset=True, timeout_overall=timeout_s)
        except TransportError:
            raise _not_a_repl(port, noise.getvalue(), timeout_s) from None
        written = _copy(transport, files, main_example, replace_main, example, echo)
        transport.exit_raw_repl()
    except TransportError as exc:
        raise LinkError(f"copying to the board on {port} failed: {exc}") from None
    except (serial.SerialException, OSError) as exc:
        raise LinkError(f"serial port {port} failed during the copy: {exc}") from None
    finally:
        with contextlib.suppress(Exception):
            transport.close()
    echo(f"installed {len(written)} files on {port}; reset the board to run the new code")
    return written


def _exists(transport: Any, path: str) -> bool:
    # Not transport.fs_exists: it decodes the board's errno numbers, which differ between ports.
    return transport.exec(_EXISTS_SNIPPET.format(path=path)).strip() == b"1"


def _listdir(transport: Any, path: str) -> list[tuple[str, bool]]:
    import ast

    out = transport.exec(_LIST_SNIPPET.format(path=path)).decode("utf-8", "replace")
    return [ast.literal_eval(line) for line in out.splitlines() if line.strip()]


def _copy(transport: Any, files: list[tuple[Path, str]], main_example: bool, replace_main: bool,
          example: Path, echo: Callable[[str], None]) -> list[str]:
    if main_example and not replace_main and _exists(transport, MAIN_PATH):
        raise InputError(f"the board already has {MAIN_PATH}; it was left as it is (nothing "
                         "copied). Replace it on purpose with replace_main (--replace-main)",
                         key="main_example")

    wanted = {_device_path(rel) for _, rel in files}
    dirs = sorted({TARGET_DIR} | {_device_path(rel).rsplit("/", 1)[0] for _, rel in files})
    for path in ["/lib"] + dirs:
        transport.exec(_MKDIR_SNIPPET.format(path=path))
    for directory in dirs:
        for name, is_dir in _listdir(transport, directory):
            path = f"{directory}/{name}"
            if not is_dir and name.endswith((".py", ".mpy")) and path not in wanted:
                transport.fs_rmfile(path)  # left from an older install; an .mpy would shadow
                echo(f"removed stale {path}")

    plan = [(host, f"hub_side/{rel}", _device_path(rel)) for host, rel in files]
    if main_example:
        plan.append((example, f"hub_side/{EXAMPLE_NAME}", MAIN_PATH))
    written = []
    for host, label, dest in plan:
        data = host.read_bytes()
        transport.fs_writefile(dest, data, chunk_size=CHUNK_BYTES)
        if transport.fs_hashfile(dest, "sha256") != hashlib.sha256(data).digest():
            raise LinkError(f"{dest} on the board does not match {host} after copying; try again")
        echo(f"copied {label} -> {dest} ({len(data)} bytes)")
        written.append(dest)
    return written
