"""Meter, tempo and quantization checks on music21-rendered works and mido-written files."""
from __future__ import annotations

import io

import mido
import numpy as np
import pytest

from pipeline.analysis import meter as metermod
from pipeline.analysis.evaluate_key import meter_table
from pipeline.score import METER_DTYPE, Piece
from pipeline.stages.base import FileContext
from pipeline.stages.key_meter import KeyMeter

from music21_fixtures import abc_tunes, chorales, decode


@pytest.fixture(scope="session")
def chorale_works():
    return [c for c in chorales(100) if c["meter"]]


@pytest.fixture(scope="session")
def folk_works():
    # Aird's Airs books 4-6 and music21's misc-folk opuses (ABC), held out from tuning
    return abc_tunes("eval", 12)


def _midi(messages, ticks_per_beat=480) -> bytes:
    """A one-track file written by mido (the reference writer)."""
    mf = mido.MidiFile(ticks_per_beat=ticks_per_beat)
    mf.tracks.append(mido.MidiTrack(messages))
    buf = io.BytesIO()
    mf.save(file=buf)
    return buf.getvalue()


def _notes(onsets_ticks, dur=240, pitch=60):
    return _track([(t, dur, pitch) for t in onsets_ticks])


def _track(notes):
    """Delta-timed note messages for (start tick, duration, pitch) triples (may overlap)."""
    events = sorted([(t, 1, p) for t, d, p in notes] + [(t + d, 0, p) for t, d, p in notes])
    msgs, now = [], 0
    for tick, on, p in events:
        kind = "note_on" if on else "note_off"
        msgs.append(mido.Message(kind, note=p, velocity=80 if on else 0, time=tick - now))
        now = tick
    return msgs


# --- estimate accuracy on music21 works with time signatures removed -----------------------

def test_meter_beats_majority_baseline(chorale_works, folk_works, record_property):
    # truth: the time signature of the score (music21 corpus); baseline: always answer the
    # most frequent meter (family) of the same set
    allm = meter_table(chorale_works + folk_works)
    folk = meter_table(folk_works)
    for label, m in (("all", allm), ("folk", folk)):
        record_property(f"meter_{label}", m)
        print(label, m)
    # compound/triple/duple families: at least 15 points above "always duple"
    assert allm["family"] >= allm["baseline_family"] + 0.15
    assert folk["family"] >= folk["baseline_family"] + 0.15
    # exact meters: at least 10 points above "always the most frequent meter"
    assert allm["exact"] >= allm["baseline_exact"] + 0.10
    assert folk["exact"] >= folk["baseline_exact"] + 0.10


def test_chorales_mostly_right(chorale_works):
    # Bach chorales are nearly all 4/4 or 3/4 (music21 corpus); the family must be right
    m = meter_table(chorale_works)
    assert m["family"] >= 0.9


def test_meter_from_file_and_stage_source(chorale_works):
    work = chorale_works[0]
    with_ts = decode(work["midi"])          # key signatures removed, time signature kept
    without = decode(work["midi_no_meter"])
    assert metermod.meter_from_file(with_ts) == work["meter"]
    assert metermod.meter_from_file(without) is None
    v = KeyMeter().process(with_ts, FileContext(with_ts)).values
    assert (v["meter"], v["meter_source"]) == (work["meter"], "file")
    assert v["meter_estimated"] == metermod.estimate_meter(with_ts).meter
    v2 = KeyMeter().process(without, FileContext(without)).values
    assert v2["meter_source"] == "estimated" and v2["meter"] == v2["meter_estimated"]


def test_meter_from_file_takes_the_longest_lasting_signature():
    data = _midi([mido.MetaMessage("time_signature", numerator=4, denominator=4, time=0),
                  mido.MetaMessage("time_signature", numerator=6, denominator=8, time=480)]
                 + _notes(range(480, 480 * 20, 480)))
    assert metermod.meter_from_file(decode(data)) == "6/8"


@pytest.mark.parametrize("meter,family", [("2/4", "duple"), ("4/4", "duple"), ("2/2", "duple"),
                                          ("3/4", "triple"), ("3/8", "triple"), ("3/2", "triple"),
                                          ("6/8", "compound"), ("9/8", "compound"),
                                          ("12/8", "compound"), ("5/4", "duple"), ("6/4", "compound")])
def test_meter_family(meter, family):
    # common practice: simple duple/quadruple, simple triple, compound (beat divided in three)
    assert metermod.meter_family(meter) == family


def test_synthetic_waltz_and_jig():
    # invented rhythms (not an outside reference): a waltz bass on beat 1 with chords on 2, 3,
    # and a jig of quarter-eighth pairs; the estimate must find triple and compound
    waltz = []
    for bar in range(16):
        t = bar * 3 * 480
        waltz += [(t, 960, 40), (t + 480, 240, 64), (t + 960, 240, 64)]
    assert metermod.estimate_meter(decode(_midi(_track(waltz)))).meter in ("3/4", "3/8", "3/2")
    jig = []
    for beat in range(32):
        t = beat * 720
        jig += [(t, 480, 67), (t + 480, 240, 64)]
    assert metermod.meter_family(metermod.estimate_meter(decode(_midi(_track(jig)))).meter) == "compound"


# --- tempo and grid ------------------------------------------------------------------------

def test_tempo_bpm_is_beats_over_minutes():
    # 4 beats at 120 BPM then 4 beats at 60 BPM: 8 beats in 2 s + 4 s -> 80 BPM
    # (tempo values via mido.bpm2tempo, the reference conversion)
    msgs = [mido.MetaMessage("set_tempo", tempo=mido.bpm2tempo(120), time=0)]
    msgs += _notes([0], dur=480 * 4)
    msgs += [mido.MetaMessage("set_tempo", tempo=mido.bpm2tempo(60), time=0)]
    msgs += [mido.Message("note_on", note=62, velocity=80, time=0),
             mido.Message("note_off", note=62, velocity=0, time=480 * 4)]
    piece = decode(_midi(msgs))
    assert metermod.tempo_bpm(piece) == pytest.approx(80.0)
    assert piece.duration_s == pytest.approx(6.0)


def test_tempo_bpm_matches_pretty_midi_for_constant_tempo(chorale_works):
    # source: pretty_midi.PrettyMIDI.get_tempo_changes on the same bytes
    pretty_midi = pytest.importorskip("pretty_midi")
    data = chorale_works[0]["midi"]
    _, tempi = pretty_midi.PrettyMIDI(io.BytesIO(data)).get_tempo_changes()
    assert len(set(np.round(tempi, 6))) == 1
    assert metermod.tempo_bpm(decode(data)) == pytest.approx(tempi[0])


def test_grid_fraction():
    tpb = 480
    quantized = decode(_midi(_notes([i * 120 for i in range(32)] + [4000, 4160])))  # 16ths, triplet 8th
    assert metermod.grid_fraction(quantized) == 1.0
    rng = np.random.default_rng(0)
    onsets = np.sort(rng.integers(0, 200 * tpb, 400))
    onsets = np.unique(onsets)
    jittered = decode(_midi(_notes([int(t) for t in onsets], dur=5)))
    frac = metermod.grid_fraction(jittered)
    # random onsets land within 10 ticks of a 16th (every 120) or 8th-triplet (every 160) grid
    # line with probability about 0.28 (union of the two grids' +-10-tick windows)
    assert 0.15 < frac < 0.45
    off = decode(_midi(_notes([i * 480 + 30 for i in range(16)])))
    assert metermod.grid_fraction(off) == 0.0
    assert metermod.grid_fraction(off, tolerance_beats=30 / 480) == 1.0


def test_empty_piece(chorale_works):
    piece = decode(chorale_works[0]["midi"])
    empty = Piece(**{**piece.__dict__, "notes": piece.notes[:0],
                     "time_signatures": np.zeros(0, dtype=METER_DTYPE)})
    est = metermod.estimate_meter(empty)
    assert est.meter == "4/4" and est.confidence == 0.0
    assert metermod.grid_fraction(empty) == 1.0
    values = KeyMeter().process(empty, FileContext(empty)).values
    assert values["meter_source"] == "estimated"


def test_a_long_silence_does_not_blow_up_the_accent_function():
    # Found by the fuzzer (pipeline/fuzz.py): a valid 197-byte file, 1 tick per beat, with a note
    # at tick 268,761,124 made the accent function ask for 24 GiB. Silence is now squeezed by
    # whole common bars, which keeps every onset's position in every candidate bar.
    from pipeline.analysis.meter import COMMON_BAR_BINS, _squeeze_gaps, accent_function
    from pipeline.smf import decode
    data = bytes.fromhex(
        "4d546864000000060000000100014d54726b000000af00ff0302bacd82139f6a3c078f6a0c825d9f6c65529f5d257e"
        "8f6c13229f0a0b2f8f5d2483108f0a3d8bdf519f5d6f349f627481668f5d6450cf6081019f2774298f6274ffffff7f"
        "8f273d83e65d9f1a713c9f5a630e9f2f19019f4917748f5a64459f2748658f27181d9f1f670d8f2f46358f4941189f"
        "08505f8f08518209ff0104504b0304228f1a7282538f1f3c6abf3e54848a79cf728200df428130ef5d3f81099f706e"
        "81608f700102ff2f00")
    piece = decode(data)
    assert len(accent_function(piece)) < 100 * COMMON_BAR_BINS
    bins = np.array([0, 12, 30, 10_000, 10_012, 5_000_000_000])
    squeezed = _squeeze_gaps(bins)
    assert ((squeezed - bins) % COMMON_BAR_BINS == 0).all()       # bar positions kept
    assert (np.diff(squeezed)[:2] == np.diff(bins)[:2]).all()     # short gaps untouched
    assert squeezed.max() < 10 * COMMON_BAR_BINS
