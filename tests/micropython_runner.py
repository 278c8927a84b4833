"""Run Python code under MicroPython (WebAssembly, via Node) from pytest.

The hub runs MicroPython, so hub-side code is tested on that interpreter too;
CPython alone would hide differences in the language and the standard modules.
"""

from __future__ import annotations

import shutil
import subprocess
import tempfile
from pathlib import Path

NODE_DIR = Path(__file__).parent / "micropython"
RUNNER = NODE_DIR / "run.mjs"
PACKAGE_ENTRY = (
    NODE_DIR / "node_modules" / "@micropython" / "micropython-webassembly-pyscript" / "micropython.mjs"
)
SETUP_HINT = "install Node 20+ and run: npm ci --prefix tests/micropython"


class MicroPythonError(AssertionError):
    """The script failed under MicroPython; the message holds its traceback."""


def _node() -> str:
    # A missing interpreter must fail loudly, never skip: skipped tests would
    # let hub code go untested without anyone noticing.
    node = shutil.which("node")
    if node is None:
        raise RuntimeError(f"'node' was not found on PATH; {SETUP_HINT}")
    if not PACKAGE_ENTRY.is_file():
        raise RuntimeError(f"MicroPython package missing in {NODE_DIR}; {SETUP_HINT}")
    return node


def run_micropython(script: str | Path, packages: list[Path], timeout_s: float = 120) -> str:
    """Run `script` as __main__ under MicroPython and return its stdout.

    A str is the source code itself, a Path is a file holding it. Each
    directory in `packages` becomes importable under its own name.
    """
    node = _node()
    with tempfile.TemporaryDirectory(prefix="micropython-") as tmp:
        if isinstance(script, str):
            script_path = Path(tmp) / "main.py"
            script_path.write_text(script, encoding="utf-8")
        else:
            script_path = script
        args = [node, str(RUNNER)]
        for package in packages:
            args += ["--pkg", str(package)]
        args.append(str(script_path))
        result = subprocess.run(args, capture_output=True, timeout=timeout_s)

    if result.returncode != 0:
        stderr = result.stderr.decode("utf-8", errors="replace")
        stdout = result.stdout.decode("utf-8", errors="replace")
        raise MicroPythonError(
            f"MicroPython exited with code {result.returncode}\n"
            f"--- stderr ---\n{stderr}--- stdout ---\n{stdout}"
        )
    return result.stdout.decode("utf-8")
