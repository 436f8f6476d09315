"""Length and density statistics of a decoded piece (the measures of the ``filter`` stage).

All measures are vectorized over the note table (no Python loop over notes) because they run
once per file on the hot path. Seconds come from the piece's ``start_s``/``end_s`` columns, so the
tempo map is already applied. Definitions (the README's filter table repeats them):

``duration_s``
    Seconds from time 0 to the end of the last note (leading silence counts, as in
    ``Piece.duration_s``).
``notes``
    Number of notes, drum notes included.
``notes_per_s``
    ``notes / duration_s`` (0 for a zero-length piece).
``pitches``
    Distinct MIDI pitches among pitched notes (drum-channel notes are instruments, not pitches).
``max_polyphony`` / ``mean_polyphony``
    Pitched notes sounding at once (drum hits carry nominal lengths, so they are left out). A note
    ending exactly where another starts does not overlap it, and zero-length notes never sound.
    The mean is time-weighted over *sounding* time (instants with at least one pitched note), so
    rests do not dilute it: it equals total note-seconds divided by sounding seconds.
``drum_fraction``
    Fraction of all notes on the General MIDI drum channel (channel 10, index 9).
``longest_silence_s``
    Longest stretch of ``[0, duration_s]`` with no note sounding (drums included), *including*
    the leading silence before the first note (zero-length notes do not sound; with none of
    them there is no trailing silence, since the duration ends at the last note-off).
``tracks``
    Track chunks holding at least one note.
``instruments``
    Distinct programs among pitched notes, plus one for the drum kit if there are drum notes
    (the drum channel's program selects a kit, not an instrument).
``longest_note_s``
    Longest pitched note in seconds (a stuck note; drum lengths are nominal, so not counted).
``programs``
    Sorted GM programs (0-127, the program-change data byte) of the pitched notes;
    ``has_drums`` says separately whether drum-channel notes exist.
"""
from __future__ import annotations

import numpy as np

from ..midi.accel import compiled_analyses
from ..midi.piece import DRUM_CHANNEL, Piece

#: The measures ``piece_stats`` returns, in the order the README lists them.
MEASURES = ("duration_s", "notes", "notes_per_s", "pitches", "max_polyphony", "mean_polyphony",
            "drum_fraction", "longest_silence_s", "tracks", "instruments", "longest_note_s")


def piece_stats(piece: Piece) -> dict:
    """The filter measures of ``piece`` (see the module docstring for each definition)."""
    notes = piece.notes
    n = len(notes)
    if n == 0:
        return {"duration_s": 0.0, "notes": 0, "notes_per_s": 0.0, "pitches": 0,
                "max_polyphony": 0, "mean_polyphony": 0.0, "drum_fraction": 0.0,
                "longest_silence_s": 0.0, "tracks": 0, "instruments": 0,
                "longest_note_s": 0.0, "programs": [], "has_drums": False}
    accel = compiled_analyses(notes)
    got = accel.note_stats(notes) if accel is not None else None
    if got is not None:  # the same values, bit for bit (tests/test_smf_accel.py)
        duration, n_drum, programs, max_poly, mean_poly, n_pitches, silence, n_tracks, longest = got
        return {
            "duration_s": duration,
            "notes": n,
            "notes_per_s": n / duration if duration > 0 else 0.0,
            "pitches": n_pitches,
            "max_polyphony": max_poly,
            "mean_polyphony": mean_poly,
            "drum_fraction": n_drum / n,
            "longest_silence_s": silence,
            "tracks": n_tracks,
            "instruments": len(programs) + (1 if n_drum else 0),
            "longest_note_s": longest,
            "programs": programs,
            "has_drums": n_drum > 0,
        }
    every = _Columns(notes)
    duration = float(every.end_s.max())
    drum = notes["channel"] == DRUM_CHANNEL
    n_drum = int(np.count_nonzero(drum))
    pitched = _Columns(notes, ~drum) if n_drum else every
    programs = np.flatnonzero(np.bincount(pitched.get("program"), minlength=128))
    lengths = pitched.end_s - pitched.start_s
    max_poly, mean_poly = _polyphony_of(pitched.start, pitched.end, pitched.start_s,
                                        pitched.end_s, lengths)
    return {
        "duration_s": duration,
        "notes": n,
        "notes_per_s": n / duration if duration > 0 else 0.0,
        "pitches": int(np.count_nonzero(np.bincount(pitched.get("pitch"), minlength=128))),
        "max_polyphony": max_poly,
        "mean_polyphony": mean_poly,
        "drum_fraction": n_drum / n,
        "longest_silence_s": _silence_of(every.start, every.end, every.start_s, every.end_s,
                                         duration),
        "tracks": int(np.count_nonzero(np.bincount(every.get("track")))),
        "instruments": int(len(programs)) + (1 if n_drum else 0),
        "longest_note_s": float(lengths.max()) if len(lengths) else 0.0,
        "programs": programs.tolist(),
        "has_drums": n_drum > 0,
    }


class _Columns:
    """Contiguous columns of the note table, or of the rows selected by ``keep``: one small
    copy per column used, instead of a copy of whole structured rows (or strided reads)."""

    def __init__(self, notes: np.ndarray, keep: np.ndarray | None = None):
        self._notes, self._keep = notes, keep
        self.start, self.end = self.get("start"), self.get("end")
        self.start_s, self.end_s = self.get("start_s"), self.get("end_s")

    def get(self, name: str) -> np.ndarray:
        col = self._notes[name]
        return np.ascontiguousarray(col) if self._keep is None else col[self._keep]


#: Ticks below this (in magnitude) fit the sweep's combined sort key ``2 * tick + is_on``.
_KEY_TICK_LIMIT = 2 ** 61


def _polyphony_of(start: np.ndarray, end: np.ndarray, start_s: np.ndarray, end_s: np.ndarray,
                  lengths: np.ndarray) -> tuple[int, float]:
    """(max, sounding-time-weighted mean) number of notes sounding at once (``lengths`` is
    ``end_s - start_s``).

    A sweep over note-on (+1) and note-off (-1) events ordered by tick, offs before ons at the
    same tick, so touching notes do not overlap and a zero-length note never counts. The
    events are ordered by one stable sort of ``2 * tick + (1 for an on, 0 for an off)``: the
    order of a stable lexsort by (tick, delta), equal keys keeping their index order in both,
    so the same seconds are summed in the same order."""
    n = len(start)
    if n == 0:
        return 0, 0.0
    ticks = np.concatenate((start, end))
    secs = np.concatenate((start_s, end_s))
    if -_KEY_TICK_LIMIT < ticks.min() and ticks.max() < _KEY_TICK_LIMIT:
        key = ticks * 2
        key[:n] += 1
        order = np.argsort(key, kind="stable")
    else:
        delta = np.concatenate((np.ones(n, np.int64), -np.ones(n, np.int64)))
        order = np.lexsort((delta, ticks))
    step = np.where(order < n, 1, -1)  # delta[order]
    running = np.cumsum(step)
    s = secs[order]
    seg = s[1:] - s[:-1]  # np.diff
    sounding = float(seg[running[:-1] > 0].sum())
    note_seconds = float(lengths.sum())
    mean = note_seconds / sounding if sounding > 0 else 0.0
    return int(running.max()), mean


def _silence_of(start: np.ndarray, end: np.ndarray, start_s: np.ndarray, end_s: np.ndarray,
                duration: float) -> float:
    """Longest stretch of ``[0, duration]`` with nothing sounding (notes sorted by start;
    zero-length notes never sound, so they do not break a silence)."""
    sounds = end > start
    if not sounds.all():
        start_s, end_s = start_s[sounds], end_s[sounds]
    if len(start_s) == 0:
        return duration
    covered = np.maximum.accumulate(end_s)
    inner = float((start_s[1:] - covered[:-1]).max()) if len(start_s) > 1 else 0.0
    return max(float(start_s[0]), inner, duration - float(covered[-1]), 0.0)
