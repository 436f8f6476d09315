"""The seventh round's bar-grid harmony evidence (pipeline/tools/key_harmony.py): the
distributions of a hand-built 8-bar piece worked by hand, the window sets against a direct count,
and the distributions move with the piece when it is transposed (so the per-key columns keep the
classifier transposition-invariant)."""
from __future__ import annotations

import numpy as np

from pipeline.analysis import key as keymod
from pipeline.midi.piece import Piece
from pipeline.tools import key_harmony
from test_key_phrase import _dist, _piece  # a piece from (start, end, pitch, track) rows

B = 480  # ticks per beat
BAR = 4 * B


#: Block chords of the invented fixture, one per 4/4 bar: Am F G Am F G C Am (the Aeolian
#: bVI-bVII-i of A minor and the IV-V-I of C major over one chord set, common practice).
CHORDS = ((45, 60, 64), (41, 57, 60), (43, 59, 62), (45, 60, 64), (41, 57, 60), (43, 59, 62),
          (48, 64, 67), (45, 60, 64))


def _a_minor_piece(shift: int = 0) -> Piece:
    # invented fixture in A minor, worked by hand. Track 2: the chords above, a bar each.
    # Track 1, the tune, two phrases, each led in by a pickup on the fourth beat: E5 (beat 3)
    # F5 (2 beats) G5 (2) A5 (4), a rest of 3 beats, then E5 (beat 19) F5 (2) G5 (2) C5 (4) A5 (4).
    tune = [(3 * B, 4 * B, 76), (4 * B, 6 * B, 77), (6 * B, 8 * B, 79), (8 * B, 12 * B, 81),
            (19 * B, 20 * B, 76), (20 * B, 22 * B, 77), (22 * B, 24 * B, 79),
            (24 * B, 28 * B, 72), (28 * B, 32 * B, 81)]
    low = [(b * BAR, (b + 1) * BAR, p) for b, chord in enumerate(CHORDS) for p in chord]
    return _piece([(s, e, p + shift, 1) for s, e, p in tune] + [(s, e, p + shift, 2) for s, e, p in low])


def test_harmony_worked_by_hand():
    piece = _a_minor_piece()
    f = dict(zip(key_harmony.HARMONY_FEATURES, key_harmony.harmony_features(piece, "4/4", 0.0)))
    # first beat of each bar: Am, F (+F5), G (+A5), Am, F, G (+F5), C (+C5), Am (+A5)
    assert np.allclose(f["down_major"], _dist(F=2, G=2, C=1))
    assert np.allclose(f["down_minor"], _dist(A=3))
    # the phrase starts (pickups on beats 3 and 19) go to bars 1 and 5: the 4-bar groups open
    # there (F, G); the 8-bar grid ties between bars 1 and 5 and takes the first (F)
    assert np.allclose(f["hyper4_major"], _dist(F=1, G=1)) and not f["hyper4_minor"].any()
    assert np.allclose(f["hyper8_major"], _dist(F=1)) and not f["hyper8_minor"].any()
    # the bass at the downbeats, weighted by its 4 beats: A2 three bars, F2 two, G2 two, C3 one
    assert np.allclose(f["down_bass"], _dist(A=3, F=2, G=2, C=1))
    assert np.allclose(f["hyper4_bass"], _dist(F=1, G=1))
    # beat chords, repeats merged: Am F G Am F G C Am (beat 19, F A C with E5, holds two triads
    # and is skipped); F-G reaches Am once (bVI-bVII-i) and C once (IV-V-I)
    assert np.allclose(f["step_major"], _dist(C=1)) and np.allclose(f["step_minor"], _dist(A=1))
    assert np.allclose(f["change_major"], _dist(F=2, G=2, C=1))
    assert np.allclose(f["change_minor"], _dist(A=3))
    # the piece is 8 bars long: its first and last 8 bars are all of it, the duration
    # distribution of the shipped features
    duration = keymod.key_features(piece)[keymod.FEATURES.index("duration")]
    assert np.allclose(f["opening"], duration) and np.allclose(f["closing"], duration)
    assert np.allclose(f["opening_major"], f["down_major"])
    assert not key_harmony.harmony_features(_piece([]), "4/4", 0.0).any()


def test_window_sets_match_a_direct_count():
    rng = np.random.default_rng(0)
    start = rng.integers(0, 40 * B, 300).astype(np.float64)
    end = start + rng.integers(1, 6 * B, 300)
    pc = rng.integers(0, 12, 300)
    windows = np.arange(0, 44 * B, 3 * B / 2).astype(np.float64)
    got = key_harmony.window_sets(start, end, pc, windows, B)
    for i, w in enumerate(windows):  # the notes sounding somewhere in [w, w + B)
        on = (start < w + B) & (end > w)
        assert got[i] == int(np.bitwise_or.reduce(1 << pc[on], initial=0))


def test_transposition_rotates_the_distributions():
    # key finding commutes with transposition (common practice): moving the piece up s
    # semitones rotates every distribution by s
    base = key_harmony.harmony_features(_a_minor_piece(), "4/4", 0.0)
    for s in (1, 5, 11):
        moved = key_harmony.harmony_features(_a_minor_piece(s), "4/4", 0.0)
        assert np.allclose(moved, np.roll(base, s, axis=1))
