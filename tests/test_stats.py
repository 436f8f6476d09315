"""Tests of pipeline.analysis.stats: the filter measures.

Expected values are computed by hand from the tempo map (stated beside each piece); the
decoder-facing checks compare against pretty_midi's note lists (outside reference)."""
from __future__ import annotations

import io

import mido
import numpy as np
import pretty_midi
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fixtures_midi import smf_bytes
from pipeline.analysis.stats import MEASURES, piece_stats
from pipeline.midi.piece import (KEY_DTYPE, METER_DTYPE, TEMPO_DTYPE, Piece, empty_notes,
                                 sort_notes, ticks_to_seconds)

TPB = 480


def make_piece(notes: list[tuple], tempos: list[tuple[int, int]] = ((0, 500_000),),
               tpb: int = TPB) -> Piece:
    """A Piece from ``(start_tick, end_tick, pitch, channel, program, track)`` rows; seconds via
    the tempo map (what the decoder does)."""
    tempo = np.array(list(tempos), dtype=TEMPO_DTYPE)
    table = empty_notes(len(notes))
    for i, (s, e, p, ch, prog, tr) in enumerate(notes):
        table[i] = (s, e, 0.0, 0.0, p, 80, ch, prog, tr)
    table["start_s"] = ticks_to_seconds(table["start"], tempo, tpb)
    table["end_s"] = ticks_to_seconds(table["end"], tempo, tpb)
    table = sort_notes(table)
    end = int(table["end"].max()) if len(table) else 0
    return Piece(table, tpb, tempo, np.zeros(0, METER_DTYPE), np.zeros(0, KEY_DTYPE),
                 n_tracks=4, end_tick=end)


# Tempo map: 500000 us/beat (120 BPM, 0.5 s per beat) from tick 0, then 1000000 us/beat
# (60 BPM, 1 s per beat) from tick 1920 = beat 4 = 2.0 s. At 480 ticks per beat:
#   tick  480 -> 0.5 s, 960 -> 1.0 s, 1920 -> 2.0 s, 1980 -> 2.125 s,
#   tick 2400 -> 2.0 + 480/480 * 1.0 = 3.0 s, 2880 -> 4.0 s, 4800 -> 8.0 s, 7680 -> 14.0 s.
TWO_TEMPI = ((0, 500_000), (1920, 1_000_000))
WORKED = [
    (0, 480, 60, 0, 0, 1),       # 0.0-0.5 s
    (0, 960, 64, 0, 0, 1),       # 0.0-1.0 s
    (480, 1920, 67, 1, 40, 2),   # 0.5-2.0 s, program 40 (GM 41 Violin); touches the first note
    (1920, 1980, 36, 9, 0, 3),   # drum hit 2.0-2.125 s
    (2400, 2880, 72, 0, 0, 1),   # 3.0-4.0 s
    (4800, 7680, 60, 0, 0, 1),   # 8.0-14.0 s
]


def test_worked_example_every_measure():
    s = piece_stats(make_piece(WORKED, TWO_TEMPI))
    assert s["duration_s"] == pytest.approx(14.0)
    assert s["notes"] == 6
    assert s["notes_per_s"] == pytest.approx(6 / 14.0)
    assert s["pitches"] == 4                       # 60, 64, 67, 72 (drum 36 excluded)
    # Pitched notes sounding: 0-0.5 s two (60, 64); at 0.5 s 60 ends as 67 starts, so still two.
    assert s["max_polyphony"] == 2
    # Note-seconds 0.5 + 1 + 1.5 + 1 + 6 = 10 over sounding time 0-2, 3-4, 8-14 = 9 s.
    assert s["mean_polyphony"] == pytest.approx(10 / 9)
    assert s["drum_fraction"] == pytest.approx(1 / 6)
    # Gaps (drums count as sound): 2.125-3.0 = 0.875 s and 4.0-8.0 = 4.0 s; no leading silence.
    assert s["longest_silence_s"] == pytest.approx(4.0)
    assert s["tracks"] == 3
    assert s["instruments"] == 3                   # programs 0 and 40, plus the drum kit
    assert s["longest_note_s"] == pytest.approx(6.0)
    assert s["programs"] == [0, 40] and s["has_drums"] is True
    assert set(MEASURES) <= set(s)


def test_leading_silence_counts():
    # 120 BPM: tick 9600 = beat 20 = 10.0 s; tick 10080 = 10.5 s.
    s = piece_stats(make_piece([(9600, 10080, 60, 0, 0, 0)]))
    assert s["longest_silence_s"] == pytest.approx(10.0)
    assert s["duration_s"] == pytest.approx(10.5)


def test_zero_length_and_drum_only():
    # A zero-length note never sounds; drums are not pitched polyphony.
    s = piece_stats(make_piece([(0, 480, 60, 0, 0, 0), (240, 240, 62, 0, 0, 0),
                                (0, 960, 36, 9, 0, 1), (0, 960, 38, 9, 0, 1)]))
    assert s["max_polyphony"] == 1
    d = piece_stats(make_piece([(0, 480, 36, 9, 0, 0), (480, 960, 38, 9, 0, 0)]))
    assert d["drum_fraction"] == 1.0 and d["pitches"] == 0 and d["max_polyphony"] == 0
    assert d["instruments"] == 1 and d["programs"] == [] and d["longest_note_s"] == 0.0


def test_empty_piece():
    s = piece_stats(make_piece([]))
    assert s["notes"] == 0 and s["duration_s"] == 0.0 and s["notes_per_s"] == 0.0


def _brute_polyphony(rows: list[tuple]) -> tuple[int, float]:
    """Naive reference: count pitched notes sounding at the midpoint of every elementary
    interval (touching notes do not overlap: intervals are half-open [start, end))."""
    pitched = [(s, e) for s, e, p, ch, *_ in rows if ch != 9 and e > s]
    cuts = sorted({t for s, e in pitched for t in (s, e)})
    mx, weighted, sounding = 0, 0.0, 0.0
    for a, b in zip(cuts, cuts[1:]):
        mid = (a + b) / 2
        c = sum(1 for s, e in pitched if s <= mid < e)
        mx = max(mx, c)
        if c:
            weighted += c * (b - a)
            sounding += b - a
    return mx, (weighted / sounding if sounding else 0.0)


note_rows = st.lists(st.tuples(st.integers(0, 4000), st.integers(0, 2000), st.integers(40, 80),
                               st.sampled_from([0, 1, 9]), st.integers(0, 3), st.integers(0, 2)),
                     min_size=1, max_size=40)


@settings(max_examples=150, deadline=None)
@given(note_rows)
def test_polyphony_and_silence_match_naive_reference(raw):
    rows = [(s, s + d, p, ch, prog, tr) for s, d, p, ch, prog, tr in raw]
    got = piece_stats(make_piece(rows))   # one tempo: 1 tick = 0.5/480 s
    mx, mean = _brute_polyphony(rows)
    assert got["max_polyphony"] == mx
    assert got["mean_polyphony"] == pytest.approx(mean)
    # Silence reference: uncovered stretches of [0, last end) by any note (drums included).
    spt = 0.5 / TPB
    ends = max(e for _, e, *_ in rows)
    covered = np.zeros(ends + 1, dtype=bool)
    for s, e, *_ in rows:
        covered[s:e] = True
    longest, run = 0, 0
    for c in covered[:ends]:
        run = 0 if c else run + 1
        longest = max(longest, run)
    assert got["longest_silence_s"] == pytest.approx(longest * spt)


def _midi_bytes() -> bytes:
    """The worked example written as an SMF with mido (tempo map in a conductor track)."""
    mid = mido.MidiFile(type=1, ticks_per_beat=TPB)
    cond = mido.MidiTrack([mido.MetaMessage("set_tempo", tempo=500_000, time=0),
                           mido.MetaMessage("set_tempo", tempo=1_000_000, time=1920)])
    mid.tracks.append(cond)
    for track in (1, 2, 3):
        ev = []
        for s, e, p, ch, prog, tr in WORKED:
            if tr == track:
                ev += [(s, 1, mido.Message("note_on", channel=ch, note=p, velocity=80)),
                       (e, 0, mido.Message("note_off", channel=ch, note=p, velocity=0))]
        msgs = [mido.Message("program_change", channel=1, program=40, time=0)] if track == 2 else []
        last = 0
        for t, _, m in sorted(ev, key=lambda x: (x[0], x[1])):
            msgs.append(m.copy(time=t - last))
            last = t
        mid.tracks.append(mido.MidiTrack(msgs))
    return smf_bytes(mid)


def test_worked_example_seconds_agree_with_pretty_midi():
    # pretty_midi applies the tempo map itself; its note times must equal our hand values.
    pm = pretty_midi.PrettyMIDI(io.BytesIO(_midi_bytes()))
    ends = sorted(n.end for inst in pm.instruments for n in inst.notes)
    assert ends[-1] == pytest.approx(14.0)
    ours = make_piece(WORKED, TWO_TEMPI)
    assert sorted(ours.notes["end_s"].tolist()) == pytest.approx(ends)


def test_decoded_files_agree_with_pretty_midi():
    """On seeded random SMF files: duration, note count, drum fraction, distinct pitches and
    programs as pretty_midi reads them (reference library)."""
    smf = pytest.importorskip("pipeline.midi.decode")
    from fixtures_midi import random_midi

    for seed in range(8):
        data = random_midi(seed, n_notes=120, n_tracks=3)
        s = piece_stats(smf.decode(data))
        pm = pretty_midi.PrettyMIDI(io.BytesIO(data))
        notes = [(n, inst) for inst in pm.instruments for n in inst.notes]
        assert s["notes"] == len(notes)
        assert s["duration_s"] == pytest.approx(max(n.end for n, _ in notes))
        assert s["drum_fraction"] == pytest.approx(sum(i.is_drum for _, i in notes) / len(notes))
        assert s["pitches"] == len({n.pitch for n, i in notes if not i.is_drum})
        assert s["programs"] == sorted({i.program for _, i in notes if not i.is_drum})
