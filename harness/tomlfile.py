"""Reading the TOML files users write, with errors that name the file, the key path and what
was expected. A Table hands out typed values and, at the end, refuses keys nobody asked for."""

from __future__ import annotations

import math
import tomllib
from pathlib import Path
from typing import Any, Sequence

from harness.errors import InputError

_MISSING: Any = object()


def read_text(path: Path) -> str:
    try:
        return path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("file not found", file=str(path)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read: {exc}", file=str(path)) from None


def load_toml(path: str | Path) -> Table:
    return parse_toml(read_text(Path(path)), str(path))


def parse_toml(text: str, file: str) -> Table:
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {exc}", file=file) from None
    return Table(data, file)


class Table:
    def __init__(self, data: dict[str, Any], file: str, path: str = "") -> None:
        self.data = data
        self.file = file
        self.path = path
        self._used: set[str] = set()  # read: a key never read is a typo
        self._asked: set[str] = set()  # looked for, present or not: the keys to suggest

    def key_path(self, key: str) -> str:
        return f"{self.path}.{key}" if self.path else key

    def error(self, key: str, message: str) -> InputError:
        return InputError(message, file=self.file, key=self.key_path(key))

    def has(self, key: str) -> bool:
        self._asked.add(key)
        return key in self.data

    def _get(self, key: str, default: Any) -> Any:
        self._used.add(key)
        self._asked.add(key)
        if key in self.data:
            return self.data[key]
        if default is _MISSING:
            raise self.error(key, "missing (required)")
        return default

    def num(self, key: str, default: Any = _MISSING, *, low: float | None = None,
            high: float | None = None, positive: bool = False) -> float:
        value = self._get(key, default)
        if value is None:
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise self.error(key, f"expected a number, got {value!r}")
        if positive and value <= 0:
            raise self.error(key, f"must be greater than 0, got {value}")
        if low is not None and value < low:
            raise self.error(key, f"must be at least {low}, got {value}")
        if high is not None and value > high:
            raise self.error(key, f"must be at most {high}, got {value}")
        return float(value)

    def int(self, key: str, default: Any = _MISSING, *, low: int | None = None,
            high: int | None = None) -> int:
        value = self._get(key, default)
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.error(key, f"expected a whole number, got {value!r}")
        if low is not None and value < low:
            raise self.error(key, f"must be at least {low}, got {value}")
        if high is not None and value > high:
            raise self.error(key, f"must be at most {high}, got {value}")
        return value

    def str(self, key: str, default: Any = _MISSING, *, choices: Sequence[str] | None = None) -> str:
        value = self._get(key, default)
        if value is None:
            return value
        if not isinstance(value, str):
            raise self.error(key, f"expected a string, got {value!r}")
        if choices is not None and value not in choices:
            raise self.error(key, f"expected one of {', '.join(choices)}, got {value!r}")
        return value

    def bool(self, key: str, default: Any = _MISSING) -> bool:
        value = self._get(key, default)
        if not isinstance(value, bool):
            raise self.error(key, f"expected true or false, got {value!r}")
        return value

    def str_list(self, key: str, default: Any = _MISSING) -> list[str]:
        value = self._get(key, default)
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise self.error(key, f"expected a list of strings, got {value!r}")
        return value

    def table(self, key: str, default: Any = _MISSING) -> Table:
        value = self._get(key, default)
        if not isinstance(value, dict):
            raise self.error(key, "expected a table")
        return Table(value, self.file, self.key_path(key))

    def tables(self, key: str, default: Any = _MISSING) -> list[Table]:
        value = self._get(key, default)
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            raise self.error(key, "expected an array of tables ([[...]])")
        return [Table(v, self.file, f"{self.key_path(key)}[{i}]") for i, v in enumerate(value)]

    def take_all(self) -> dict[str, Any]:
        """Every key of this table as given, for free-form tables checked elsewhere."""
        self._used.update(self.data)
        return dict(self.data)

    def raw(self, key: str, default: Any = _MISSING) -> Any:
        return self._get(key, default)

    def done(self) -> None:
        """Refuse any key that was never read: a typo must not pass silently."""
        unknown = sorted(set(self.data) - self._used)
        if unknown:
            known = ", ".join(sorted(self._used | self._asked)) or "none"
            raise self.error(unknown[0], f"unknown key (known here: {known})")
