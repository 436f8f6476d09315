"""Tempo and the rhythmic grid of a piece: its average tempo and the share of its onsets on a
16th-note or triplet grid (manifest fields ``bpm`` and ``grid_fraction``, recorded by the
key_meter stage)."""
from __future__ import annotations

import bisect

import numpy as np

from ..midi.accel import compiled_analyses
from ..midi.piece import Piece


def tempo_bpm(piece: Piece) -> float:
    """Average tempo in quarter-note beats per minute over the piece's span (tick 0 to the
    last note end): total beats divided by total minutes, i.e. the time-weighted harmonic
    mean of the tempo map. 120.0 for an empty piece with the default tempo."""
    end = int(piece.notes["end"].max()) if len(piece.notes) else 0
    tempos = piece.tempos
    if end <= 0:
        us = float(tempos["us_per_beat"][0]) if len(tempos) else 500_000.0
        return 60e6 / us
    seconds = _seconds_at(end, tempos, piece.ticks_per_beat)
    if seconds is None:
        seconds = float(piece.ticks_to_seconds(np.array([end]))[0])
    return (end / piece.ticks_per_beat) / (seconds / 60.0) if seconds > 0 else 0.0


#: Tempo maps up to this many events are walked in plain Python by ``_seconds_at``.
_SCALAR_TEMPO_EVENTS = 64


def _seconds_at(tick: int, tempos: np.ndarray, ticks_per_beat: int) -> float | None:
    """``piece.ticks_to_seconds`` at one tick, for a short tempo map in tick order: the same
    operations in the same order on Python floats (IEEE doubles, as numpy's), without a dozen
    numpy calls on arrays of a few elements. None for a long or unsorted map."""
    if not 0 < len(tempos) <= _SCALAR_TEMPO_EVENTS or not ticks_per_beat > 0:
        return None
    ticks = tempos["tick"].tolist()
    if any(b < a for a, b in zip(ticks, ticks[1:])):
        return None
    us = [float(u) for u in tempos["us_per_beat"].tolist()]
    scale = 1e6 * ticks_per_beat
    i = min(max(bisect.bisect_right(ticks, tick) - 1, 0), len(ticks) - 1)
    # start_sec[i]: 0.0, then the running sum of the segment seconds (np.cumsum's order)
    start_sec = 0.0
    if i > 0:
        start_sec = float(ticks[1] - ticks[0]) * us[0] / scale
        for k in range(1, i):
            start_sec = start_sec + float(ticks[k + 1] - ticks[k]) * us[k] / scale
    return start_sec + float(tick - ticks[i]) * us[i] / scale


#: Metrical grid for ``grid_fraction``: 16th notes and 8th-note triplets (divisions of a quarter).
GRID_DIVISIONS = (4, 3)
#: Default tolerance, as a fraction of a quarter note (1/48 beat: 10 ticks at 480 ticks per
#: beat, about 10 ms at 120 BPM).
GRID_TOLERANCE_BEATS = 1.0 / 48.0


def grid_fraction(piece: Piece, divisions: tuple[int, ...] = GRID_DIVISIONS,
                  tolerance_beats: float = GRID_TOLERANCE_BEATS) -> float:
    """Fraction of note onsets (all channels) within ``tolerance_beats`` of the metrical grid
    (multiples of a quarter divided by any of ``divisions``). 1.0 means fully quantized;
    randomly placed onsets give roughly the grid's coverage (about 0.27 with the defaults).
    An empty piece gives 1.0."""
    if len(piece.notes) == 0:
        return 1.0
    key = (int(piece.ticks_per_beat), tuple(divisions), float(tolerance_beats))
    table = _grid_table(*key)
    accel = compiled_analyses(piece.notes) if table is not None else None
    if accel is not None:  # the same count (tests/test_smf_accel.py)
        flags = _GRID_BYTES.get(key)
        if flags is None:
            flags = table.tobytes()
            if len(_GRID_BYTES) < 256:
                _GRID_BYTES[key] = flags
        got = accel.grid_count(piece.notes, flags)
        if got is not None:  # a numpy float, as count_nonzero(...) / len gives
            return np.float64(got / len(piece.notes))
    start = piece.notes["start"]
    if table is not None and 0 <= start.min() and start.max() < 2 ** 53:
        return np.count_nonzero(table[start % len(table)]) / len(start)
    return _grid_fraction_float(start.astype(np.float64), float(piece.ticks_per_beat),
                                divisions, tolerance_beats)


#: On-grid flag per tick position within a beat, by (ticks per beat, divisions, tolerance).
_GRID_TABLES: dict[tuple[int, tuple[int, ...], float], np.ndarray] = {}
#: The same flags as bytes, for the compiled count.
_GRID_BYTES: dict[tuple[int, tuple[int, ...], float], bytes] = {}


def _grid_table(tpb: int, divisions: tuple[int, ...], tolerance_beats: float) -> np.ndarray | None:
    """Whether each tick position ``0..tpb-1`` within a beat is on the grid, when every grid
    step is a whole number of ticks (then an onset's flag depends only on ``start % tpb``, and
    the float remainders ``_grid_fraction_float`` takes of whole-number floats are exact, so
    the table gives the same flags). None when a step is fractional."""
    key = (tpb, divisions, tolerance_beats)
    table = _GRID_TABLES.get(key)
    if table is None:
        if tpb <= 0 or any(d <= 0 or tpb % d for d in divisions):
            return None
        table = _grid_flags(np.arange(tpb, dtype=np.float64), float(tpb), divisions,
                            tolerance_beats)
        if len(_GRID_TABLES) < 256:
            _GRID_TABLES[key] = table
    return table


def _grid_flags(start: np.ndarray, tpb: float, divisions: tuple[int, ...],
                tolerance_beats: float) -> np.ndarray:
    tol = tolerance_beats * tpb
    on = np.zeros(len(start), dtype=bool)
    for d in divisions:
        step = tpb / d
        r = np.mod(start, step)
        on |= np.minimum(r, step - r) <= tol + 1e-9
    return on


def _grid_fraction_float(start: np.ndarray, tpb: float, divisions: tuple[int, ...],
                         tolerance_beats: float) -> float:
    """``grid_fraction`` on float onsets (any resolution)."""
    return float(_grid_flags(start, tpb, divisions, tolerance_beats).mean())
