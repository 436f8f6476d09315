"""Tests of the validate stage: verdicts, values and options."""
from __future__ import annotations

import json

import pytest

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
        assert "greater than 0" in opts[name].check(0) or "from 1 to" in opts[name].check(0)
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


def _worker_verdict(tmp_path, data: bytes, **opts) -> tuple:
    """The validate verdict a worker stores for a file of ``data`` (kept, reason, detail, ...)."""
    import hashlib
    from pipeline.config import validate_stage_options
    from pipeline.engine.worker import FileTask, StagePlan, process_file
    path = tmp_path / "f.mid"
    path.write_bytes(data)
    plan = StagePlan("validate", validate_stage_options("validate", opts, "validate"), "file", True)
    sha256 = hashlib.sha256(data).hexdigest()  # the content the task names, as a run hashes it
    return process_file(FileTask(sha256, str(path), "f.mid", [plan], None)).results["validate"]


def test_a_max_bytes_far_above_the_file_reads_only_the_file(tmp_path):
    """Python's ``read(n)`` allocates n bytes before reading (common practice: io.FileIO.read):
    a max_bytes of 3e9 ran every worker out of its memory limit and 2**63 raised OverflowError,
    so every file dropped. The worker reads at most the file's size plus one byte."""
    data = random_midi(2, n_notes=40)
    for max_bytes in (3_000_000_000, 2 ** 63):
        assert _worker_verdict(tmp_path, data, max_bytes=max_bytes)[0] == 1


def test_too_large_states_the_files_own_size(tmp_path):
    """The worker reads max_bytes + 1 bytes of a larger file; the verdict stated that count
    (an audit: 'the file has 16000001 bytes' for a 3 GiB file), not the file's size."""
    data = random_midi(3, n_notes=200)
    kept, reason, detail, _, _ = _worker_verdict(tmp_path, data, max_bytes=100)
    assert (kept, reason) == (0, "too_large")
    assert detail == (f"byte 0: the file has {len(data)} bytes, over the limit max_bytes=100; "
                      "raise max_bytes if such files are wanted")


def test_max_tracks_is_bounded_by_the_tracks_the_decoder_can_number():
    """The note table numbers tracks as int16 (pipeline.midi.decode.NOTE_DTYPE): a file of more
    than 32768 tracks raised 'read_track: track outside int16' (decoder_crash) once max_tracks
    was raised to 65535, which the config accepted. SMF 1.0's header counts tracks in 16 bits."""
    from pipeline.config import validate_stage_options
    from pipeline.errors import ConfigError, DecodeError
    from pipeline.midi.decode import decode
    assert validate_stage_options("validate", {"max_tracks": 32768}, "v")["max_tracks"] == 32768
    with pytest.raises(ConfigError, match=r"must be from 1 to 32768: the decoder numbers a file's "
                                          r"tracks as 16-bit signed integers .*\(got 65535\)"):
        validate_stage_options("validate", {"max_tracks": 65535}, "stages[0].validate")
    # called directly with a larger limit, the decoder refuses such a header as too_large
    header = b"MThd" + (6).to_bytes(4, "big") + (1).to_bytes(2, "big") + (40000).to_bytes(2, "big") \
        + (480).to_bytes(2, "big")
    with pytest.raises(DecodeError) as exc:
        decode(header + b"MTrk\0\0\0\0" * 40000, max_tracks=65535)
    assert exc.value.code == "too_large"
    assert "over the limit max_tracks=32768; the decoder reads at most 32768 tracks" in exc.value.reason


def test_no_notes_says_when_every_note_had_zero_length():
    """A file of 64 notes whose note-off falls on the note-on's tick was told 'a file needs at
    least one note-on with its note-off', which it has (an audit); the decoder drops such
    notes (pipeline.midi.decode.REPAIRS: zero_length_notes_dropped) and the detail says so."""
    notes = " ".join(f"78 90 {60 + i % 12:02x} 50 00 80 {60 + i % 12:02x} 00" for i in range(64))
    result, piece = Validate().read(smf(mtrk(notes + " 00 ff 2f 00")), "z.mid")
    assert piece is None and result.reason == "no_notes"
    assert result.detail.endswith("but no notes: its 64 note(s) all end at the tick they start "
                                  "(zero length, dropped)")
    assert result.values["repairs"] == {"zero_length_notes_dropped": 64}
