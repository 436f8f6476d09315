"""The key and meter fields of one manifest row: declared meters overruled only when the notes
rule them out, no estimate without evidence, one key per row with ``trust_file_key``, the key
transpose shifted by, and its guard on the recorded value.

Outside references: music21's corpus (Verdi's 'La donna e mobile' notated in 3/8, Bach
chorales with their notated keys) and ``analyze('key')``; mido as the writer of the hand-made
files (one chord, a drum loop); the published relation of simple and compound meters (a 3/8
bar is one dotted-quarter beat, two of them a 6/8 bar).
"""
from __future__ import annotations

import dataclasses
from pathlib import Path

import mido
import numpy as np
import pytest

from fixtures_midi import smf_bytes
from pipeline.analysis import key as keymod
from pipeline.analysis import meter as metermod
from pipeline.midi.decode import decode
from pipeline.midi.piece import KEY_DTYPE, Piece
from pipeline.outputs.manifest import _kept_detail
from pipeline.stages.base import FileContext
from pipeline.stages.key_meter import KeyMeter
from pipeline.stages.transpose import Transpose
from pipeline.tools import evaluate_meter as ev


def _file(tracks_messages, ticks_per_beat=480) -> bytes:
    mf = mido.MidiFile(ticks_per_beat=ticks_per_beat)
    for msgs in tracks_messages:
        mf.tracks.append(mido.MidiTrack(msgs))
    return smf_bytes(mf)


def _chord_file(meter: tuple[int, int] | None, chords: int = 1) -> bytes:
    """``chords`` 12-note chords, each held 4 beats, one after the other (mido)."""
    msgs = []
    if meter:
        msgs.append(mido.MetaMessage("time_signature", numerator=meter[0], denominator=meter[1]))
    pitches = [36 + 3 * i for i in range(12)]
    for _ in range(chords):
        msgs += [mido.Message("note_on", note=p, velocity=80, time=0) for p in pitches]
        msgs += [mido.Message("note_off", note=p, velocity=0, time=1920 if i == 0 else 0)
                 for i, p in enumerate(pitches)]
    return _file([msgs])


def _stage_values(stage, data: bytes) -> dict:
    piece = decode(data)
    return stage.process(piece, FileContext(piece)).values


# --- declared meters --------------------------------------------------------------------------

def test_3_8_and_the_compound_meters_are_one_beat():
    # a 3/8 bar is one dotted-quarter beat; 6/8, 9/8 and 12/8 are two, three and four of them
    # (as 2/4 and 4/4 are one and two bars of two quarter beats)
    assert {"3/8", "6/8", "9/8", "12/8"} <= metermod.compatible_meters("3/8")
    assert "3/8" in metermod.compatible_meters("6/8")
    assert "3/4" not in metermod.compatible_meters("6/8")
    assert metermod.compatible_meters("4/4") == {"2/4", "4/4", "2/2"}


def test_a_3_8_score_estimated_6_8_keeps_its_declared_meter():
    # music21's corpus: Verdi, 'La donna e mobile', notated in 3/8; the estimate reads two of
    # its bars as one 6/8 bar (measured; README, Meter estimation). The meters over its
    # dotted-quarter beat get 0.98 of the probability; before, only the "triple" family
    # counted (0.53), so a meter_contradiction of 0.9 replaced the declared 3/8 by 6/8.
    from music21 import corpus
    root = Path(corpus.getComposer("bach")[0]).parents[1]
    work = ev._corpus_file(root / "verdi/laDonnaEMobile.mxl")
    assert work["meter"] == "3/8"
    piece = ev.piece_from_notes(work["notes"])
    est = metermod.estimate_meter(piece)
    assert est.meter in ("6/8", "9/8", "12/8")
    assert metermod.declared_meter_issue("3/8", est) is None
    assert metermod.declared_meter_issue("3/8", est, 0.9) is None


def test_declared_meters_of_music21_held_out_sets_are_not_overruled():
    # the held-out Bach chorales of the meter evaluation (music21's notated meter, the truth):
    # at the default meter_contradiction none is overruled (README, Declared meters; before,
    # one of 118 was, 3/2 read as 4/4)
    works = ev.chorales("held", 120)
    assert len(works) >= 100
    over = [w["name"] for w in works
            if metermod.declared_meter_issue(w["meter"], metermod.estimate_meter(
                ev.piece_from_notes(w["notes"]))) is not None]
    assert over == []


# --- no estimate without evidence ----------------------------------------------------------------

@pytest.mark.parametrize("meter", [(4, 4), (6, 8), (2, 2)])
def test_one_chord_gives_no_meter_and_keeps_the_declaration(meter):
    # one 12-note chord held 4 beats (an audit: 3/4 at confidence 1.0, and every declaration
    # "contradicted"): no rhythm, so no estimate and the declaration stands
    v = _stage_values(KeyMeter(), _chord_file(meter))
    assert v["meter_estimated"] is None and v["meter_confidence"] is None
    declared = f"{meter[0]}/{meter[1]}"
    assert (v["meter"], v["meter_source"], v["meter_declared_suspect"]) == (declared, "file", None)
    # without a declaration the row has no meter
    v = _stage_values(KeyMeter(), _chord_file(None))
    assert (v["meter"], v["meter_source"], v["meter_estimated"]) == (None, None, None)


def test_the_meter_needs_min_onsets_distinct_onsets():
    few = decode(_chord_file((4, 4), chords=metermod.MIN_ONSETS - 1))
    enough = decode(_chord_file((4, 4), chords=metermod.MIN_ONSETS))
    assert metermod.estimate_meter(few).meter is None
    assert metermod.estimate_meter(enough).meter is not None


def test_a_drum_loop_has_no_key_and_no_meter_estimate():
    # channel 10 only (mido): no pitched note, so no key (an audit: C major at 0.0417) and no
    # meter estimate (from pitched onsets); transpose leaves it as it is
    msgs = [mido.MetaMessage("time_signature", numerator=4, denominator=4)]
    for i in range(32):
        note = (36, 38, 42, 38)[i % 4]
        msgs += [mido.Message("note_on", channel=9, note=note, velocity=90, time=0),
                 mido.Message("note_off", channel=9, note=note, velocity=0, time=240)]
    data = _file([msgs])
    v = _stage_values(KeyMeter(), data)
    for field in ("tonic", "tonic_pc", "mode", "key_confidence", "key_runner_up", "key_source",
                  "key_modulates", "key_second", "meter_estimated", "meter_confidence"):
        assert v[field] is None, field
    assert (v["meter"], v["meter_source"]) == ("4/4", "file")
    t = _stage_values(Transpose({"min_key_confidence": 0.9, "below_confidence": "drop"}), data)
    assert t["transpose"] == 0 and t["transpose_held_back"] is False and t["tonic"] is None


# --- one key per row -------------------------------------------------------------------------

@pytest.fixture(scope="module")
def chorale_in_another_key():
    """A Bach chorale of the key evaluation (never trained on) whose estimated key (that of music21's analyze('key')) has
    another signature than C major, with a C major key signature added (a sequencer
    default)."""
    from music21_fixtures import chorales
    for w in chorales():
        piece = decode(w["midi"])
        est = keymod.estimate_key(piece)
        if (est.tonic_pc, est.mode) in ((0, "major"), (9, "minor")):
            continue
        # music21's analyze('key') (Aarden-Essen) on its parse of the same bytes
        if tuple(w["music21"]["key.aardenessen"]) != (est.tonic_pc, est.mode):
            continue
        declared = Piece(**{**piece.__dict__,
                            "key_signatures": np.array([(0, 0, 0)], dtype=KEY_DTYPE)})
        return declared, est
    raise AssertionError("no chorale outside C major / A minor")


def test_trust_file_key_fields_describe_the_reported_key(chorale_in_another_key):
    piece, est = chorale_in_another_key
    v = KeyMeter({"trust_file_key": True}).process(piece, FileContext(piece)).values
    assert (v["tonic"], v["mode"], v["key_source"]) == ("C", "major", "file")
    # the estimate's probability of C major, not of its own key (an audit: 0.99 shown beside a
    # file key the model gave almost nothing)
    assert v["key_confidence"] == round(est.scores[0], 4) < 0.5
    # the most likely key besides C major: the estimate's (music21 agrees on it)
    assert v["key_runner_up"] == est.name != "C major"
    assert v["key_second"] != "C major"
    # without trust_file_key the row describes the estimate, as before
    e = KeyMeter().process(piece, FileContext(piece)).values
    assert (e["tonic_pc"], e["mode"], e["key_confidence"], e["key_runner_up"]) == \
        (est.tonic_pc, est.mode, round(est.confidence, 4), est.runner_up)


def test_transpose_records_the_key_it_shifted_by(chorale_in_another_key):
    # key_meter trusts the file's C major, transpose (its own options) shifts by the estimate:
    # the row says so, and transpose_key + transpose is the target (C major / A minor)
    piece, est = chorale_in_another_key
    t = Transpose().process(piece, FileContext(piece)).values
    k = KeyMeter({"trust_file_key": True}).process(piece, FileContext(piece)).values
    row = {**t, **k}  # key_meter runs after transpose in the default order: its fields win
    assert row["tonic"] == "C" and row["transpose_key"] == est.name
    pc, mode = keymod.parse_key(row["transpose_key"])
    assert (pc + row["transpose"]) % 12 == (0 if mode == "major" else 9)
    assert row["transpose_key_confidence"] == round(est.confidence, 4)
    # the option's text says which stage's option decides the shift
    km = next(o for o in KeyMeter.options if o.name == "trust_file_key")
    tr = next(o for o in Transpose.options if o.name == "trust_file_key")
    assert "Transpose's own trust_file_key decides the shift" in km.doc
    assert tr.doc.startswith("Transpose by")


# --- the guard and the recorded value ------------------------------------------------------------

def test_the_guard_compares_the_recorded_confidence(monkeypatch, chorale_in_another_key):
    # an audit (POP909 425.mid): confidence 0.869951, shown 0.87, was held back at
    # min_key_confidence 0.87; the row's value and the decision now agree
    from pipeline.stages import transpose as tr
    real = tr.shared_key_estimate
    monkeypatch.setattr(tr, "shared_key_estimate",
                        lambda ctx, opts: dataclasses.replace(real(ctx, opts), confidence=0.869951))
    piece, _ = chorale_in_another_key
    res = Transpose({"min_key_confidence": 0.87}).process(piece, FileContext(piece))
    assert res.values["key_confidence"] == 0.87 and res.values["transpose_held_back"] is False
    res = Transpose({"min_key_confidence": 0.8701}).process(piece, FileContext(piece))
    assert res.values["key_confidence"] == 0.87 and res.values["transpose_held_back"] is True
    # the manifest's detail of such a kept file says why (README, Transposition guard)
    trail = [{"stage": "validate", "values": {}, "detail": None},
             {"stage": "transpose", "values": res.values, "detail": res.detail}]
    detail = _kept_detail(trail, "train")
    assert detail.startswith("kept: passed validate, transpose; placed in train")
    assert "not transposed: key " in detail and "below min_key_confidence 0.8701" in detail


def test_the_page_counts_the_normalized_key_from_the_key_transpose_shifted(chorale_in_another_key):
    # key_meter trusting the file's C major, transpose shifting by the estimate: the page's
    # "normalized" key is the estimate moved to its target (an audit's POP909 033.mid: E minor
    # estimated, C major declared, shifted +5; music21's analyze('key') read the output as
    # A minor), not the reported C major moved by +5 (F major)
    from pipeline.outputs.page import Facts
    piece, est = chorale_in_another_key
    t = Transpose().process(piece, FileContext(piece)).values
    k = KeyMeter({"trust_file_key": True}).process(piece, FileContext(piece)).values
    facts = Facts()
    facts.add({**t, **k, "status": "kept"})
    target = 0 if est.mode == "major" else 12 + 9  # C major / A minor
    assert facts.key_after[target] == 1 and sum(facts.key_after) == 1
    assert facts.key_before[0] == 1  # the reported source key: C major
