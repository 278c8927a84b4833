"""Errors a user can act on. One root; each class carries what is needed to fix the problem.

    TrackproofError
     +-- InputError          a file or argument is wrong (file, key path, what was expected)
     +-- LinkError           the byte path to the hub failed or timed out
     +-- ProtocolError       the hub answered something we cannot use (e.g. protocol version)
     +-- HubRefused          the hub refused a command (code and text from the hub)
     +-- StoreError          the results database cannot be used (harness.store; names the file)
"""

from __future__ import annotations


class TrackproofError(Exception):
    exit_code = 1


class InputError(TrackproofError):
    exit_code = 2

    def __init__(self, message: str, *, file: str | None = None, key: str | None = None,
                 line: int | None = None) -> None:
        self.file, self.key, self.line = file, key, line
        where = ""
        if file:
            where = file + (f":{line}" if line else "")
        if key:
            where = f"{where}: {key}" if where else key
        super().__init__(f"{where}: {message}" if where else message)


class LinkError(TrackproofError):
    exit_code = 3


class ProtocolError(TrackproofError):
    exit_code = 3


class HubRefused(TrackproofError):
    exit_code = 2

    def __init__(self, code: str, text: str) -> None:
        self.code, self.text = code, text
        super().__init__(f"hub refused ({code}): {text}")
