"""Every reason code a run can write, with the stage that writes it and what it means.

This table is the README's reason-code table (``python -m pipeline.tools.docs`` prints it) and a test
checks that every code the stages can produce is listed here.
"""
from __future__ import annotations

from typing import Any

#: code -> (stage, meaning). Order: as a file meets them along the default config.
REASONS: dict[str, tuple[str, str]] = {
    "not_midi": ("validate", "not a MIDI file at all: empty, an HTML page, an image, text, a RIFF file that is not RMID"),
    "bad_chunk": ("validate", "bad header (length, format fields, division 0), garbage where a track chunk "
                  "should be, or fewer track chunks than the header declares beside chunks of other "
                  "names (a damaged track name)"),
    "truncated": ("validate", "the file ends inside a chunk or an event, or a chunk length points past the end"),
    "bad_event": ("validate", "an invalid status or data byte, running status with no status, a meta/sysex length past its chunk"),
    "unsupported_format": ("validate", "SMF format 2 (independent sequences) or a format number above 2"),
    "too_large": ("validate", "over max_bytes, max_events or max_tracks, or over the per-file memory limit"),
    "timeout": ("validate", "decoding and the per-file stages took longer than timeout_s; the worker was replaced"),
    "decoder_crash": ("validate", "the worker process died on this file (e.g. a crash in native code); it was replaced"),
    "unreadable": ("validate", "the file could not be read (missing, permission denied, an I/O error: the detail names "
                               "the OS error); not cached, the next run reads it again"),
    "changed_during_run": ("validate", "the file's bytes changed between the listing (its sha256) and the reading; "
                                       "not judged nor cached, the next run reads it again"),
    "needs_repair": ("validate", "with allow_repairs: false, a file that needed one of the decoder's named repairs"),
    "no_notes": ("validate", "a readable file without a single note"),
    "stage_error": ("any", "a stage raised an unexpected error on this file (a bug: please report it with the file)"),
    "key_uncertain": ("transpose", "with below_confidence: drop, the key was estimated with a key_confidence below "
                                   "min_key_confidence, so the file could not be transposed reliably"),
    "exact_duplicate": ("dedup", "byte-identical to the kept file, or the same notes with other metadata, programs, "
                                 "velocities, tempo events, resolution or SMF format"),
    "near_duplicate": ("dedup", "its own similarity to the kept file it names (duplicate_of) at or above threshold (transposed, "
                                "re-tempoed, re-orchestrated, re-quantized, edited or cut-short copies)"),
    "too_short": ("filter", "duration below min_seconds"),
    "too_long": ("filter", "duration above max_seconds"),
    "too_few_notes": ("filter", "fewer notes than min_notes"),
    "drums_only": ("filter", "drum-channel share of the notes above max_drum_fraction"),
    "too_sparse": ("filter", "notes per second below the low end of notes_per_s"),
    "too_dense": ("filter", "notes per second above the high end of notes_per_s"),
    "too_few_pitches": ("filter", "fewer distinct pitches than min_pitches"),
    "too_polyphonic": ("filter", "more pitched notes sounding at once than max_polyphony"),
    "long_silence": ("filter", "a stretch with no note sounding longer than max_silence_s"),
    "stuck_note": ("filter", "a pitched note longer than max_note_s"),
    "program_excluded": ("filter", "an instrument outside programs_allow, or inside programs_deny"),
    "metadata_excluded": ("filter", "a column of the metadata table holds a value that metadata_exclude lists"),
}


#: Reasons that ``--retry-failed`` recomputes (faults of the environment, not of the file),
#: besides ``too_large`` against the per-file memory limit ``max_memory_mb``.
RETRYABLE = ("timeout", "decoder_crash", "stage_error")


def is_fault(result: Any) -> bool:
    """A cached drop caused by the environment (time, memory, a crash, a stage's error), not
    by the file's bytes: ``--retry-failed`` recomputes it, and new worker limits read it again."""
    if result["kept"]:
        return False
    if result["reason"] in RETRYABLE:
        return True
    return result["reason"] == "too_large" and "max_memory_mb" in (result.get("thresholds") or {})
