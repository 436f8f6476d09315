"""Transposition of a note table: the shift that moves a tonic to a target, and the shift itself.

Drum-channel notes (channel 9, "channel 10") are unpitched in General MIDI and never move.
Notes pushed outside MIDI's 0..127 are folded back by whole octaves (keeping their pitch
class, so the transposed pitch-class histogram is still an exact rotation) and counted.
"""
from __future__ import annotations

from typing import Any

import numpy as np

from ..midi.accel import compiled_analyses
from ..midi.piece import DRUM_CHANNEL

DIRECTIONS = ("nearest", "up", "down")


def smallest_shift(tonic_pc: int, target_pc: int, direction: str = "nearest") -> int:
    """Semitones that move ``tonic_pc`` onto ``target_pc``.

    ``nearest``: -6..+5 (a tritone goes down); ``up``: 0..11; ``down``: -11..0.
    """
    d = (int(target_pc) - int(tonic_pc)) % 12
    if direction == "nearest":
        return d - 12 if d >= 6 else d
    if direction == "up":
        return d
    if direction == "down":
        return d - 12 if d else 0
    raise ValueError(f"direction must be one of {', '.join(DIRECTIONS)}, not {direction!r}")


def shift_notes(notes: np.ndarray, semitones: int) -> tuple[np.ndarray, int]:
    """A copy of ``notes`` with pitched notes moved by ``semitones``; returns (notes, folded),
    ``folded`` being the number of notes folded back into 0..127 by octaves."""
    out = notes.copy()
    if semitones == 0 or len(out) == 0:
        return out, 0
    pitch = out["pitch"]  # a view into ``out``
    s = int(semitones)
    lo, hi = int(pitch.min()), int(pitch.max())
    if min(lo, lo + s) >= 0 and max(hi, hi + s) <= 127:
        # every note is in 0..127 before and after (drums included), so nothing folds: add
        # in place (the usual case)
        drum = out["channel"] == DRUM_CHANNEL
        if drum.any():
            pitch[~drum] += s
        else:
            pitch += s
        return out, 0
    pitched = out["channel"] != DRUM_CHANNEL
    p = pitch.astype(np.int64) + np.where(pitched, s, 0)
    folded = int(np.count_nonzero((p > 127) | (p < 0)))
    out["pitch"] = fold_octaves(p).astype(out["pitch"].dtype)
    return out, folded


def fold_octaves(p: np.ndarray) -> np.ndarray:
    """Key numbers moved back into 0..127 by whole octaves (a transposed note, or the key of
    a polyphonic aftertouch event, that left the MIDI range)."""
    p = np.where(p > 127, p - 12 * ((p - 127 + 11) // 12), p)
    return np.where(p < 0, p + 12 * ((-p + 11) // 12), p)


def in_canonical_order(notes: np.ndarray) -> bool:
    """Whether ``notes`` are in ``piece.sort_notes`` order (start, pitch, track, channel, end),
    i.e. whether that stable sort would return the rows unchanged. Cheaper than the sort: one
    pass over the starts, the other keys compared only where starts tie."""
    if len(notes) < 2:
        return True
    start = notes["start"]
    ds = start[1:] - start[:-1]
    if ds.min() < 0:
        return False
    tie = ds == 0
    if not tie.any():
        return True
    # (pitch, track, channel) as one number: each int16 offset to 0..65535 in its own 16 bits
    key = notes["pitch"].astype(np.int64)
    key += 32768
    for field in ("track", "channel"):
        key <<= 16
        key += notes[field]
        key += 32768
    dk = key[1:] - key[:-1]
    if np.logical_or.reduce(dk < 0, where=tie):
        return False
    same = tie & (dk == 0)
    if not same.any():
        return True
    end = notes["end"]
    return not np.logical_or.reduce(end[1:] < end[:-1], where=same)


def fold_count(notes: np.ndarray, semitones: int) -> int:
    """How many notes ``shift_notes(notes, semitones)`` folds back into 0..127, without
    building the shifted table (the transpose stage only reports the count)."""
    if semitones == 0 or len(notes) == 0:
        return 0
    accel = compiled_analyses(notes)
    if accel is not None:  # the same count (tests/test_smf_accel.py)
        got = accel.fold_count(notes, int(semitones))
        if got is not None:
            return got
    pitch = notes["pitch"]
    s = int(semitones)
    if int(pitch.min()) + s >= 0 and int(pitch.max()) + s <= 127:
        return 0  # even every note shifted (drums too) stays in 0..127: the usual case
    p = pitch[notes["channel"] != DRUM_CHANNEL].astype(np.int64) + s
    return int(np.count_nonzero((p > 127) | (p < 0)))


def shift_key_signatures(keys: Any, semitones: int) -> Any:
    """Key-signature events of a piece transposed by ``semitones``, so a normalized file declares
    the key it is now in. A signature's major tonic is ``7 * sharps`` (mod 12) on the circle of
    fifths (minor shares its relative major's signature), so the new signature is
    ``sharps + 7 * semitones`` (mod 12), written in the range -5..+6 (F# major, not Gb)."""
    out = keys.copy()
    if len(out):
        s = (out["sharps"].astype(int) + 7 * semitones) % 12
        out["sharps"] = np.where(s > 6, s - 12, s)
    return out


def shift_controls(controls: Any, semitones: int) -> Any:
    """Channel events of a piece transposed by ``semitones``: only polyphonic aftertouch
    carries a key number (data1), moved as its notes are on pitched channels (beyond 0..127
    folded back by octaves, as ``shift_notes`` folds notes); controller
    values, pitch bends and the drum channel stay as they are."""
    if not semitones or not len(controls) or not (controls["kind"] == 0xA0).any():
        return controls  # the usual case: no polyphonic aftertouch
    poly = (controls["kind"] == 0xA0) & (controls["channel"] != DRUM_CHANNEL)
    out = controls.copy()
    out["data1"][poly] = fold_octaves(out["data1"][poly].astype(np.int64) + int(semitones))
    return out
