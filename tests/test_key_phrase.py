"""The sixth round's phrase-level key evidence (pipeline/tools/key_phrase.py): the phrase ends
of a hand-built piece worked by hand, and the distributions move with the piece when it is
transposed, so the per-key columns keep the classifier transposition-invariant."""
from __future__ import annotations

import numpy as np

from pipeline.analysis import key as keymod
from pipeline.midi.piece import KEY_DTYPE, METER_DTYPE, TEMPO_DTYPE, Piece, empty_notes, sort_notes
from pipeline.tools import key_phrase

B = 480  # ticks per beat


def _piece(rows) -> Piece:
    """A piece from (start, end, pitch, track) rows; each track on its own channel."""
    notes = empty_notes(len(rows))
    for i, (start, end, pitch, track) in enumerate(rows):
        notes[i]["start"], notes[i]["end"], notes[i]["pitch"] = start, end, pitch
        notes[i]["track"], notes[i]["channel"] = track, track
    notes["velocity"] = 80
    return Piece(notes=sort_notes(notes), ticks_per_beat=B,
                 tempos=np.array([(0, 500_000)], dtype=TEMPO_DTYPE),
                 time_signatures=np.zeros(0, dtype=METER_DTYPE),
                 key_signatures=np.zeros(0, dtype=KEY_DTYPE))


def _a_minor_piece(shift: int = 0) -> Piece:
    # invented fixture in A minor, worked by hand. Track 1, the tune: A4 B4 C5 A5(1 beat each),
    # a rest of one beat, E5 (1 beat) D5 (2 beats) C5 B4 (1 beat each) A4 (2 beats). A phrase
    # ends at a rest or a held note (common practice): with the rest rule the phrase ends are
    # A5 (before the rest) and the last A4; the long-note rule adds D5. Track 2 below it: A2
    # with C4 E4 (beats 0-4), D3 (beats 5-8), A2 with C4 E4 (beats 8-12).
    tune = [(0, B, 69), (B, 2 * B, 71), (2 * B, 3 * B, 72), (3 * B, 4 * B, 81),
            (5 * B, 6 * B, 76), (6 * B, 8 * B, 74), (8 * B, 9 * B, 72), (9 * B, 10 * B, 71),
            (10 * B, 12 * B, 69)]
    low = [(0, 4 * B, 45), (0, 4 * B, 60), (0, 4 * B, 64), (5 * B, 8 * B, 50),
           (8 * B, 12 * B, 45), (8 * B, 12 * B, 60), (8 * B, 12 * B, 64)]
    return _piece([(s, e, p + shift, 1) for s, e, p in tune] + [(s, e, p + shift, 2) for s, e, p in low])


def _dist(**weights) -> np.ndarray:
    v = np.zeros(12)
    for name, w in weights.items():
        v[keymod.note_name_to_pc(name)] = w
    return v / v.sum()


def test_phrase_ends_worked_by_hand():
    f = dict(zip(key_phrase.PHRASE_FEATURES, key_phrase.phrase_features(_a_minor_piece(), 1.0, None)))
    assert np.allclose(f["phrase_end"], _dist(A=2))                # A5, A4
    assert np.allclose(f["phrase_end_dur"], _dist(A=3))            # 1 + 2 beats, all on A
    assert np.allclose(f["phrase_end_bass"], _dist(A=2))           # A2 under both
    assert np.allclose(f["phrase_end_minor"], _dist(A=2))          # A C E within the beat
    assert not f["phrase_end_major"].any()
    assert np.allclose(f["phrase_start"], _dist(A=1, E=1))         # A4, then E5 after the rest
    g = dict(zip(key_phrase.PHRASE_FEATURES, key_phrase.phrase_features(_a_minor_piece(), 1.0, 2.0)))
    assert np.allclose(g["phrase_end"], _dist(A=2, D=1))           # D5 is held two beats
    assert np.allclose(g["phrase_end_dur"], _dist(A=3, D=2))
    assert np.allclose(g["phrase_end_bass"], _dist(A=2, D=1))      # D3 under D5
    assert np.allclose(g["phrase_end_minor"], _dist(A=1))          # A C E at A5 and A4, none at D5 (D3 D5)
    assert np.allclose(g["phrase_start"], _dist(A=1, E=1, C=1))    # C5 follows the held D5


def test_the_melody_line_is_the_top_of_the_melody_voice():
    # a chord in the melody voice counts once, by its highest note (skyline, common practice)
    piece = _piece([(0, B, 60, 1), (0, B, 64, 1), (B, 2 * B, 67, 1), (B, 2 * B, 72, 1),
                    (0, 2 * B, 36, 2)])
    start, end, pitch = key_phrase.melody_line(piece)
    assert start.tolist() == [0, B] and pitch.tolist() == [64, 72] and end.tolist() == [B, 2 * B]
    assert key_phrase.phrase_end_mask(start, end, B).tolist() == [False, True]
    assert not key_phrase.phrase_features(_piece([])).any()


def test_transposition_rotates_the_distributions_and_the_key_rows():
    # key finding commutes with transposition (common practice): moving the piece up s
    # semitones rotates every distribution by s, and the candidate key s semitones up reads
    # the same per-key columns as the original key did
    base = key_phrase.phrase_features(_a_minor_piece(), 1.0, 2.0)
    rows = key_phrase.rotated_blocks(base[None])[0]
    for s in (1, 5, 11):
        moved = key_phrase.phrase_features(_a_minor_piece(s), 1.0, 2.0)
        assert np.array_equal(moved, np.roll(base, s, axis=1))
        moved_rows = key_phrase.rotated_blocks(moved[None])[0]
        for k in range(24):
            shifted = (k + s) % 12 + (k // 12) * 12
            assert np.array_equal(moved_rows[shifted], rows[k])
    # A minor's row reads the phrase ends from A: all on its tonic (bin 0) in the minor block
    m = len(key_phrase.PHRASE_FEATURES) * 12
    assert rows[12 + 9, m] == 2 / 3 and not rows[12 + 9, :m].any()


def test_shuffled_keeps_each_piece_with_its_truth():
    # another fold assignment moves whole pieces: each row keeps its features and its key,
    # and the evaluation chorales (never in a fold) stay in place
    data = key_phrase.PhraseData.__new__(key_phrase.PhraseData)
    rng = np.random.default_rng(0)
    data.sets = ["chorales", "folk", "pop"]
    data.y = {s: np.arange(20) % 24 for s in data.sets + ["chorales_eval"]}
    data.raw = {s: rng.random((20, 2, 12)) + data.y[s][:, None, None] for s in data.y}
    data.phi = {s: data.raw[s][:, :, :3].copy() for s in data.y}
    moved = key_phrase.shuffled(data, 1)
    for s in data.y:
        order = np.argsort(moved.y[s], kind="stable")
        assert np.array_equal(moved.y[s][order], data.y[s])
        assert np.array_equal(moved.raw[s][order], data.raw[s])
        assert np.array_equal(moved.phi[s][order], data.phi[s])
    assert not np.array_equal(moved.y["pop"], data.y["pop"])
    assert np.array_equal(moved.y["chorales"], data.y["chorales"])
