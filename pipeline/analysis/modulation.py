"""Windowed key estimate: the key of each stretch of a piece, and whether the piece modulates.

The method is Temperley's probabilistic key model with modulation (Temperley 2007, *Music and
Probability*, ch. 4, from memory): the piece is cut into segments (here blocks of
``window_beats`` quarter-note beats); in a key, each pitch class is present in a segment with
the probability of the Kostka-Payne profile (``key.PROFILES["temperley_kostka_payne"]``, the
share of textbook segments containing it), independently; a segment's evidence for a key is
the log-probability of the set of pitch classes it holds. The key sequence is the most probable
path (Viterbi) where changing key between segments costs ``switch_cost`` (a log-probability).

A piece *modulates* when the path holds two key signatures for at least ``min_share`` of its
segments each (so a move to the relative major or minor is not counted: it changes
no pitch collection). The second key is the path's most frequent key among those two
signatures' that is not of the main key's signature; the main key is given (the stage passes
its whole-piece estimate) or is the key of the most segments. The path alone decides whether
the piece modulates: a wrong main key then cannot make a one-key piece "modulate". Pure numpy; a piece costs one histogram and a (segments x 24) path.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..midi.piece import DRUM_CHANNEL, Piece, distinct
from . import key_profiles as keymod

#: Segment length in quarter-note beats (two 4/4 bars), switch cost and minimum share of the
#: segments in another key signature: chosen across the pop, folk and classical sets
#: (README, Key detection: modulation).
WINDOW_BEATS = 8.0
SWITCH_COST = 12.0
MIN_SHARE = 0.15
#: Probabilities are kept within these bounds so an absent or present pitch class never costs
#: an infinite log-probability.
_FLOOR = 0.02


def _presence_table() -> np.ndarray:
    """(4096, 24): log-probability of each pitch-class set (12-bit number) in each key (major
    on C..B, then minor), pitch classes present independently with the Kostka-Payne
    probabilities."""
    major, minor = (np.clip(np.asarray(p), _FLOOR, 1 - _FLOOR)
                    for p in keymod.PROFILES["temperley_kostka_payne"])
    idx = (np.arange(12)[None, :] - np.arange(12)[:, None]) % 12  # row t: pc j in key t
    prob = np.vstack([major[idx], minor[idx]])  # (24, 12)
    present = ((np.arange(4096)[:, None] >> np.arange(12)[None, :]) & 1).astype(np.float64)
    return present @ np.log(prob).T + (1 - present) @ np.log(1 - prob).T


#: (4096, 24) log-probability of each set of present pitch classes (bit i: pc i) in each key
PRESENCE_TABLE = _presence_table()
_BITS = 1 << np.arange(12, dtype=np.int64)


@dataclass(frozen=True)
class KeyRegions:
    """The windowed key estimate of a piece.

    ``segments``: (start beat, end beat, key index) runs of the path, key index as in
    ``KeyEstimate.scores`` (0-11 major on C..B, 12-23 minor); ``main``: the main key's index;
    ``modulates``: two key signatures each hold at least ``min_share`` of the
    segments (those where a note starts); ``second``: the most frequent key of the other of the path's two main signatures
    (index), or None; ``second_share``: the share of the segments held by the path's
    second signature.
    """

    segments: tuple[tuple[float, float, int], ...]
    main: int
    modulates: bool
    second: int | None
    second_share: float

    @property
    def second_key(self) -> str | None:
        """The second key's name, e.g. ``"Eb major"``, or None."""
        if self.second is None:
            return None
        return keymod.key_name(self.second % 12, keymod.MODES[self.second // 12])


def signature_of(index: int) -> int:
    """The key signature of a key index as the pitch class of its major tonic (A minor -> 0)."""
    return index % 12 if index < 12 else (index + 3) % 12


_SIGNATURES = np.array([signature_of(k) for k in range(24)])


def segment_sets(piece: Piece, window_beats: float = WINDOW_BEATS) -> tuple[np.ndarray, np.ndarray]:
    """(segment numbers, pitch-class sets): the segments of ``window_beats`` beats in which a
    note starts, in time order (segment n covers beats [n * window_beats, (n + 1) *
    window_beats)), and the set of pitch classes sounding in each, as 12-bit numbers; a note
    counts in every such segment it sounds in. Segments where no note starts hold only notes
    carried over and are left out, so huge tick values cost nothing (segments by rank)."""
    notes = piece.notes
    keep = notes["channel"] != DRUM_CHANNEL
    start, end, pitch = notes["start"][keep], notes["end"][keep], notes["pitch"][keep]
    if len(start) == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    size = window_beats * piece.ticks_per_beat
    first = (start // size).astype(np.int64)
    last = np.maximum(first, ((end - 1) // size).astype(np.int64))
    numbers = distinct(first)
    # +1 at a note's first segment's rank, -1 at the rank after its last segment, cumulative
    # sum: notes sounding per segment and pitch class
    a = np.searchsorted(numbers, first)
    b = np.searchsorted(numbers, last, side="right")
    pc = (pitch % 12).astype(np.int64)
    size12 = (len(numbers) + 1) * 12
    delta = np.bincount(a * 12 + pc, minlength=size12) - np.bincount(b * 12 + pc, minlength=size12)
    sounding = np.cumsum(delta.reshape(-1, 12)[:-1], axis=0) > 0
    return numbers, sounding.astype(np.int64) @ _BITS


def key_path(sets: np.ndarray, switch_cost: float = SWITCH_COST) -> np.ndarray:
    """The most probable key index per segment (Viterbi; a key change costs ``switch_cost``;
    silent segments carry no evidence). Ties go to the lower key index."""
    n = len(sets)
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    emit = PRESENCE_TABLE[sets]
    emit[sets == 0] = 0.0
    # a key change costs the same from any key, so each step needs only the best previous
    # key (``leader``) and, per key, whether staying beat switching from the leader
    leader = np.zeros(n, dtype=np.int64)
    stayed = np.zeros((n, 24), dtype=bool)
    score = emit[0].copy()
    for i in range(1, n):
        best = score.argmax()
        switch = score[best] - switch_cost
        np.greater_equal(score, switch, out=stayed[i])  # staying wins ties
        leader[i] = best
        np.maximum(score, switch, out=score)
        score += emit[i]
    path = np.zeros(n, dtype=np.int64)
    k = int(score.argmax())
    path[-1] = k
    for i in range(n - 1, 0, -1):
        if not stayed[i, k]:
            k = int(leader[i])
        path[i - 1] = k
    return path


def windowed_path(piece: Piece) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(segment numbers, segment sets, key path) at the default segment length and switch
    cost: what ``key_regions`` reads, and what the learned key method reads as features."""
    numbers, sets = segment_sets(piece)
    return numbers, sets, key_path(sets)


def key_regions(piece: Piece, main: int | None = None, window_beats: float = WINDOW_BEATS,
                switch_cost: float = SWITCH_COST, min_share: float = MIN_SHARE,
                windowed: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None) -> KeyRegions:
    """The windowed key estimate of a piece (see the module docstring). ``main``: the main
    key's index (0-23), e.g. from ``key.estimate_key``; None: the key of the most segments.
    ``windowed``: ``windowed_path(piece)`` when already computed (default lengths only)."""
    if windowed is not None and (window_beats, switch_cost) == (WINDOW_BEATS, SWITCH_COST):
        numbers, sets, path = windowed
    else:
        numbers, sets = segment_sets(piece, window_beats)
        path = key_path(sets, switch_cost)
    if main is None:
        main = int(np.bincount(path, minlength=24).argmax()) if len(path) else 0
    segments = []  # runs of one key; a segment where no note starts joins the run before it
    for n, k in zip(numbers.tolist(), path.tolist()):
        if segments and segments[-1][2] == k:
            segments[-1][1] = (n + 1) * window_beats
        else:
            begin = segments[-1][1] if segments else n * window_beats
            segments.append([begin, (n + 1) * window_beats, k])
    second, share = None, 0.0
    if len(path):
        signatures = _SIGNATURES[path]
        held = np.bincount(signatures, minlength=12)
        top_two = np.argsort(-held, kind="stable")[:2]
        share = float(held[top_two[1]] / len(path))
        other = [int(s) for s in top_two if s != signature_of(main) and held[s]]
        if other:
            in_sig = path[signatures == other[0]]
            second = int(np.bincount(in_sig, minlength=24).argmax())
    return KeyRegions(segments=tuple((float(a), float(b), int(k)) for a, b, k in segments),
                      main=int(main), modulates=share >= min_share and second is not None,
                      second=second, second_share=share)
