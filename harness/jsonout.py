"""JSON files for machines: numpy values as plain numbers and lists, NaN and infinity as null
(JSON has neither), and a clear error naming the file when it cannot be written."""

from __future__ import annotations

import json
import math
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
    """InputError now, before any work, if the file's folder does not exist."""
    if not path.parent.is_dir():
        raise InputError(f"folder {path.parent} does not exist", file=str(path))


def write_json(path: Path, data: Any) -> None:
    try:
        path.write_text(json.dumps(json_safe(data), indent=2, allow_nan=False) + "\n", encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot write: {exc}", file=str(path)) from None
