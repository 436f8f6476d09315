"""The windowed key estimate (pipeline.analysis.modulation) and key_meter's modulation fields."""
from __future__ import annotations

import numpy as np
import pytest

from pipeline.analysis import key as keymod
from pipeline.analysis import modulation
from pipeline.config import validate_stage_options
from pipeline.errors import ConfigError
from pipeline.midi.piece import KEY_DTYPE, METER_DTYPE, TEMPO_DTYPE, Piece, empty_notes, sort_notes
from pipeline.stages.base import FileContext
from pipeline.stages.key_meter import KeyMeter

TPB = 480


def _piece(rows) -> Piece:
    """A piece from (start beat, end beat, pitch) rows."""
    notes = empty_notes(len(rows))
    for i, (start, end, pitch) in enumerate(rows):
        notes[i]["start"], notes[i]["end"] = int(start * TPB), int(end * TPB)
        notes[i]["pitch"] = pitch
    notes["velocity"] = 80
    return Piece(notes=sort_notes(notes), ticks_per_beat=TPB,
                 tempos=np.array([(0, 500_000)], dtype=TEMPO_DTYPE),
                 time_signatures=np.zeros(0, dtype=METER_DTYPE),
                 key_signatures=np.zeros(0, dtype=KEY_DTYPE))


def _cadences(tonic: int, minor: bool, bars: int, start_bar: int = 0) -> list:
    """``bars`` 4/4 bars of I-IV-V-I (minor: i-iv-V-i) in block chords under a melody walking
    the scale on quarter notes: the plainest way to establish a key (common practice of tonal
    harmony: a key is established by its scale and an authentic cadence V-I)."""
    third = 3 if minor else 4
    chords = [(0, third, 7), (5, 5 + third, 12), (7, 11, 14), (0, third, 7)]
    scale = (0, 2, 3, 5, 7, 8, 11, 12) if minor else (0, 2, 4, 5, 7, 9, 11, 12)
    rows = []
    for b in range(bars):
        t = (start_bar + b) * 4
        rows += [(t, t + 4, 48 + tonic + i) for i in chords[b % 4]]
        rows += [(t + q, t + q + 1, 72 + tonic + scale[(4 * b + q) % 8]) for q in range(4)]
    return rows


def _index(name: str) -> int:
    pc, mode = keymod.parse_key(name)
    return pc + (12 if mode == "minor" else 0)


@pytest.mark.parametrize("second, tonic, minor", [("Eb major", 3, False), ("G major", 7, False),
                                                  ("E minor", 4, True)])
def test_a_clearly_established_second_key_modulates(second, tonic, minor):
    # C major for 16 bars, then 16 bars establishing another key signature's key (Eb major:
    # three flats; G major: one sharp, the dominant; E minor: one sharp, the mediant's minor):
    # a modulation in the sense of tonal theory (common practice: a new tonic confirmed by a
    # cadence and held for a section)
    piece = _piece(_cadences(0, False, 16) + _cadences(tonic, minor, 16, start_bar=16))
    regions = modulation.key_regions(piece, main=_index("C major"))
    assert regions.modulates
    assert regions.second_key == second
    # the path: C major, then the new key, changing near bar 16 (beat 64; segments of 8 beats)
    first, last = regions.segments[0], regions.segments[-1]
    assert first[2] == _index("C major") and last[2] == _index(second)
    assert abs(last[0] - 64) <= modulation.WINDOW_BEATS
    assert regions.second_share == pytest.approx(0.5, abs=0.13)


def test_one_key_and_the_relative_minor_do_not_modulate():
    # a plain C major piece: one key (common practice)
    plain = modulation.key_regions(_piece(_cadences(0, False, 32)))
    assert not plain.modulates and plain.second is None
    assert plain.segments == ((0.0, 128.0, _index("C major")),)
    # C major then A minor: the relative minor shares the key signature, which the flag
    # leaves out by design (no change of pitch collection)
    relative = modulation.key_regions(_piece(_cadences(0, False, 16) + _cadences(9, True, 16, 16)))
    assert not relative.modulates
    # a short excursion (2 of 32 bars in Eb) is below the 15% share
    brief = _piece(_cadences(0, False, 15) + _cadences(3, False, 2, 15) + _cadences(0, False, 15, 17))
    assert not modulation.key_regions(brief).modulates


def test_transposition_moves_the_keys():
    rows = _cadences(0, False, 16) + _cadences(3, False, 16, 16)
    base = modulation.key_regions(_piece(rows))
    up = modulation.key_regions(_piece([(s, e, p + 5) for s, e, p in rows]))
    assert up.modulates == base.modulates
    assert [(a, b, (k + 5) % 12 + 12 * (k // 12)) for a, b, k in base.segments] == list(up.segments)


def test_presence_probabilities_are_temperley_kostka_payne():
    # Temperley 2007, Music and Probability, ch. 4 (from memory): in a key, each pitch class is
    # present in a segment independently with the Kostka-Payne probability; the profile values
    # are checked against the published table in test_key.py
    major, minor = keymod.PROFILES["temperley_kostka_payne"]
    c_e_g = (1 << 0) | (1 << 4) | (1 << 7)
    want = sum(np.log(p) if pc in (0, 4, 7) else np.log(1 - p) for pc, p in enumerate(major))
    assert modulation.PRESENCE_TABLE[c_e_g, _index("C major")] == pytest.approx(want)
    # the same set read in A minor: tonic A (pc 9), C is the minor third, E the fifth
    want = sum(np.log(minor[(pc - 9) % 12]) if pc in (0, 4, 9) else np.log(1 - minor[(pc - 9) % 12])
               for pc in range(12))
    a_c_e = (1 << 9) | (1 << 0) | (1 << 4)
    assert modulation.PRESENCE_TABLE[a_c_e, _index("A minor")] == pytest.approx(want)


def _viterbi_reference(emit: np.ndarray, switch_cost: float) -> float:
    """The best path score by the textbook Viterbi recursion over a full 24 x 24 transition
    matrix (Rabiner 1989, A tutorial on hidden Markov models, eq. 32-35)."""
    trans = np.where(np.eye(24, dtype=bool), 0.0, -switch_cost)
    delta = emit[0].copy()
    for row in emit[1:]:
        delta = (delta[:, None] + trans).max(axis=0) + row
    return float(delta.max())


def test_key_path_is_the_best_path():
    rng = np.random.default_rng(7)
    for trial in range(20):
        sets = rng.integers(0, 4096, size=int(rng.integers(1, 30)))
        cost = float(rng.choice([0.5, 4.0, 20.0]))
        path = modulation.key_path(sets, cost)
        emit = modulation.PRESENCE_TABLE[sets]
        emit[sets == 0] = 0.0
        got = emit[np.arange(len(sets)), path].sum() - cost * np.count_nonzero(np.diff(path))
        assert got == pytest.approx(_viterbi_reference(emit, cost))


def test_segment_sets_count_sustained_notes_in_every_segment():
    # a note held over three 8-beat segments (0-2), a note in segment 1, nothing starting in
    # segments 2-3, then two notes in segment 4 (the second held into segment 5)
    numbers, sets = modulation.segment_sets(_piece([(0, 20, 60), (9, 10, 67), (32, 33, 62),
                                                    (39, 41, 64)]))
    assert numbers.tolist() == [0, 1, 4]  # segments where a note starts
    assert sets.tolist() == [1 << 0, (1 << 0) | (1 << 7), (1 << 2) | (1 << 4)]
    empty = modulation.segment_sets(_piece([]))
    assert empty[0].tolist() == [] and empty[1].tolist() == []
    assert not modulation.key_regions(_piece([])).modulates
    # huge tick values cost nothing: segments are numbered by rank
    far = _piece([(0, 4, 60), (2.0 ** 52, 2.0 ** 52 + 4, 62)])
    assert modulation.segment_sets(far)[1].tolist() == [1 << 0, 1 << 2]


def test_key_meter_records_modulation():
    piece = _piece(_cadences(0, False, 16) + _cadences(3, False, 16, 16))
    values = KeyMeter().process(piece, FileContext(piece)).values
    assert values["key_modulates"] is True and values["key_second"] in ("Eb major", "C major")
    assert values["key_second"] != f"{values['tonic']} {values['mode']}"
    plain = _piece(_cadences(0, False, 32))
    v = KeyMeter().process(plain, FileContext(plain)).values
    assert v["key_modulates"] is False and v["key_second"] is None
    # the share option: above one half no piece can hold two signatures that long
    strict = KeyMeter({"modulation_share": 0.6}).process(piece, FileContext(piece)).values
    assert strict["key_modulates"] is False and strict["key_second"] is None


def test_modulation_share_option_is_checked():
    with pytest.raises(ConfigError):
        validate_stage_options("key_meter", {"modulation_share": 1.5}, "stages[0].key_meter")
    opts = validate_stage_options("key_meter", {}, "stages[0].key_meter")
    assert opts["modulation_share"] == modulation.MIN_SHARE
