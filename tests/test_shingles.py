"""Shingles and content hash: invariances built in by construction (pieces built in code)."""
from __future__ import annotations

import numpy as np
import pytest

from pipeline.analysis.shingles import (ShingleSpec, content_hash, duration_beats, melody_tokens,
                                        shingle_hashes)
from pipeline.score import DEFAULT_TEMPO, KEY_DTYPE, METER_DTYPE, TEMPO_DTYPE, Piece, empty_notes, sort_notes, ticks_to_seconds


def make_piece(rows, tpb=480, tempos=((0, DEFAULT_TEMPO),)) -> Piece:
    """rows: (start_tick, end_tick, pitch, channel, program, track, velocity)."""
    notes = empty_notes(len(rows))
    for i, (s, e, p, ch, prog, tr, vel) in enumerate(rows):
        notes[i] = (s, e, 0.0, 0.0, p, vel, ch, prog, tr)
    tempo = np.array(list(tempos), dtype=TEMPO_DTYPE)
    notes["start_s"] = ticks_to_seconds(notes["start"], tempo, tpb)
    notes["end_s"] = ticks_to_seconds(notes["end"], tempo, tpb)
    return Piece(notes=sort_notes(notes), ticks_per_beat=tpb, tempos=tempo,
                 time_signatures=np.zeros(0, dtype=METER_DTYPE), key_signatures=np.zeros(0, dtype=KEY_DTYPE),
                 end_tick=int(notes["end"].max()) if len(rows) else 0)


def tune(seed: int, n: int = 120, tpb: int = 480):
    """A random melody (channel 0) over block chords (channel 1) and a drum groove."""
    rng = np.random.default_rng(seed)
    rows, t, p = [], 0, 72
    for _ in range(n):
        d = int(rng.choice([1, 1, 2, 2, 4])) * tpb // 2
        p = int(np.clip(p + rng.choice([-4, -2, -1, 1, 2, 3, 5]), 60, 90))
        rows.append((t, t + d, p, 0, 0, 0, 90))
        t += d
    for bar in range(0, t, 4 * tpb):
        for q in (48, 52, 55):
            rows.append((bar, bar + 4 * tpb, q, 1, 48, 1, 70))
        rows.append((bar, bar + tpb // 4, 36, 9, 0, 2, 100))
    return rows


def test_transposition_leaves_shingles_and_changes_content_hash():
    base = make_piece(tune(1))
    for shift in (-11, -5, -1, 1, 7, 12):
        moved = make_piece([(s, e, p + (0 if ch == 9 else shift), ch, pr, tr, v)
                            for s, e, p, ch, pr, tr, v in tune(1)])
        assert np.array_equal(shingle_hashes(base), shingle_hashes(moved)), shift
        assert content_hash(base) != content_hash(moved)


def test_same_notes_under_other_layout_hash_equal():
    rows = tune(2)
    base = make_piece(rows)
    # other velocities, programs, tracks (format 0: everything on track 0), channels (not drums)
    relaid = make_piece([(s, e, p, ch if ch == 9 else 5 - ch, (pr + 17) % 128, 0, 40)
                         for s, e, p, ch, pr, tr, v in rows])
    # other resolution (ticks doubled) and other tempo events
    fine = make_piece([(2 * s, 2 * e, p, ch, pr, tr, v) for s, e, p, ch, pr, tr, v in rows], tpb=960,
                      tempos=((0, 400_000), (7680, 650_000)))
    for other in (relaid, fine):
        assert content_hash(other) == content_hash(base)
        assert np.array_equal(shingle_hashes(other), shingle_hashes(base))
    assert duration_beats(fine) == duration_beats(base)


def test_drums_are_excluded_from_shingles_but_not_from_content():
    rows = tune(3)
    no_drums = [r for r in rows if r[3] != 9]
    assert np.array_equal(shingle_hashes(make_piece(rows)), shingle_hashes(make_piece(no_drums)))
    assert content_hash(make_piece(rows)) != content_hash(make_piece(no_drums))


def test_small_jitter_is_absorbed_by_the_grid():
    rows = tune(4)
    rng = np.random.default_rng(0)
    jit = [(max(0, s + int(rng.integers(-12, 13))), e, p, ch, pr, tr, v) for s, e, p, ch, pr, tr, v in rows]
    assert np.array_equal(shingle_hashes(make_piece(rows)), shingle_hashes(make_piece(jit)))


def test_tokens_follow_the_skyline_interval_and_onset_gap():
    # C5 quarter, E5 eighth with a chord below it, then D5: intervals +4, -2; gaps 4 and 2 steps
    rows = [(0, 480, 72, 0, 0, 0, 90), (480, 720, 76, 0, 0, 0, 90), (480, 960, 60, 1, 0, 1, 90),
            (720, 960, 74, 0, 0, 0, 90)]
    tok = melody_tokens(make_piece(rows), ShingleSpec(grid=4))
    assert tok.tolist() == [(4 + 128) * 4096 + 4, (-2 + 128) * 4096 + 2]


def test_short_and_empty_pieces():
    two = make_piece([(0, 480, 60, 0, 0, 0, 90), (480, 960, 62, 0, 0, 0, 90)])
    assert len(shingle_hashes(two)) == 1  # fewer tokens than ngram: one shingle of all of them
    drums = make_piece([(0, 120, 36, 9, 0, 0, 90), (480, 600, 38, 9, 0, 0, 90)])
    assert len(shingle_hashes(drums)) == 0


@pytest.mark.parametrize("cap", [8, 32])
def test_shingle_set_is_capped_by_smallest_hashes(cap):
    full = shingle_hashes(make_piece(tune(5)))
    capped = shingle_hashes(make_piece(tune(5)), ShingleSpec(max_shingles=cap))
    assert np.array_equal(capped, full[:cap])
