"""The decoded piece: a numpy note table plus tempo, meter and key events.

A ``Piece`` is what every per-file stage and analysis sees. It is plain data (numpy arrays,
ints, strings) so it pickles cheaply between worker processes and carries no file handle.

Times are kept in ticks (exact, as in the file) and in seconds (tempo map applied). Beats are
``ticks / ticks_per_beat``. For SMPTE-timed files (no beats in the file) the decoder sets
``smpte=True``, a nominal ``ticks_per_beat`` and one 120 BPM tempo so that seconds are exact and
beats are nominal.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

#: One row per note. ``start``/``end`` in ticks, ``start_s``/``end_s`` in seconds.
#: ``channel`` is 0-15 (9 is the General MIDI drum channel, "channel 10" to musicians);
#: ``program`` is the program in force on that channel at the note-on (0-127);
#: ``track`` is the 0-based index of the MTrk chunk the note came from.
NOTE_DTYPE = np.dtype([
    ("start", np.int64), ("end", np.int64),
    ("start_s", np.float64), ("end_s", np.float64),
    ("pitch", np.int16), ("velocity", np.int16),
    ("channel", np.int16), ("program", np.int16), ("track", np.int16),
])
#: Tempo map: microseconds per quarter note from ``tick`` on. Always starts at tick 0.
TEMPO_DTYPE = np.dtype([("tick", np.int64), ("us_per_beat", np.int64)])
#: Time-signature events as declared in the file (``denominator`` as a number, e.g. 8).
METER_DTYPE = np.dtype([("tick", np.int64), ("numerator", np.int16), ("denominator", np.int16)])
#: Key-signature events as declared: ``sharps`` -7..7 (negative = flats), ``minor`` 0/1.
KEY_DTYPE = np.dtype([("tick", np.int64), ("sharps", np.int16), ("minor", np.int16)])

#: Channel events other than notes, in file order per track (so ticks ascend within a track):
#: ``kind`` is the status high nibble (0xA0 polyphonic aftertouch, 0xB0 control change, 0xC0
#: program change, 0xD0 channel aftertouch, 0xE0 pitch bend); ``data1``/``data2`` are the data
#: bytes as written (``data2`` 0 for the one-byte kinds; a pitch bend is data1 | data2 << 7).
CONTROL_DTYPE = np.dtype([("tick", np.int64), ("track", np.int16), ("channel", np.uint8),
                          ("kind", np.uint8), ("data1", np.uint8), ("data2", np.uint8)])
#: Meta event types kept as ``Piece.texts``: text, copyright, lyric, marker, cue point.
TEXT_METAS = (0x01, 0x02, 0x05, 0x06, 0x07)

DRUM_CHANNEL = 9
DEFAULT_TEMPO = 500_000


@dataclass
class Piece:
    """A decoded MIDI file. Notes are sorted by (start, pitch, track, channel)."""

    notes: np.ndarray
    ticks_per_beat: int
    tempos: np.ndarray
    time_signatures: np.ndarray
    key_signatures: np.ndarray
    format: int = 1
    n_tracks: int = 1
    end_tick: int = 0
    track_names: tuple[str, ...] = ()
    title: str = ""
    smpte: bool = False
    #: Narrow, named tolerances the decoder applied, with counts, e.g.
    #: ``{"hanging_notes_closed": 2, "missing_end_of_track": 1, "riff_unwrapped": 1}``.
    repairs: dict[str, int] = field(default_factory=dict)
    #: Control changes, pitch bends, aftertouch and program changes (``CONTROL_DTYPE``).
    controls: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=CONTROL_DTYPE))
    #: Text-like meta events (types ``TEXT_METAS``) as (tick, track, type, payload bytes), in
    #: file order per track; payloads are kept as bytes (a .kar file's encoding is unknown).
    texts: tuple[tuple[int, int, int, bytes], ...] = ()

    @property
    def duration_s(self) -> float:
        """Seconds from time 0 to the end of the last note (tempo map applied)."""
        return float(self.notes["end_s"].max()) if len(self.notes) else 0.0

    @property
    def pitched(self) -> np.ndarray:
        """The notes not on the drum channel."""
        return self.notes[self.notes["channel"] != DRUM_CHANNEL]

    def ticks_to_seconds(self, ticks: np.ndarray) -> np.ndarray:
        """Map tick positions to seconds through the tempo map (vectorized)."""
        return ticks_to_seconds(np.asarray(ticks, dtype=np.int64), self.tempos, self.ticks_per_beat)

    def beats(self, ticks: np.ndarray) -> np.ndarray:
        """Tick positions as quarter-note beats."""
        return np.asarray(ticks, dtype=np.float64) / float(self.ticks_per_beat)


def ticks_to_seconds(ticks: np.ndarray, tempos: np.ndarray, ticks_per_beat: int) -> np.ndarray:
    """Seconds at each tick for a tempo map starting at tick 0 (piecewise-linear)."""
    t_ticks = tempos["tick"].astype(np.int64)
    us = tempos["us_per_beat"].astype(np.float64)
    seg_len = np.diff(t_ticks).astype(np.float64)
    seg_sec = seg_len * us[:-1] / (1e6 * ticks_per_beat)
    start_sec = np.concatenate(([0.0], np.cumsum(seg_sec)))
    idx = np.searchsorted(t_ticks, ticks, side="right") - 1
    idx = np.clip(idx, 0, len(t_ticks) - 1)
    return start_sec[idx] + (ticks - t_ticks[idx]) * us[idx] / (1e6 * ticks_per_beat)


def empty_notes(n: int = 0) -> np.ndarray:
    """A zeroed note table of ``n`` rows."""
    return np.zeros(n, dtype=NOTE_DTYPE)


def distinct(values: np.ndarray) -> np.ndarray:
    """``np.unique(values)`` of a 1-d integer array; one pass over runs when the values are
    already in order (columns derived from a piece's onsets are), a sort otherwise."""
    if len(values) < 2:
        return np.unique(values)
    step = values[1:] != values[:-1]
    if (values[1:] >= values[:-1]).all():
        return values[np.concatenate(([True], step))]
    return np.unique(values)


def sort_notes(notes: np.ndarray) -> np.ndarray:
    """Notes in the canonical order: start, pitch, track, channel, end."""
    order = np.lexsort((notes["end"], notes["channel"], notes["track"], notes["pitch"], notes["start"]))
    return notes[order]
