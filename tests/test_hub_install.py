"""install_hub against a real MicroPython REPL: the WebAssembly interpreter behind a
pseudo-terminal (tests/micropython/repl_bridge.mjs), reached through mpremote's SerialTransport
exactly as a board on USB would be. Files are checked by reading them back over the REPL."""

from __future__ import annotations

import os
import pty
import subprocess
import threading
import time
import tty
from pathlib import Path

import pytest
import serial

from harness.errors import InputError, LinkError
from harness.hub_install import HUB_DIR, hub_files, install_hub
from micropython_runner import NODE_DIR, _node

BRIDGE = NODE_DIR / "repl_bridge.mjs"


class Pty:
    """A pseudo-terminal: `name` is the port a host program opens; `master` is the board side."""

    def __init__(self) -> None:
        self.master, self.slave = pty.openpty()
        tty.setraw(self.slave)
        self.name = os.ttyname(self.slave)

    def close(self) -> None:
        for fd in (self.master, self.slave):
            try:
                os.close(fd)
            except OSError:
                pass


@pytest.fixture(scope="module")
def board():
    """A MicroPython REPL on a pty, for the whole module (its filesystem persists)."""
    port = Pty()
    proc = subprocess.Popen([_node(), str(BRIDGE)], stdin=port.master, stdout=port.master,
                            stderr=subprocess.PIPE, cwd=NODE_DIR)
    assert proc.stderr.readline().strip() == b"bridge ready"
    yield port.name
    proc.kill()
    proc.wait(timeout=10)
    port.close()


def _transport(port: str):
    from mpremote.transport_serial import SerialTransport

    t = SerialTransport(port, timeout=2)
    t.use_raw_paste = False
    t.enter_raw_repl(soft_reset=False)
    return t


def _on_board(port: str, fn):
    t = _transport(port)
    try:
        return fn(t)
    finally:
        t.exit_raw_repl()
        t.close()


def _tiny_package(root: Path) -> Path:
    pkg = root / "hub_side"
    (pkg / "boards").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    (pkg / "boards" / "__init__.py").write_text("KIND = 'tiny'\n")
    (pkg / "main_example.py").write_text("print('tiny example')\n")
    return pkg


def test_install_on_a_micropython_repl(board: str, tmp_path: Path) -> None:
    team_main = b"print('the team main')\n"

    def prepare(t):
        t.exec("import os\ntry:\n os.mkdir('/lib')\nexcept OSError:\n pass")
        t.exec("import os\ntry:\n os.mkdir('/lib/hub_side')\nexcept OSError:\n pass")
        t.fs_writefile("/main.py", team_main)
        t.fs_writefile("/lib/hub_side/retired_module.py", b"X = 1\n")
        t.fs_writefile("/lib/hub_side/wire.mpy", b"M\x06")  # would shadow the new wire.py

    _on_board(board, prepare)

    # Asked for the example, but the board has its own main.py: refused, nothing copied.
    lines: list[str] = []
    with pytest.raises(InputError, match="already has /main.py"):
        install_hub(board, main_example=True, raw_paste=False, echo=lines.append)
    assert lines == []

    # Replacing main.py on purpose (a tiny package keeps this step fast).
    tiny = _tiny_package(tmp_path)
    install_hub(board, main_example=True, replace_main=True, raw_paste=False, source_dir=tiny,
                echo=lines.append)
    assert "copied hub_side/main_example.py -> /main.py (22 bytes)" in lines
    assert "removed stale /lib/hub_side/retired_module.py" in lines
    assert "removed stale /lib/hub_side/wire.mpy" in lines

    # The real package, without the example: main.py stays what it is.
    lines.clear()
    started = time.monotonic()
    written = install_hub(board, raw_paste=False, echo=lines.append)
    elapsed = time.monotonic() - started
    files = hub_files(HUB_DIR)
    assert {"hub_side/boards/machine_board.py", "hub_side/ble_uart.py", "hub_side/usb_serial.py",
            "hub_side/listener.py", "hub_side/wire.py"} <= {"hub_side/" + rel for _, rel in files}
    assert written == ["/lib/hub_side/" + rel for _, rel in files]
    for host, rel in files:
        assert f"copied hub_side/{rel} -> /lib/hub_side/{rel} ({host.stat().st_size} bytes)" in lines
    assert lines[-1].startswith(f"installed {len(files)} files on {board}")
    assert not any("main.py" in line for line in lines)
    assert elapsed < 30

    def read_back(t):
        listing = {entry.name for entry in t.fs_listdir("/lib/hub_side")}
        boards = {entry.name for entry in t.fs_listdir("/lib/hub_side/boards")}
        wire_src = bytes(t.fs_readfile("/lib/hub_side/wire.py"))
        board_src = bytes(t.fs_readfile("/lib/hub_side/boards/machine_board.py"))
        main_src = bytes(t.fs_readfile("/main.py"))
        # The installed package imports and works on the board's interpreter.
        t.exec("import sys\nfor m in [k for k in sys.modules if k.startswith('hub_side')]:\n del sys.modules[m]")
        imported = t.exec("from hub_side import wire, listener, usb_serial\n"
                          "print(wire.PROTOCOL_VERSION, wire.cobs_decode(wire.cobs_encode(b'a\\x00b')))")
        return listing, boards, wire_src, board_src, main_src, imported

    listing, boards, wire_src, board_src, main_src, imported = _on_board(board, read_back)
    top = {rel for _, rel in files if "/" not in rel}
    assert listing == top | {"boards"}  # stale files gone
    assert boards == {"__init__.py", "machine_board.py"}
    assert wire_src == (HUB_DIR / "wire.py").read_bytes()
    assert board_src == (HUB_DIR / "boards" / "machine_board.py").read_bytes()
    assert main_src == b"print('tiny example')\n"  # untouched by the install without the example
    from hub_side import wire

    assert imported.split() == [str(wire.PROTOCOL_VERSION).encode(), b"b'a\\x00b'"]


def test_missing_port() -> None:
    with pytest.raises(LinkError, match="/dev/no-such-board does not exist: is the board plugged in"):
        install_hub("/dev/no-such-board", echo=lambda line: None)


def test_busy_port() -> None:
    port = Pty()
    holder = serial.Serial(port.name, exclusive=True)
    try:
        with pytest.raises(LinkError, match="is busy: another program has it open"):
            install_hub(port.name, echo=lambda line: None)
    finally:
        holder.close()
        port.close()


def test_not_a_micropython_repl() -> None:
    """Something answers on the port, but not a MicroPython REPL (a modem-like device here)."""
    port = Pty()
    stop = threading.Event()

    def answer() -> None:
        while not stop.is_set():
            try:
                data = os.read(port.master, 256)
            except OSError:
                return
            if data:
                os.write(port.master, b"\r\nOK\r\n")

    thread = threading.Thread(target=answer, daemon=True)
    thread.start()
    try:
        started = time.monotonic()
        with pytest.raises(LinkError, match="did not answer like a MicroPython REPL within 1 s") as info:
            install_hub(port.name, timeout_s=1.0, echo=lambda line: None)
        assert "OK" in str(info.value)  # what it did send is shown
        assert "stop button" in str(info.value)
        assert time.monotonic() - started < 6
    finally:
        stop.set()
        port.close()
        thread.join(timeout=5)


class BrokenTransport:
    """Enters the raw REPL, then the board stops answering halfway through the copy."""

    use_raw_paste = True

    def __init__(self) -> None:
        from mpremote.transport import TransportError

        self.error = TransportError
        self.closed = False
        self.writes: list[str] = []

    def enter_raw_repl(self, soft_reset=True, timeout_overall=10) -> None:
        pass

    def exec(self, command, data_consumer=None) -> bytes:
        return b""

    def fs_writefile(self, dest, data, chunk_size=256) -> None:
        self.writes.append(dest)
        if len(self.writes) == 2:
            raise self.error("timeout waiting for first EOF reception")

    def fs_hashfile(self, path, algo, chunk_size=256) -> bytes:
        import hashlib

        return hashlib.sha256((HUB_DIR / path.removeprefix("/lib/hub_side/")).read_bytes()).digest()

    def exit_raw_repl(self) -> None:
        pass

    def close(self) -> None:
        self.closed = True


def test_a_failure_mid_copy_is_a_link_error_and_closes_the_port() -> None:
    # A fake transport: a board that stops answering cannot be made on the WebAssembly REPL.
    fake = BrokenTransport()
    lines: list[str] = []
    with pytest.raises(LinkError, match="copying to the board on COM7 failed: timeout waiting"):
        install_hub("COM7", transport_factory=lambda *a: fake, echo=lines.append)
    assert fake.closed
    assert len(fake.writes) == 2 and len(lines) == 1
