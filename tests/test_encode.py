"""Tests of pipeline.midi.encode: SMF layout per the spec, round trips through mido and our decoder."""
from __future__ import annotations

import io

import mido
import numpy as np
import pytest

from fixtures_midi import bach_chorale_midi, mido_rows, parse_hexdump, piece_rows, random_midi
from pipeline.midi.encode import encode, vlq
from pipeline.store.atomic import write_atomic
from pipeline.errors import OutputError
from pipeline.midi.decode import decode
from test_smf import VLQ_EXAMPLES


@pytest.mark.parametrize("value,encoded", VLQ_EXAMPLES)
def test_vlq_spec_examples(value, encoded):
    # Source: SMF 1.0 spec, variable-length quantity table.
    assert vlq(value) == bytes.fromhex(encoded)


def test_vlq_out_of_range():
    with pytest.raises(ValueError, match="0..0x0FFFFFFF"):
        vlq(0x10000000)


def test_spec_example_encodes_to_spec_layout():
    # Source: SMF 1.0 spec appendix example (from memory), read with our decoder, re-encoded:
    # the header chunk layout is MThd, length 6, format, ntrks, division (SMF 1.0 "Header Chunks").
    data = parse_hexdump("""
    4d 54 68 64 00 00 00 06 00 00 00 01 00 60
    4d 54 72 6b 00 00 00 3b
    00 ff 58 04 04 02 18 08  00 ff 51 03 07 a1 20  00 c0 05  00 c1 2e  00 c2 46
    00 92 30 60  00 3c 60  60 91 43 40  60 90 4c 20  81 40 82 30 40  00 3c 40
    00 81 43 40  00 80 4c 40  00 ff 2f 00
    """)
    out = encode(decode(data))
    # format 1, conductor + one track per channel (3), 96 ticks per quarter
    assert out[:14] == parse_hexdump("4d 54 68 64 00 00 00 06  00 01 00 04 00 60")
    conductor = parse_hexdump("""
    4d 54 72 6b 00 00 00 13      # MTrk, 19 bytes
    00 ff 58 04 04 02 18 08      # time signature 4/4
    00 ff 51 03 07 a1 20         # tempo 500,000
    00 ff 2f 00                  # end of track
    """)
    assert out[14:14 + len(conductor)] == conductor
    ref = mido.MidiFile(file=io.BytesIO(out))  # reference decoder
    assert ref.type == 1 and len(ref.tracks) == 4 and ref.ticks_per_beat == 96
    assert [r[:6] for r in mido_rows(out)] == [r[:6] for r in mido_rows(data)]


def _same_notes(a_rows, b_rows):
    # (start, end, pitch, velocity, channel, program); track numbers change by design
    return sorted(r[:6] for r in a_rows) == sorted(r[:6] for r in b_rows)


@pytest.mark.parametrize("seed", range(8))
def test_round_trip_generated(seed):
    data = random_midi(100 + seed, n_notes=200, n_tracks=1 + seed % 4, hanging=seed % 2)
    piece = decode(data)
    out = encode(piece)
    again = decode(out)
    assert _same_notes(piece_rows(piece), piece_rows(again))
    assert _same_notes(piece_rows(piece), mido_rows(out))  # reference: mido
    assert np.allclose(piece.notes["start_s"], again.notes["start_s"])
    assert again.repairs == {}
    assert again.title == piece.title
    assert again.tempos.tolist() == piece.tempos.tolist()
    assert again.time_signatures.tolist() == piece.time_signatures.tolist()
    assert again.key_signatures.tolist() == piece.key_signatures.tolist()
    assert encode(piece) == out and encode(again) == out  # deterministic bytes


def test_round_trip_bach_chorales():
    for name, data in bach_chorale_midi():
        piece = decode(data)
        out = encode(piece)
        assert _same_notes(piece_rows(piece), piece_rows(decode(out))), name
        assert _same_notes(piece_rows(piece), mido_rows(out)), name
        assert encode(decode(out)) == out


def test_transposed_notes_argument():
    piece = decode(random_midi(7, n_notes=100, n_tracks=2))
    notes = piece.notes.copy()
    notes["pitch"] += 3
    again = decode(encode(piece, notes))
    assert _same_notes(piece_rows(again), [(int(n["start"]), int(n["end"]), int(n["pitch"]),
                                            int(n["velocity"]), int(n["channel"]),
                                            int(n["program"]), 0) for n in notes])


def test_program_changes_between_simultaneous_notes():
    # two notes on one channel and tick with different programs: each keeps its own
    data = parse_hexdump("""
    4d 54 68 64 00 00 00 06 00 01 00 01 00 60
    4d 54 72 6b 00 00 00 18
    00 c0 05  00 90 3c 64  00 c0 07  00 90 40 64  60 3c 00  00 40 00  00 ff 2f 00
    """)
    piece = decode(data)
    assert piece.notes["program"].tolist() == [5, 7]
    assert decode(encode(piece)).notes["program"].tolist() == [5, 7]
    assert [r[5] for r in mido_rows(encode(piece))] == [5, 7]


def test_smpte_piece_rebased_to_480():
    data = parse_hexdump("""
    4d 54 68 64 00 00 00 06 00 01 00 01 e7 28   # SMPTE 25 fps x 40 = 1000 ticks/s
    4d 54 72 6b 00 00 00 0d
    00 90 3c 64  83 74 80 3c 40  00 ff 2f 00     # note from 0 to 500 ticks = 0.5 s
    """)
    piece = decode(data)
    out = encode(piece)
    assert out[12:14] == (480).to_bytes(2, "big")
    again = decode(out)
    assert not again.smpte
    assert again.notes["end"].tolist() == [480]  # 0.5 s at 120 BPM = 1 beat
    assert again.notes["end_s"].tolist() == piece.notes["end_s"].tolist() == [0.5]


def test_write_atomic(tmp_path):
    path = tmp_path / "sub" / "x.mid"
    write_atomic(path, b"one")
    write_atomic(path, b"two")
    assert path.read_bytes() == b"two"
    assert [p.name for p in path.parent.iterdir()] == ["x.mid"]  # no temp file left


def test_write_atomic_error_is_output_error(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_bytes(b"")
    with pytest.raises(OutputError, match="cannot write") as exc:
        write_atomic(blocker / "x.mid", b"data")  # parent is a file, not a folder
    assert exc.value.file == str(blocker / "x.mid")


def test_zero_length_notes_not_written_and_bad_notes_refused():
    piece = decode(random_midi(8, n_notes=20, n_tracks=1))
    notes = piece.notes.copy()
    notes["end"][0] = notes["start"][0]
    again = decode(encode(piece, notes))
    assert len(again.notes) == len(notes) - 1 and again.repairs == {}
    notes["end"][0] = notes["start"][0] - 1
    with pytest.raises(ValueError, match="ends before it starts"):
        encode(piece, notes)
