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
from dataclasses import dataclass

import numpy as np

from ..score import DRUM_CHANNEL, Piece

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


def fmix64(x: np.ndarray) -> np.ndarray:
    """MurmurHash3's 64-bit finalizer (an avalanching bijection), vectorized."""
    x = x.astype(np.uint64, copy=True)
    with np.errstate(over="ignore"):
        x ^= x >> np.uint64(33)
        x *= _MIX1
        x ^= x >> np.uint64(33)
        x *= _MIX2
        x ^= x >> np.uint64(33)
    return x


def melody_tokens(piece: Piece, spec: ShingleSpec = ShingleSpec()) -> np.ndarray:
    """One int64 token per onset after the first: interval of the skyline and grid IOI."""
    notes = piece.notes
    pitched = notes["channel"] != DRUM_CHANNEL
    start = notes["start"][pitched]
    if len(start) < 2:
        return np.zeros(0, dtype=np.int64)
    pitch = notes["pitch"][pitched].astype(np.int64)
    tpb = int(piece.ticks_per_beat)
    q = (start * (2 * spec.grid) + tpb) // (2 * tpb)  # round half up to the grid, in integers
    if np.any(q[1:] < q[:-1]):  # the decoder sorts by start; stay correct if a caller did not
        order = np.argsort(q, kind="stable")
        q, pitch = q[order], pitch[order]
    first = np.flatnonzero(np.concatenate(([True], q[1:] != q[:-1])))
    if len(first) < 2:
        return np.zeros(0, dtype=np.int64)
    top = np.maximum.reduceat(pitch, first)
    onset = q[first]
    interval = np.clip(np.diff(top), -spec.max_interval, spec.max_interval)
    ioi = np.minimum(np.diff(onset), int(spec.max_ioi_beats * spec.grid))
    return (interval + 128) * 4096 + ioi


def shingle_hashes(piece: Piece, spec: ShingleSpec = ShingleSpec()) -> np.ndarray:
    """The piece's shingle set: sorted unique uint64 hashes of ``ngram``-token windows.

    A piece with fewer tokens than ``ngram`` gets one shingle of all its tokens (if any), so
    short pieces still compare; a piece with none (drums only, one onset) gets an empty set.
    """
    tokens = melody_tokens(piece, spec).astype(np.uint64)
    n = min(spec.ngram, len(tokens))
    if n == 0:
        return np.zeros(0, dtype=np.uint64)
    count = len(tokens) - n + 1
    h = np.full(count, np.uint64(n), dtype=np.uint64)
    with np.errstate(over="ignore"):
        for j in range(n):
            h = h * _ROLL + tokens[j:j + count]
    out = np.unique(fmix64(h))
    if len(out) > spec.max_shingles:
        out = out[:spec.max_shingles]
    return out


def content_hash(piece: Piece) -> str:
    """Canonical note-content hash (hex): absolute pitch, drum flag and start/end in beats.

    Ignores metadata, track names and layout, channels (except drum vs pitched), programs,
    velocities, tempo events and the ticks-per-beat resolution. Each note becomes a 64-bit
    hash of its fields; the sorted multiset of those is hashed with SHA-256, so note order
    (which differs between format 0 and 1 layouts) does not matter.
    """
    n = piece.notes
    tpb = int(piece.ticks_per_beat)
    s = (n["start"] * (2 * CONTENT_STEPS_PER_BEAT) + tpb) // (2 * tpb)
    e = (n["end"] * (2 * CONTENT_STEPS_PER_BEAT) + tpb) // (2 * tpb)
    row = fmix64(s.astype(np.uint64))
    with np.errstate(over="ignore"):
        row = fmix64(row * _ROLL + e.astype(np.uint64))
        code = n["pitch"].astype(np.uint64) * np.uint64(2) + (n["channel"] == DRUM_CHANNEL).astype(np.uint64)
        row = fmix64(row * _ROLL + code)
    row.sort()
    return hashlib.sha256(row.astype("<u8").tobytes()).hexdigest()[:32]


def duration_beats(piece: Piece) -> float:
    """Beats from 0 to the end of the last note."""
    return float(piece.notes["end"].max()) / piece.ticks_per_beat if len(piece.notes) else 0.0
