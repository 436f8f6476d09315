"""The error hierarchy of midisift.

Every error carries where it happened (file, location) and why, so a message can state the
rule, the offending value and the likely fix. ``ConfigError`` and ``UsageError`` map to exit
code 2; everything else that escapes a run maps to exit code 1.
"""
from __future__ import annotations


class MidisiftError(Exception):
    """Base class: a reason sentence plus optional file and location."""

    def __init__(self, reason: str, *, file: str | None = None, location: str | None = None):
        self.reason = reason
        self.file = file
        self.location = location
        super().__init__(self.message)

    @property
    def message(self) -> str:
        where = ": ".join(p for p in (self.file, self.location) if p)
        return f"{where}: {self.reason}" if where else self.reason


class ConfigError(MidisiftError):
    """A config file or CLI value breaks a rule; ``location`` is the key path, e.g.
    ``stages[3].filter.min_seconds``."""


class ConfigErrors(ConfigError):
    """Several config problems found in one pass; the message lists each on its own line,
    with its key path, so a user fixes them all at once."""

    def __init__(self, problems: list[ConfigError], *, file: str | None = None):
        self.problems = problems
        lines = [p.message for p in problems]
        super().__init__(f"{len(problems)} problems:\n  " + "\n  ".join(lines), file=file)


class UsageError(MidisiftError):
    """Bad command-line usage (exit code 2)."""


class DecodeError(MidisiftError):
    """A MIDI file cannot be decoded.

    ``code`` is a reason code from the README table (``not_midi``, ``truncated``,
    ``bad_chunk``, ``bad_event``, ``unsupported_format``, ``too_large`` ...); ``offset`` is the
    byte offset in the file where the problem was found and ``track`` the 0-based track chunk,
    when known.
    """

    def __init__(self, code: str, reason: str, *, file: str | None = None,
                 offset: int | None = None, track: int | None = None):
        self.code = code
        self.offset = offset
        self.track = track
        parts = []
        if track is not None:
            parts.append(f"track {track}")
        if offset is not None:
            parts.append(f"byte {offset}")
        super().__init__(reason, file=file, location=", ".join(parts) or None)


class LedgerError(MidisiftError):
    """The output folder's state cannot be read or written (locked, corrupt, unwritable)."""


class OutputError(MidisiftError):
    """An output file cannot be written (disk full, permissions)."""
