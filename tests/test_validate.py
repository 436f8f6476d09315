"""Tests of the validate stage: verdicts, values and options."""
from __future__ import annotations

import json

from fixtures_midi import random_midi
from pipeline.midi.piece import Piece
from pipeline.stages.base import REGISTRY, FileContext
from pipeline.stages.validate import Validate
from test_smf import ONE_NOTE, mtrk, smf


def test_registered_with_documented_options():
    assert REGISTRY["validate"] is Validate
    assert Validate.kind == "file"
    opts = {o.name: o for o in Validate.options}
    assert {k: o.default for k, o in opts.items()} == {
        "max_bytes": 16_000_000, "max_events": 2_000_000, "max_tracks": 1024,
        "allow_repairs": True, "timeout_s": 60.0, "max_memory_mb": 2048}
    for name in ("max_bytes", "max_events", "max_tracks"):
        assert opts[name].kind is int
        assert opts[name].check(1) is None
        assert "greater than 0" in opts[name].check(0)
    assert Validate({"max_bytes": 10}).fingerprint != Validate().fingerprint


def test_kept_file_values_and_detail():
    data = random_midi(1, n_notes=80, n_tracks=3)
    result, piece = Validate().read(data, "a.mid")
    assert result.kept and isinstance(piece, Piece)
    # random_midi names its conductor track "Piece <seed>" (a track_name meta event, as mido
    # writes it): the file's own title
    assert result.values == {"format": 1, "track_chunks": 4, "ticks_per_beat": 480, "smpte": False,
                             "repairs": {}, "file_title": "Piece 1"}
    assert result.detail == "SMF format 1, 4 tracks, 480 ticks per beat"
    json.dumps(result.to_json())  # manifest-ready


def test_repairs_listed_in_detail():
    # two notes never switched off; the end-of-track event comes 96 ticks later
    data = smf(mtrk("00 90 3c 64  00 90 40 64  60 ff 2f 00"))
    result, piece = Validate().read(data, "b.mid")
    assert result.kept and result.values["repairs"]["hanging_notes_closed"] == 2
    assert "closed 2 hanging notes" in result.detail


def test_allow_repairs_false_drops_with_needs_repair():
    data = smf(mtrk("00 90 3c 64 60 80 3c 40"))  # no end-of-track event
    result, piece = Validate({"allow_repairs": False}).read(data, "c.mid")
    assert not result.kept and piece is None
    assert result.reason == "needs_repair"
    assert "1 track had no end-of-track event" in result.detail
    assert Validate().read(data, "c.mid")[0].kept


def test_decode_error_becomes_drop_with_location():
    data = smf(mtrk(ONE_NOTE, length=41))
    result, piece = Validate().read(data, "d.mid")
    assert piece is None and not result.kept
    assert result.reason == "truncated"
    assert result.values == {"offset": 18, "track": 0}
    # the place, not the path: the verdict is shared by every byte-identical copy of the content
    assert result.detail.startswith("track 0, byte 18: track 0 declares 41 bytes")


def test_limits_are_passed_to_the_decoder():
    result, _ = Validate({"max_bytes": 20}).read(smf(mtrk(ONE_NOTE)), "e.mid")
    assert result.reason == "too_large" and "max_bytes=20" in result.detail
    assert result.thresholds["max_bytes"] == 20


def test_not_midi():
    result, _ = Validate().read(b"<html><body>Not found</body></html>", "f.mid")
    assert result.reason == "not_midi" and "HTML" in result.detail


def test_no_notes():
    result, piece = Validate().read(smf(mtrk("00 ff 2f 00")), "g.mid")
    assert result.reason == "no_notes" and piece is None
    assert "no notes" in result.detail


def test_process_gives_the_same_verdict_as_check():
    data = random_midi(3, n_notes=50, n_tracks=2, hanging=1)
    stage = Validate()
    result, piece = stage.read(data, "h.mid")
    again = stage.process(piece, FileContext(piece, "h.mid"))
    assert again.to_json() == result.to_json()
