"""Recommended values into the robot profile, in place, keeping the file's comments and layout.

tomlkit keeps every comment, blank line and key order of the file; we change only the values
asked for and put a dated comment line above each, saying what changed from what to what and why.
Nothing is written unless the user asked for it (the calibrate commands' --write); the new text
must still load as a profile, or the file is left alone.
"""

from __future__ import annotations

import datetime as dt
import math
import os
import re
import tempfile
from pathlib import Path
from typing import Any

import tomlkit
from tomlkit.exceptions import TOMLKitError
from tomlkit.items import Item

from harness.errors import InputError
from harness.profile import profile_from_table
from harness.tomlfile import parse_toml

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def format_value(value: float) -> str:
    """A number as the profile shows it: at most six decimals, no float noise."""
    if not math.isfinite(value):
        return str(value)
    text = f"{value:.6f}".rstrip("0")
    return text + "0" if text.endswith(".") else text


def _read(path: Path) -> str:
    try:
        # Bytes, not text mode: keeps the file's line endings as they are.
        return path.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise InputError("file not found", file=str(path)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read: {exc}", file=str(path)) from None


def updated_profile_text(text: str, values: dict[str, float], note: str, *, table: tuple[str, ...] = (),
                         file: str = "profile", today: dt.date | None = None) -> str:
    """The profile text with each key set to its new value and a dated comment line above it.
    Keys are top-level, or inside `table` (e.g. ("follow", "forward") for [follow.forward] kp),
    which must exist; keys the file lacks are added after the last value there."""
    if not values:
        raise InputError("nothing to write", file=file)
    note = " ".join(note.split())  # one comment line, whatever the caller passed
    stamp = (today or dt.date.today()).isoformat()
    nl = "\r\n" if "\r\n" in text else "\n"  # new lines end like the file's own
    try:
        doc = tomlkit.parse(text)
    except TOMLKitError as exc:
        raise InputError(f"not valid TOML: {exc}", file=file) from None
    container: Any = doc
    for name in table:
        inner = container.get(name)
        if not isinstance(inner, tomlkit.items.Table):
            raise InputError("no such table to write into", file=file, key=".".join(table))
        container = inner
    prefix = "".join(f"{name}." for name in table)
    for key, value in values.items():
        where = prefix + key
        if not _BARE_KEY.fullmatch(key):
            raise InputError("not a plain key name", file=file, key=where)
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise InputError(f"expected a finite number to write, got {value!r}", file=file, key=where)
        shown = format_value(float(value))
        old = container.get(key)
        if key in container and (isinstance(old, bool) or not isinstance(old, (int, float))):
            raise InputError(f"holds {type(old).__name__}, not a number; not changed", file=file, key=where)
        if key in container:
            comment = f"# {stamp}: {where} {format_value(float(old))} -> {shown}: {note}"
            container[key] = float(shown)
            item = container.item(key)
            # The line's own indent goes on both lines, so an indented layout stays indented.
            item.trivia.indent = f"{item.trivia.indent}{comment}{nl}{item.trivia.indent}"
        else:
            comment = f"# {stamp}: {where} added, {shown}: {note}"
            last = _last_value(container)
            if last is None:
                raise InputError("has no values to add to", file=file, key=where)
            trail = last.trivia.trail if last.trivia.trail.endswith("\n") else last.trivia.trail + nl
            last.trivia.trail = f"{trail}{comment}{nl}{key} = {shown}{nl}"
    new_text = tomlkit.dumps(doc)
    # The new text must still be a profile the harness (and the hub's limits) accept.
    profile_from_table(parse_toml(new_text, file))
    return new_text


def _last_value(container: Any) -> Item | None:
    body = container.body if isinstance(container, tomlkit.TOMLDocument) else container.value.body
    last = None
    for key, item in body:
        if key is not None and not isinstance(item, (tomlkit.items.Table, tomlkit.items.AoT)):
            last = item
    return last


def check_profile_writable(path: Path) -> None:
    """InputError unless the profile may be changed: a read-only file is the user's choice to
    keep (replacing it through its folder would silently override that)."""
    if not path.is_file():
        raise InputError("file not found", file=str(path))
    if not os.access(path, os.W_OK):
        raise InputError("is read-only; not changed (make it writable to let --write update it)", file=str(path))


def write_profile_values(path: str | Path, values: dict[str, float], note: str, *, table: tuple[str, ...] = (),
                         today: dt.date | None = None) -> str:
    """Set numbers of the profile at path in place (top-level, e.g. spin_scale, or inside
    `table`), with a dated note per change; returns the new text. The file is replaced
    atomically and only if the result is a valid profile."""
    path = Path(path).resolve()  # a linked profile is updated where it lives, the link kept
    check_profile_writable(path)
    new_text = updated_profile_text(_read(path), values, note, table=table, file=str(path), today=today)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        try:
            with os.fdopen(fd, "wb") as out:
                out.write(new_text.encode("utf-8"))
            os.chmod(tmp, path.stat().st_mode & 0o7777)
            os.replace(tmp, path)
        except BaseException:
            os.unlink(tmp)
            raise
    except OSError as exc:
        raise InputError(f"cannot write: {exc}", file=str(path)) from None
    return new_text
