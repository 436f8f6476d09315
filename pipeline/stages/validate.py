"""The ``validate`` stage: decode the file bytes and keep only files that are readable MIDI.

It is the reading stage (``Stage.read``): a worker calls ``read(data, source)`` with the file bytes; it returns the verdict and the
decoded ``Piece`` (None when dropped). A ``DecodeError`` becomes a drop with its reason code
(``not_midi``, ``truncated``, ``bad_chunk``, ``bad_event``, ``unsupported_format``,
``too_large``) and the decoder's sentence; a readable file without notes drops as ``no_notes``.

``allow_repairs`` (default true): the decoder's narrow named tolerances (see
``pipeline.midi.decode.REPAIRS``: hanging notes closed, missing end-of-track, RIFF unwrapped, ...) are
accepted and listed in the detail. When false, any repair drops the file as ``needs_repair``,
for corpora that must hold only files that follow SMF 1.0 to the letter.
"""
from __future__ import annotations

from typing import Any

from ..errors import DecodeError
from ..reasons import is_fault
from ..midi.piece import Piece
from ..midi.decode import DEFAULT_LIMITS, MOST_TRACKS, decode, describe_repairs
from .base import FileContext, Option, Stage, StageResult, positive, register


def _positive_seconds(value: float) -> str | None:  # reliability option timeout_s: finite, > 0
    return None if 0 < value < float("inf") else "must be a finite number of seconds above 0"


def _track_count(value: int) -> str | None:
    if not 1 <= value <= MOST_TRACKS:
        return (f"must be from 1 to {MOST_TRACKS}: the decoder numbers a file's tracks as 16-bit "
                f"signed integers (0..{MOST_TRACKS - 1}), so a file with more cannot be read")
    return None


#: The reason codes of a file the decoder refused (``DecodeError.code``); ``too_large`` is also
#: the worker's memory fault, told apart by its ``max_memory_mb`` threshold.
DECODE_REASONS = ("not_midi", "truncated", "bad_chunk", "bad_event", "unsupported_format", "too_large")
#: The options that bound what the decoder reads.
READING_LIMITS = ("max_bytes", "max_events", "max_tracks")


@register
class Validate(Stage):
    """Decode each file; drop unreadable, empty, oversized (or, if asked, repaired) files."""

    name = "validate"
    kind = "file"
    version = 3
    doc = ("Decodes every file with the project's SMF reader and drops files that are not MIDI, "
           "cut off, damaged, of an unsupported format, over the size limits, or without notes.")
    options = (
        Option("max_bytes", int, DEFAULT_LIMITS["max_bytes"], "largest file size read, in bytes (a "
               "rerun that raises a reading limit reads only the files the old one refused)",
               positive),
        Option("max_events", int, DEFAULT_LIMITS["max_events"], "most MIDI events read from one file",
               positive),
        Option("max_tracks", int, DEFAULT_LIMITS["max_tracks"], "most track chunks a file may "
               f"declare, at most {MOST_TRACKS} (the decoder numbers tracks as 16-bit signed "
               "integers)", _track_count),
        Option("allow_repairs", bool, True,
               "accept the decoder's named repairs (hanging notes closed, missing end-of-track, "
               "...); when false such files drop as needs_repair (a rerun that changes it "
               "reads no file: the recorded repairs are judged again)"),
        # reliability options: enforced by the supervised worker pool (pipeline.engine.executor)
        Option("timeout_s", float, 60.0,
               "most seconds one file may take (decode and per-file stages); a file that takes "
               "longer is dropped as timeout and its worker replaced (a rerun with another "
               "value reads again only the files that faulted)", _positive_seconds),
        Option("max_memory_mb", int, 2048,
               "most memory (MB, above the worker's size at start) one file may need; a file "
               "that needs more is dropped as too_large and its worker replaced (as "
               "timeout_s, a rerun with another value reads again only the files that faulted)",
               positive),
    )

    reads_bytes = True

    def read_limit(self) -> int:
        return int(self.opts["max_bytes"])

    def worker_limits(self) -> dict[str, Any]:
        return {"timeout_s": float(self.opts["timeout_s"]), "max_memory_mb": int(self.opts["max_memory_mb"])}

    def read(self, data: bytes, source: str, size: int | None = None) -> tuple[StageResult, Piece | None]:
        """Decode ``data`` and judge it; returns the verdict and the piece (None if dropped)."""
        try:
            piece = decode(data, source=source, size=size, max_bytes=self.opts["max_bytes"],
                           max_events=self.opts["max_events"], max_tracks=self.opts["max_tracks"])
        except DecodeError as err:
            values = {"offset": err.offset, "track": err.track}
            # The verdict belongs to the content (byte-identical copies share it, a later run
            # reuses it under another path): the sentence names the place, never a file path.
            detail = f"{err.location}: {err.reason}" if err.location else err.reason
            return StageResult.drop(err.code, detail, values, self._thresholds()), None
        result = self.judge(piece)
        return result, (piece if result.kept else None)

    def process(self, piece: Piece, ctx: FileContext) -> StageResult:
        """The verdict for an already-decoded piece (same as ``read`` gives after decoding)."""
        return self.judge(piece)

    def judge(self, piece: Piece) -> StageResult:
        values = {"format": piece.format, "track_chunks": piece.n_tracks,
                  "ticks_per_beat": piece.ticks_per_beat, "smpte": piece.smpte,
                  "repairs": dict(sorted(piece.repairs.items())),
                  # the manifest's ``title`` falls back to the file name when this is empty
                  "file_title": " ".join(piece.title.split())[:200]}
        return self._verdict(values, has_notes=len(piece.notes) > 0)

    def _verdict(self, values: dict[str, Any], has_notes: bool) -> StageResult:
        """The verdict on a decoded piece described by ``values`` (``judge``'s)."""
        timing = ("SMPTE timing (nominal " if values["smpte"] else "") + \
            f"{values['ticks_per_beat']} ticks per beat" + (")" if values["smpte"] else "")
        detail = f"SMF format {values['format']}, {values['track_chunks']} tracks, {timing}"
        repairs = values["repairs"]
        fixes = describe_repairs(repairs)
        if not has_notes:
            zero = repairs.get("zero_length_notes_dropped", 0)
            why = (f"its {zero} note(s) all end at the tick they start (zero length, dropped)"
                   if zero else "a file needs at least one note-on with its note-off to be used")
            return StageResult.drop("no_notes", f"{detail}, but no notes: {why}", values,
                                    self._thresholds())
        if fixes and not self.opts["allow_repairs"]:
            return StageResult.drop("needs_repair", f"{detail}; it needs repairs ({fixes}) and "
                                    "allow_repairs is false; set it to true to accept them",
                                    values, self._thresholds())
        return StageResult.keep(f"{detail}; {fixes}" if fixes else detail, values,
                                self._thresholds())

    judges_stored = True

    def judge_stored(self, stored: dict[str, Any], earlier: dict[str, Any]) -> StageResult | None:
        """The verdict under other options from the one stored under ``earlier``, when no
        reading limit (``max_bytes``, ``max_events``, ``max_tracks``) was lowered: a decoded
        file is judged on its recorded values (``allow_repairs``), one the decoder refused is
        refused again, unless for being over a limit that was raised. None (read the file
        again) for a fault (timeout, crash, memory: new worker limits are what it waits for),
        a file over a raised limit, or any file under a lowered one. Sound because the decoder
        checks each limit only where it would refuse the file for it."""
        if any(self.opts[k] < earlier[k] for k in READING_LIMITS):
            return None
        reason, values = stored["reason"], stored["values"]
        if reason in ("no_notes", "needs_repair") or stored["kept"]:
            if not {"format", "track_chunks", "ticks_per_beat", "smpte", "repairs"} <= values.keys():
                return None
            return self._verdict(values, has_notes=reason != "no_notes")
        if reason not in DECODE_REASONS or is_fault(stored):
            return None
        if reason == "too_large" and any(self.opts[k] != earlier[k] for k in READING_LIMITS):
            return None
        return StageResult.drop(reason, stored["detail"], values, self._thresholds())

    def _thresholds(self) -> dict[str, Any]:
        return {k: self.opts[k] for k in READING_LIMITS}
