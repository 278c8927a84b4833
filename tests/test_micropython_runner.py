"""Checks that the MicroPython runner really runs MicroPython and reports faithfully."""

from __future__ import annotations

import binascii
from pathlib import Path

import pytest

import micropython_runner
from micropython_runner import MicroPythonError, run_micropython


def test_runs_micropython_not_cpython() -> None:
    out = run_micropython("import sys\nprint(sys.implementation.name)\nprint(__name__)", [])
    assert out == "micropython\n__main__\n"


def test_script_given_as_path(tmp_path: Path) -> None:
    script = tmp_path / "script.py"
    script.write_text("print(6 * 7)\n")
    assert run_micropython(script, []) == "42\n"


def test_package_dir_is_importable(tmp_path: Path) -> None:
    pkg = tmp_path / "pkgx"
    (pkg / "sub").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    (pkg / "mod.py").write_text("def double(x):\n    return 2 * x\n")
    # A sub-folder and a relative import check that the tree is copied as a tree.
    (pkg / "sub" / "__init__.py").write_text("")
    (pkg / "sub" / "deep.py").write_text("from ..mod import double\n\ndef quad(x):\n    return double(double(x))\n")
    (pkg / "notes.txt").write_text("not python")

    script = "import os\nfrom pkgx.mod import double\nfrom pkgx.sub.deep import quad\nprint(double(21), quad(5))\nprint(sorted(os.listdir('/lib/pkgx')))\n"
    out = run_micropython(script, [pkg])
    assert out == "42 20\n['__init__.py', 'mod.py', 'sub']\n"


def test_exception_raises_with_traceback() -> None:
    with pytest.raises(MicroPythonError) as info:
        run_micropython("print('before')\nraise ValueError('bad reading 17')\n", [])
    message = str(info.value)
    assert "Traceback" in message
    assert "ValueError: bad reading 17" in message
    assert "before" in message  # stdout up to the failure helps debugging


def test_sys_exit_zero_is_success_and_nonzero_is_failure() -> None:
    assert run_micropython("import sys\nprint('done')\nsys.exit(0)\n", []) == "done\n"
    with pytest.raises(MicroPythonError, match="SystemExit: 3"):
        run_micropython("import sys\nsys.exit(3)\n", [])


def test_bytes_arrive_intact() -> None:
    payload = bytes(range(256))
    script = (
        "import sys, binascii\n"
        "data = bytes(range(256))\n"
        "print(binascii.hexlify(data).decode())\n"
        # Raw UTF-8 bytes written byte by byte, and output with no final newline.
        "sys.stdout.buffer.write(b'\\xc2\\xb0C')\n"
        "sys.stdout.write('\\r\\nend')\n"
    )
    out = run_micropython(script, [])
    assert out == binascii.hexlify(payload).decode() + "\n°C\r\nend"


def test_large_output_is_complete() -> None:
    out = run_micropython("for i in range(20000):\n    print('%05d' % i)\n", [])
    lines = out.splitlines()
    assert len(lines) == 20000
    assert lines[-1] == "19999"


def test_missing_package_gives_setup_instructions(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    monkeypatch.setattr(micropython_runner, "PACKAGE_ENTRY", tmp_path / "absent.mjs")
    with pytest.raises(RuntimeError, match="npm ci --prefix tests/micropython"):
        run_micropython("print(1)", [])


def test_missing_node_gives_setup_instructions(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(micropython_runner.shutil, "which", lambda name: None)
    with pytest.raises(RuntimeError, match="npm ci --prefix tests/micropython"):
        run_micropython("print(1)", [])
