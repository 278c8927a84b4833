"""JSON files for machines: numpy values as plain numbers and lists, NaN and infinity as null
(JSON has neither), and a clear error naming the file when it cannot be written."""

from __future__ import annotations

import json
import math
import os
from pathlib import Path
from typing import Any

from harness.errors import InputError


def json_safe(value: Any) -> Any:
    if hasattr(value, "tolist"):
        value = value.tolist()
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def check_writable(path: Path) -> None:
    """InputError now, before any work, if the file could not be written: its folder is missing
    or read-only, or the path is a folder."""
    if path.is_dir():
        raise InputError("is a folder; give a file name", file=str(path))
    if not path.parent.is_dir():
        raise InputError(f"folder {path.parent} does not exist", file=str(path))
    if not os.access(path.parent, os.W_OK) or (path.exists() and not os.access(path, os.W_OK)):
        raise InputError(f"cannot write here (no permission in {path.parent})", file=str(path))


def write_text(path: Path, text: str) -> None:
    """Write a report file; a failure is one clear line (InputError), not a traceback."""
    try:
        path.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot write: {exc.strerror or exc}", file=str(path)) from None


def write_json(path: Path, data: Any) -> None:
    write_text(path, json.dumps(json_safe(data), indent=2, allow_nan=False) + "\n")
