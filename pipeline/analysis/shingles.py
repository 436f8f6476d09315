"""Note shingles for near-duplicate detection, invariant by construction.

What a shingle sees, and why:

* **Pitch as intervals.** Each onset contributes the interval of its highest sounding pitch
  (the "skyline", common practice for melody extraction) from the previous onset's highest
  pitch, so any transposition leaves every shingle unchanged.
* **Time in beats on a grid.** Onsets are ``ticks / ticks_per_beat`` rounded to ``grid`` steps per
  beat, so tempo events, the file's resolution and small timing jitter (humanized or
  re-quantized notes) do not change the tokens; inter-onset intervals are capped at
  ``max_ioi_beats`` so a long rest is one token.
* **Tracks merged, drums excluded.** All pitched notes are merged by onset whatever their track,
  channel or program, so re-orchestration and format 0/1 differences vanish; the drum channel
  is left out (a drum groove is shared by many distinct pieces).
* **Melody over harmony.** The skyline follows the tune, not the accompaniment, which keeps
  distinct pieces that share a key, meter and chord progression apart.

A token is ``(interval, ioi)``; a shingle is the hash of ``ngram`` consecutive tokens
(vectorized numpy arithmetic; no per-note Python loop). The canonical content hash, by contrast,
keeps absolute pitch and exact beat positions: two files with the same notes but other
metadata, velocities, programs, tempo events, resolution or format hash equal.
"""
from __future__ import annotations

import hashlib
import sys
from dataclasses import dataclass

import numpy as np

from ..score import DRUM_CHANNEL, Piece, compiled_analyses

_M64 = np.uint64(0xFFFFFFFFFFFFFFFF)
_MIX1 = np.uint64(0xFF51AFD7ED558CCD)
_MIX2 = np.uint64(0xC4CEB9FE1A85EC53)
_ROLL = np.uint64(0x9E3779B97F4A7C15)
#: Content hash resolution: positions rounded to 1/960 beat (finer than any file grid in
#: common use, so only true note-content differences change the hash).
CONTENT_STEPS_PER_BEAT = 960


@dataclass(frozen=True)
class ShingleSpec:
    """How shingles are cut. ``grid``: onset steps per beat; ``ngram``: tokens per shingle;
    ``max_ioi_beats``: inter-onset intervals longer than this are one token; ``max_shingles``:
    at most this many shingles are kept (the smallest hashes, a consistent sample)."""

    ngram: int = 4
    grid: int = 4
    max_ioi_beats: float = 4.0
    max_interval: int = 24
    max_shingles: int = 4096


_S33 = np.uint64(33)


def fmix64(x: np.ndarray) -> np.ndarray:
    """MurmurHash3's 64-bit finalizer (an avalanching bijection), vectorized."""
    with np.errstate(over="ignore"):
        return _fmix64_inplace(x.astype(np.uint64, copy=True))


def _fmix64_inplace(x: np.ndarray) -> np.ndarray:
    """``fmix64`` overwriting ``x``, a uint64 array the caller owns, so no copy is made.
    Integer array arithmetic wraps modulo 2**64 without a warning (only numpy scalars warn)."""
    x ^= x >> _S33
    x *= _MIX1
    x ^= x >> _S33
    x *= _MIX2
    x ^= x >> _S33
    return x


def melody_tokens(piece: Piece, spec: ShingleSpec = ShingleSpec()) -> np.ndarray:
    """One int64 token per onset after the first: interval of the skyline and grid IOI."""
    notes = piece.notes
    drum = notes["channel"] == DRUM_CHANNEL
    if drum.any():
        keep = ~drum
        start, pitch = notes["start"][keep], notes["pitch"][keep]
    else:
        start, pitch = notes["start"], notes["pitch"]
    if len(start) < 2:
        return np.zeros(0, dtype=np.int64)
    tpb = int(piece.ticks_per_beat)
    q = (start * (2 * spec.grid) + tpb) // (2 * tpb)  # round half up to the grid, in integers
    step = q[1:] - q[:-1]
    if step.min() < 0:  # the decoder sorts by start; stay correct if a caller did not
        order = np.argsort(q, kind="stable")
        q, pitch = q[order], pitch[order]
        step = q[1:] - q[:-1]
    new = step != 0
    first = np.flatnonzero(np.concatenate(([True], new)))
    if len(first) < 2:
        return np.zeros(0, dtype=np.int64)
    top = np.maximum.reduceat(pitch, first).astype(np.int64)
    # np.clip(np.diff(top), lo, hi) is minimum(maximum(diff, lo), hi); the gaps between
    # successive onsets (np.diff(q[first])) are the non-zero steps
    interval = np.minimum(np.maximum(top[1:] - top[:-1], -spec.max_interval), spec.max_interval)
    ioi = np.minimum(step[new], int(spec.max_ioi_beats * spec.grid))
    return (interval + 128) * 4096 + ioi


def shingle_hashes(piece: Piece, spec: ShingleSpec = ShingleSpec()) -> np.ndarray:
    """The piece's shingle set: sorted unique uint64 hashes of ``ngram``-token windows.

    A piece with fewer tokens than ``ngram`` gets one shingle of all its tokens (if any), so
    short pieces still compare; a piece with none (drums only, one onset) gets an empty set.
    """
    accel = compiled_analyses(piece.notes)
    if accel is not None:
        args = (int(piece.ticks_per_beat), spec.grid, int(spec.max_ioi_beats * spec.grid),
                spec.max_interval, spec.ngram, spec.max_shingles)
        if all(type(a) is int for a in args):
            got = accel.shingles(piece.notes, *args)
            if got is not None:  # the same hashes (tests/test_smf_accel.py)
                return np.frombuffer(got, dtype=np.uint64).copy()
    tokens = melody_tokens(piece, spec).view(np.uint64)  # int64 -> uint64: the same bits
    n = min(spec.ngram, len(tokens))
    if n == 0:
        return np.zeros(0, dtype=np.uint64)
    count = len(tokens) - n + 1
    h = np.full(count, np.uint64(n), dtype=np.uint64)
    for j in range(n):  # array arithmetic wraps modulo 2**64
        h *= _ROLL
        h += tokens[j:j + count]
    h = _fmix64_inplace(h)
    h.sort()  # np.unique: sorted, then the first of each run of equal values
    if len(h) > 1:
        keep = np.empty(len(h), dtype=bool)
        keep[0] = True
        keep[1:] = h[1:] != h[:-1]
        h = h[keep]
    if len(h) > spec.max_shingles:
        h = h[:spec.max_shingles]
    return h


def content_hash(piece: Piece) -> str:
    """Canonical note-content hash (hex): absolute pitch, drum flag and start/end in beats.

    Ignores metadata, track names and layout, channels (except drum vs pitched), programs,
    velocities, tempo events and the ticks-per-beat resolution. Each note becomes a 64-bit
    hash of its fields; the sorted multiset of those is hashed with SHA-256, so note order
    (which differs between format 0 and 1 layouts) does not matter.
    """
    n = piece.notes
    tpb = int(piece.ticks_per_beat)
    accel = compiled_analyses(n) if sys.byteorder == "little" else None
    if accel is not None:
        got = accel.content_rows(n, tpb, CONTENT_STEPS_PER_BEAT)
        if got is not None:  # the same sorted row hashes, as little-endian bytes
            return hashlib.sha256(got).hexdigest()[:32]
    # start and end rounded in one pass: positions in 1/960 beat, rounded half up in integers
    se = (np.concatenate((n["start"], n["end"])) * (2 * CONTENT_STEPS_PER_BEAT) + tpb) // (2 * tpb)
    se = se.view(np.uint64)  # int64 -> uint64 keeps the bits, as astype does, without a copy
    row = _fmix64_inplace(se[:len(n)])
    row *= _ROLL
    row += se[len(n):]
    row = _fmix64_inplace(row)
    code = n["pitch"].astype(np.uint64)
    code *= np.uint64(2)
    code += n["channel"] == DRUM_CHANNEL  # + 1 for a drum note
    row *= _ROLL
    row += code
    row = _fmix64_inplace(row)
    row.sort()
    return hashlib.sha256(np.ascontiguousarray(row, dtype="<u8")).hexdigest()[:32]


def duration_beats(piece: Piece) -> float:
    """Beats from 0 to the end of the last note."""
    return float(piece.notes["end"].max()) / piece.ticks_per_beat if len(piece.notes) else 0.0
