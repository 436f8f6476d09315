"""Tests of pipeline.midi.decode.decode against the SMF 1.0 spec, mido and pretty_midi."""
from __future__ import annotations

import random

import numpy as np
import pytest

from fixtures_midi import (bach_chorale_midi, mido_rows, parse_hexdump, piece_rows,
                           piece_seconds_rows, pretty_midi_rows, random_midi)
from pipeline.errors import DecodeError
from pipeline.midi.piece import sort_notes
from pipeline.midi.decode import REPAIRS, decode, decode_file

HEADER_1TRK = """
4d 54 68 64 00 00 00 06  # MThd, header length 6
00 01 00 01 00 60        # format 1, 1 track, 96 ticks per beat
"""


def mtrk(body_hex: str, length: int | None = None) -> str:
    """An MTrk chunk around a hexdump body; ``length`` overrides the declared length."""
    body = parse_hexdump(body_hex)
    n = len(body) if length is None else length
    return f"4d 54 72 6b {n:08x}  # MTrk, length {n}\n" + body.hex(" ")


def smf(*tracks: str, header: str = HEADER_1TRK) -> bytes:
    return parse_hexdump(header) + b"".join(parse_hexdump(t) for t in tracks)


ONE_NOTE = """
00 90 3c 64   # delta 0, note-on C4 velocity 100
60 80 3c 40   # delta 96, note-off
00 ff 2f 00   # end of track
"""


def rows(piece):
    return [(int(n["start"]), int(n["end"]), int(n["pitch"]), int(n["velocity"]),
             int(n["channel"]), int(n["program"])) for n in piece.notes]


# --- Worked examples of the Standard MIDI Files 1.0 specification --------------------------

# Variable-length quantities: the table in SMF 1.0, "Conventions" section.
VLQ_EXAMPLES = [(0x00000000, "00"), (0x00000040, "40"), (0x0000007F, "7f"),
                (0x00000080, "81 00"), (0x00002000, "c0 00"), (0x00003FFF, "ff 7f"),
                (0x00004000, "81 80 00"), (0x00100000, "c0 80 00"), (0x001FFFFF, "ff ff 7f"),
                (0x00200000, "81 80 80 00"), (0x08000000, "c0 80 80 00"),
                (0x0FFFFFFF, "ff ff ff 7f")]


@pytest.mark.parametrize("value,encoded", VLQ_EXAMPLES)
def test_delta_time_vlq_spec_examples(value, encoded):
    # Source: SMF 1.0 spec, variable-length quantity examples (number -> representation).
    data = smf(mtrk(f"{encoded} 90 3c 64  01 80 3c 40  00 ff 2f 00"))
    piece = decode(data)
    assert rows(piece) == [(value, value + 1, 60, 100, 0, 0)]


def test_delta_time_longer_than_four_bytes_is_bad_event():
    data = smf(mtrk("81 80 80 80 00 90 3c 64  00 ff 2f 00"))
    with pytest.raises(DecodeError, match="longer than the 4 bytes") as exc:
        decode(data)
    assert exc.value.code == "bad_event" and exc.value.track == 0


def test_spec_appendix_format0_example():
    # Source: SMF 1.0 spec, appendix "MIDI File Example", format 0 version (from memory).
    data = parse_hexdump("""
    4d 54 68 64 00 00 00 06 00 00 00 01 00 60  # MThd: format 0, 1 track, 96 per quarter
    4d 54 72 6b 00 00 00 3b                    # MTrk, 59 bytes
    00 ff 58 04 04 02 18 08                    # time signature 4/4, 24 clocks, 8 32nds
    00 ff 51 03 07 a1 20                       # tempo 500,000 us per quarter
    00 c0 05                                   # ch 1 program 5
    00 c1 2e                                   # ch 2 program 46
    00 c2 46                                   # ch 3 program 70
    00 92 30 60                                # ch 3 note on C2, forte
    00 3c 60                                   # ch 3 note on C3 (running status)
    60 91 43 40                                # ch 2 note on G3, mezzo-forte
    60 90 4c 20                                # ch 1 note on E4, piano
    81 40 82 30 40                             # two-byte delta (192), ch 3 note off C2
    00 3c 40                                   # ch 3 note off C3 (running status)
    00 81 43 40                                # ch 2 note off G3
    00 80 4c 40                                # ch 1 note off E4
    00 ff 2f 00                                # end of track
    """)
    piece = decode(data)
    assert piece.format == 0 and piece.n_tracks == 1 and piece.ticks_per_beat == 96
    assert piece.repairs == {}
    assert rows(piece) == [(0, 384, 48, 96, 2, 70), (0, 384, 60, 96, 2, 70),
                           (96, 384, 67, 64, 1, 46), (192, 384, 76, 32, 0, 5)]
    # 384 ticks at 96 per quarter and 120 BPM = 4 quarters = 2 s
    assert piece.notes["start_s"].tolist() == [0.0, 0.0, 0.5, 1.0]
    assert piece.notes["end_s"].tolist() == [2.0] * 4
    assert piece.time_signatures.tolist() == [(0, 4, 4)]
    assert piece.tempos.tolist() == [(0, 500000)]
    assert piece.end_tick == 384


# --- Reference libraries ------------------------------------------------------------------

def assert_same_as_pretty_midi(data: bytes, piece) -> None:
    ours, ref = piece_seconds_rows(piece), pretty_midi_rows(data)
    assert len(ours) == len(ref)
    for a, b in zip(ours, ref):
        assert a[2:] == b[2:]
        assert a[:2] == pytest.approx(b[:2], abs=1e-6)


@pytest.mark.parametrize("seed", range(12))
def test_generated_files_match_mido_and_pretty_midi(seed):
    # References: mido 1.3 (tick-exact rows, tests/fixtures_midi.mido_rows) and pretty_midi
    # 0.2 (seconds, program, drum flag).
    data = random_midi(seed, n_notes=150, n_tracks=1 + seed % 4, tpb=[96, 480, 384][seed % 3])
    piece = decode(data)
    assert piece_rows(piece) == mido_rows(data)
    assert_same_as_pretty_midi(data, piece)
    assert (sort_notes(piece.notes) == piece.notes).all()


def test_bach_chorales_match_pretty_midi_and_mido():
    # Reference files: music21's bundled Bach chorales rendered to MIDI by music21 itself.
    for name, data in bach_chorale_midi():
        piece = decode(data, source=name)
        assert len(piece.notes) > 100, name
        assert piece_rows(piece) == mido_rows(data), name
        assert_same_as_pretty_midi(data, piece)


def test_header_fields_and_metadata_match_mido():
    import io

    import mido

    data = random_midi(3, n_notes=60, n_tracks=3)
    ref = mido.MidiFile(file=io.BytesIO(data))  # reference decoder
    piece = decode(data)
    assert (piece.format, piece.n_tracks, piece.ticks_per_beat) == (ref.type, len(ref.tracks),
                                                                    ref.ticks_per_beat)
    assert piece.title == "Piece 3"
    assert piece.track_names == tuple(next((m.name for m in t if m.type == "track_name"), "")
                                      for t in ref.tracks)
    tempos, tick = [], 0
    for msg in ref.tracks[0]:
        tick += msg.time
        if msg.type == "set_tempo":
            tempos.append((tick, msg.tempo))
    assert piece.tempos.tolist()[-1] == tempos[-1]
    assert piece.end_tick == max(sum(m.time for m in t) for t in ref.tracks)


# --- Corruptions: one test each, reason code and message --------------------------------

@pytest.mark.parametrize("data,match", [
    (b"", "empty"),
    (b"<!DOCTYPE html><html><body>404 Not Found</body></html>", "HTML"),
    (bytes.fromhex("89504e470d0a1a0a0000000d49484452"), "PNG"),
    (b"This is a plain text file, not a song.\n", "text file"),
    (b"RIFF\x10\x00\x00\x00WAVEfmt ", "RIFF file of type b'WAVE'"),
    # A SysEx dump: F0 ... F7 (MIDI 1.0 Detailed Specification, System Exclusive)
    (bytes.fromhex("f0 43 10 4c 00 00 7e 00 f7"), "raw SysEx dump"),
])
def test_not_midi(data, match):
    with pytest.raises(DecodeError, match=match) as exc:
        decode(data, source="x.mid")
    assert exc.value.code == "not_midi"
    assert exc.value.file == "x.mid"


def test_midi2_clip_file_is_unsupported_format():
    # MIDI 2.0 Clip File header: the 8 ASCII bytes "SMF2CLIP" (MIDI Association, M2-116-U)
    with pytest.raises(DecodeError, match="MIDI 2.0 clip file") as exc:
        decode(b"SMF2CLIP" + bytes(16), source="clip.midi2")
    assert exc.value.code == "unsupported_format" and exc.value.offset == 0


def test_system_message_in_track_names_the_smf_rule():
    # SMF allows only channel, meta and sysex events in a track (SMF 1.0, "Track Chunks")
    with pytest.raises(DecodeError, match="does not allow") as exc:
        decode(smf(mtrk("00 f5 00 ff 2f 00")))
    assert exc.value.code == "bad_event" and "damaged" not in str(exc.value)


def test_bad_header_length():
    data = parse_hexdump("""
    4d 54 68 64 00 00 00 02  # MThd with length 2 (must be >= 6)
    00 01 00 01 00 60
    """)
    with pytest.raises(DecodeError, match="header length must be at least 6, but it is 2") as exc:
        decode(data)
    assert exc.value.code == "bad_chunk" and exc.value.offset == 4


def test_division_zero():
    data = smf(mtrk(ONE_NOTE), header="4d 54 68 64 00 00 00 06  00 01 00 01 00 00  # division 0")
    with pytest.raises(DecodeError, match="division.*is 0") as exc:
        decode(data)
    assert exc.value.code == "bad_chunk"


def test_bad_smpte_frame_rate():
    data = smf(mtrk(ONE_NOTE), header="4d 54 68 64 00 00 00 06  00 01 00 01 e4 28  # -28 fps")
    with pytest.raises(DecodeError, match="28 frames/s") as exc:
        decode(data)
    assert exc.value.code == "bad_chunk"


def test_garbage_where_a_track_should_be():
    data = smf("00 01 02 03 00 00 00 04 00 ff 2f 00  # binary junk instead of 'MTrk'")
    with pytest.raises(DecodeError, match="expected track chunk 'MTrk' but found bytes 00 01 02 03") as exc:
        decode(data)
    assert exc.value.code == "bad_chunk" and exc.value.track == 0 and exc.value.offset == 14


def test_truncated_header():
    with pytest.raises(DecodeError, match="inside the 14-byte MThd header") as exc:
        decode(b"MThd\x00\x00")
    assert exc.value.code == "truncated"


def test_truncated_header_body():
    with pytest.raises(DecodeError, match="declares 6 bytes but only 2 remain") as exc:
        decode(parse_hexdump("4d 54 68 64 00 00 00 06 00 01  # header cut after 2 of 6 bytes"))
    assert exc.value.code == "truncated"


def test_truncated_track_length_past_end():
    data = smf(mtrk(ONE_NOTE, length=41))  # declares 41 bytes, 12 present
    with pytest.raises(DecodeError, match="track 0 declares 41 bytes but only 12 remain after "
                       "byte 22; the file was probably cut off") as exc:
        decode(data)
    assert exc.value.code == "truncated" and exc.value.track == 0


def test_truncated_missing_tracks():
    header = "4d 54 68 64 00 00 00 06  00 01 00 03 00 60  # declares 3 tracks"
    data = smf(mtrk(ONE_NOTE), header=header)
    with pytest.raises(DecodeError, match="declares 3 tracks but the file ends after 1") as exc:
        decode(data)
    assert exc.value.code == "truncated" and exc.value.track == 1


def test_a_damaged_track_name_is_a_bad_chunk_not_a_file_cut_off():
    # Standard MIDI File spec 1.0 (chunks): a reader skips chunks of unknown names, so a track
    # whose 'MTrk' name is damaged reads as such a chunk, and the file then holds fewer tracks
    # than its header declares although it ends where its last chunk does (an audit: reported
    # `truncated`, "cut off during download", at the end of the file)
    header = "4d 54 68 64 00 00 00 06  00 01 00 03 00 60  # declares 3 tracks"
    data = smf(mtrk(ONE_NOTE), mtrk(ONE_NOTE), mtrk(ONE_NOTE), header=header)
    second = 14 + len(parse_hexdump(mtrk(ONE_NOTE)))  # the second track's chunk
    damaged = data[:second] + b"XXXX" + data[second + 4:]
    with pytest.raises(DecodeError, match=r"holds 2 track chunks and 1 chunk\(s\) of other names, the "
                       rf"first 'XXXX' at byte {second} where track 1 would be, which a reader skips; "
                       r"a damaged 'MTrk' name") as exc:
        decode(damaged)
    assert exc.value.code == "bad_chunk" and exc.value.offset == second and exc.value.track == 1


def test_truncated_inside_event():
    # the chunk length matches the bytes present, but the last event is cut in half
    data = smf(mtrk("00 90 3c 64  60 80 3c"))
    with pytest.raises(DecodeError, match="file ends inside an event") as exc:
        decode(data)
    assert exc.value.code == "truncated" and exc.value.offset == 26


def test_event_past_chunk_end_is_bad_event():
    data = smf(mtrk("00 90 3c 64  60 80 3c"), mtrk(ONE_NOTE),
               header="4d 54 68 64 00 00 00 06  00 01 00 02 00 60")
    with pytest.raises(DecodeError, match="runs past the end of track 0's chunk") as exc:
        decode(data)
    assert exc.value.code == "bad_event"


@pytest.mark.parametrize("body,match", [
    ("00 f4 00 ff 2f 00   # 0xf4 is undefined", "status byte 0xf4"),
    ("00 f8 00 ff 2f 00   # timing clock: real-time, not allowed in a file", "status byte 0xf8"),
    ("00 90 3c 80 00 ff 2f 00   # velocity byte 0x80 > 127", "followed by 0x80"),
    ("00 c0 85 00 ff 2f 00   # program byte 0x85 > 127", "followed by 0x85"),
    ("00 3c 64 00 ff 2f 00   # data bytes first: running status with no status", "no running status"),
    ("00 f0 7f 01 02 f7   # sysex declares 127 bytes, 3 present", "sysex event declares 127 bytes"),
    ("00 ff 01 20 41 42   # text meta declares 32 bytes, 2 present", "meta event 0x01 declares 32"),
    ("00 ff 51 02 07 a1 00 ff 2f 00   # tempo with 2 bytes", "tempo meta event must carry 3"),
    ("00 ff 51 03 00 00 00 00 ff 2f 00   # tempo 0", "0 microseconds per beat"),
    ("00 ff 58 04 00 02 18 08 00 ff 2f 00   # 0/4 time", "numerator >= 1"),
    ("00 ff 59 02 09 00 00 ff 2f 00   # 9 sharps", "-7..7 sharps"),
    ("00 ff 59 01 00 00 ff 2f 00   # key signature with 1 byte", "key signature meta event must carry 2"),
])
def test_bad_event(body, match):
    with pytest.raises(DecodeError, match=match) as exc:
        decode(smf(mtrk(body)))
    assert exc.value.code == "bad_event" and exc.value.track == 0
    assert exc.value.offset is not None and 22 <= exc.value.offset < 40


@pytest.mark.parametrize("fmt", [2, 5])
def test_unsupported_format(fmt):
    header = f"4d 54 68 64 00 00 00 06  00 {fmt:02x} 00 01 00 60"
    with pytest.raises(DecodeError, match=f"format {fmt}") as exc:
        decode(smf(mtrk(ONE_NOTE), header=header))
    assert exc.value.code == "unsupported_format"


def test_too_large_bytes_checked_before_reading():
    with pytest.raises(DecodeError, match="34 bytes, over the limit max_bytes=20") as exc:
        decode(smf(mtrk(ONE_NOTE)), max_bytes=20)
    assert exc.value.code == "too_large"
    with pytest.raises(DecodeError, match="max_bytes=10"):
        decode(b"garbage that is not midi at all", max_bytes=10)  # size first, then content


def test_too_large_tracks_and_events():
    header = "4d 54 68 64 00 00 00 06  00 01 00 03 00 60"
    with pytest.raises(DecodeError, match="3 tracks, over the limit max_tracks=2") as exc:
        decode(smf(mtrk(ONE_NOTE), header=header), max_tracks=2)
    assert exc.value.code == "too_large"
    with pytest.raises(DecodeError, match="more than 2 events") as exc:
        decode(smf(mtrk(ONE_NOTE)), max_events=2)
    assert exc.value.code == "too_large"


def test_decode_file_checks_size_first(tmp_path):
    path = tmp_path / "a.mid"
    path.write_bytes(smf(mtrk(ONE_NOTE)))
    assert rows(decode_file(path)) == [(0, 96, 60, 100, 0, 0)]
    with pytest.raises(DecodeError, match="over the limit max_bytes=5") as exc:
        decode_file(path, max_bytes=5)
    assert exc.value.code == "too_large" and exc.value.file == str(path)


# --- Tolerated quirks: each counted under its documented name ---------------------------

def test_riff_rmid_unwrapped():
    inner = smf(mtrk(ONE_NOTE))
    body = b"RMID" + b"data" + len(inner).to_bytes(4, "little") + inner
    data = b"RIFF" + len(body).to_bytes(4, "little") + body
    piece = decode(data)
    assert rows(piece) == [(0, 96, 60, 100, 0, 0)]
    assert piece.repairs == {"riff_unwrapped": 1}


def test_kar_lyrics_and_text_title():
    # .kar karaoke files: plain SMF with '@' text events and lyric metas (common practice).
    data = smf(mtrk("""
    00 ff 01 0e 40 4b 4d 49 44 49 20 4b 41 52 41 4f 4b 45   # text "@KMIDI KARAOKE"
    00 ff 05 03 48 65 79                                    # lyric "Hey"
    00 90 3c 64 60 80 3c 40 00 ff 2f 00
    """))
    piece = decode(data)
    assert piece.title == "@KMIDI KARAOKE" and piece.repairs == {}
    assert len(piece.notes) == 1


def test_smpte_division_gives_exact_seconds():
    # division e7 28: -25 frames/s, 40 ticks per frame = 1000 ticks per second (millisecond timing)
    data = smf(mtrk("00 90 3c 64  87 68 80 3c 40  00 ff 51 03 0f 42 40  00 ff 2f 00"),
               header="4d 54 68 64 00 00 00 06  00 01 00 01 e7 28")
    piece = decode(data)
    assert piece.smpte and piece.ticks_per_beat == 500
    assert piece.tempos.tolist() == [(0, 500000)]  # tempo events ignored under SMPTE
    assert piece.notes["end_s"].tolist() == [1.0]  # 1000 ticks = 1 s
    assert piece.ticks_to_seconds(np.array([1000]))[0] == 1.0


def test_missing_end_of_track():
    piece = decode(smf(mtrk("00 90 3c 64 60 80 3c 40")))
    assert rows(piece) == [(0, 96, 60, 100, 0, 0)]
    assert piece.repairs == {"missing_end_of_track": 1}


def test_hanging_notes_closed_at_last_event():
    # pretty_midi drops such notes; we close them at the track's last event tick and count them
    piece = decode(smf(mtrk("00 90 3c 64  00 90 40 64  60 80 3c 40  60 ff 2f 00")))
    assert rows(piece) == [(0, 96, 60, 100, 0, 0), (0, 192, 64, 100, 0, 0)]
    assert piece.repairs == {"hanging_notes_closed": 1}


@pytest.mark.parametrize("body,repairs", [
    # an orphan note-off, then the note-on at the same tick, never closed: a zero-length note
    # written note-off first (writers that put the offs of a tick before its ons do so)
    ("00 90 3c 64  60 80 40 40  00 90 40 64  60 80 3c 40  60 ff 2f 00", {"zero_length_notes_dropped": 1}),
    # a repeated note (off, then on at the same tick) whose second note never ends, as
    # music21's MIDI writer leaves some: dropped, not held to the track's end
    ("00 90 3c 64  00 90 40 64  60 80 40 40  00 90 40 64  60 80 3c 40  60 ff 2f 00",
     {"zero_length_notes_dropped": 1}),
])
def test_a_note_left_open_after_its_own_note_off_is_zero_length(body, repairs):
    """pretty_midi drops both such notes (it drops every note left open); the decoder drops
    these as zero-length notes and still closes, at the track's end, a note left open with no
    note-off at its tick (test_hanging_notes_closed_at_last_event)."""
    data = smf(mtrk(body))
    piece = decode(data)
    assert piece.repairs == repairs
    assert_same_as_pretty_midi(data, piece)
    # the same rule in the compiled and the pure-Python loop (tests/test_smf_accel.py holds
    # them equal on every file; here on these)
    from pipeline.midi import track
    cols: list = []
    out = track.read_track(parse_hexdump(body), 0, 0, True, "x", cols, [], [], [], [], [])
    assert out[5] == 1 and out[6] == 0  # zero-length, not hanging


def test_running_status_and_velocity_zero_note_off():
    piece = decode(smf(mtrk("00 90 3c 64  00 40 50  60 3c 00  00 40 00  00 ff 2f 00")))
    assert rows(piece) == [(0, 96, 60, 100, 0, 0), (0, 96, 64, 80, 0, 0)]
    assert piece.repairs == {}


def test_running_status_survives_meta_events():
    # mido keeps running status across meta events too; real files rely on it
    piece = decode(smf(mtrk("00 90 3c 64  00 ff 01 01 41  60 3c 00  00 ff 2f 00")))
    assert rows(piece) == [(0, 96, 60, 100, 0, 0)]


def test_unknown_meta_skipped_and_counted():
    piece = decode(smf(mtrk("00 ff 60 02 01 02  " + ONE_NOTE)))  # meta type 0x60 is undefined
    assert len(piece.notes) == 1 and piece.repairs == {"unknown_meta_skipped": 1}


def test_sysex_and_escape_skipped():
    piece = decode(smf(mtrk("""
    00 f0 05 7e 7f 09 01 f7   # GM system on (sysex)
    00 f7 02 f3 01            # escape: song select as raw bytes
    """ + ONE_NOTE)))
    assert rows(piece) == [(0, 96, 60, 100, 0, 0)] and piece.repairs == {}


def test_trailing_bytes_ignored_and_counted():
    piece = decode(smf(mtrk(ONE_NOTE)) + b"\x00\x00\x1a\x1a\x1a")
    assert len(piece.notes) == 1 and piece.repairs == {"trailing_bytes_ignored": 5}


def test_unknown_chunk_between_tracks_skipped():
    header = "4d 54 68 64 00 00 00 06  00 01 00 02 00 60  # 2 tracks"
    data = smf(mtrk(ONE_NOTE), "58 46 49 48 00 00 00 03 01 02 03  # 'XFIH' chunk, 3 bytes",
               mtrk(ONE_NOTE), header=header)
    piece = decode(data)
    assert piece.n_tracks == 2 and piece.notes["track"].tolist() == [0, 1]
    assert piece.repairs == {"unknown_chunks_skipped": 1}


def test_format0_with_several_tracks_read_as_format1():
    header = "4d 54 68 64 00 00 00 06  00 00 00 02 00 60  # format 0 declaring 2 tracks"
    piece = decode(smf(mtrk(ONE_NOTE), mtrk(ONE_NOTE), header=header))
    assert len(piece.notes) == 2 and piece.repairs == {"format0_multitrack": 1}


def test_tempo_in_any_track_applies_globally():
    header = "4d 54 68 64 00 00 00 06  00 01 00 02 00 60"
    data = smf(mtrk("00 ff 2f 00"), mtrk("00 ff 51 03 0f 42 40  " + ONE_NOTE), header=header)
    piece = decode(data)
    assert piece.tempos.tolist() == [(0, 1_000_000)]
    assert piece.notes["end_s"].tolist() == [1.0]  # 96 ticks = 1 beat at 60 BPM


def test_overlapping_same_pitch_policy_matches_pretty_midi():
    # on@0, on@96, off@192, off@288 on one key: pretty_midi closes both at 192, ignores 288.
    data = smf(mtrk("00 90 3c 64  60 90 3c 50  60 80 3c 40  60 80 3c 40  00 ff 2f 00"))
    piece = decode(data)
    assert rows(piece) == [(0, 192, 60, 100, 0, 0), (96, 192, 60, 80, 0, 0)]
    assert_same_as_pretty_midi(data, piece)


def test_note_on_at_note_off_tick_stays_open_like_pretty_midi():
    # on@0, (off + on)@96 with the on first, off@192: pretty_midi keeps the note started at 96
    data = smf(mtrk("00 90 3c 64  60 90 3c 50  00 80 3c 40  60 80 3c 40  00 ff 2f 00"))
    piece = decode(data)
    assert rows(piece) == [(0, 96, 60, 100, 0, 0), (96, 192, 60, 80, 0, 0)]
    assert_same_as_pretty_midi(data, piece)


def test_zero_length_notes_dropped_like_pretty_midi():
    data = smf(mtrk("00 90 3c 64  00 80 3c 40  " + ONE_NOTE))
    piece = decode(data)
    assert rows(piece) == [(0, 96, 60, 100, 0, 0)]
    assert piece.repairs == {"zero_length_notes_dropped": 1}
    assert_same_as_pretty_midi(data, piece)


def test_program_is_the_one_in_force_at_note_on():
    data = smf(mtrk("00 c0 10  00 90 3c 64  30 c0 20  30 80 3c 40  00 ff 2f 00"))
    assert rows(decode(data)) == [(0, 96, 60, 100, 0, 16)]


def test_every_repair_name_is_documented():
    seen = set()
    for data in (decode(smf(mtrk("00 90 3c 64 60 80 3c 40"))),
                 decode(smf(mtrk(ONE_NOTE)) + b"\x00")):
        seen |= set(data.repairs)
    assert seen <= set(REPAIRS)


# --- Robustness ---------------------------------------------------------------------------

def test_every_prefix_gives_piece_or_decode_error():
    data = random_midi(11, n_notes=40, n_tracks=2)
    codes = set()
    for k in range(len(data) + 1):
        try:
            decode(data[:k])
        except DecodeError as err:
            codes.add(err.code)
    assert codes == {"not_midi", "truncated"}


def test_seeded_random_bytes_and_mutations():
    rng = random.Random(1234)
    base = random_midi(12, n_notes=40, n_tracks=2)
    codes = set()
    for i in range(1500):
        if i % 3 == 0:
            data = bytes(rng.randrange(256) for _ in range(rng.randrange(64)))
            data = b"MThd" + data if i % 2 else data
        else:
            buf = bytearray(base)
            for _ in range(rng.randint(1, 4)):
                buf[rng.randrange(len(buf))] = rng.randrange(256)
            data = bytes(buf)
        try:
            piece = decode(data)
            assert (piece.notes["end"] > piece.notes["start"]).all()
        except DecodeError as err:
            codes.add(err.code)
            assert err.reason and err.code in {"not_midi", "bad_chunk", "truncated", "bad_event",
                                               "unsupported_format", "too_large"}
    assert {"not_midi", "bad_event", "truncated"} <= codes


def test_smpte_drop_frame_rate_is_29_97():
    # -29 in the division means 30 drop-frame = 30000/1001 frames/s (SMF 1.0, "Header Chunks")
    data = smf(mtrk("00 90 3c 64  60 80 3c 40  00 ff 2f 00"),
               header="4d 54 68 64 00 00 00 06  00 01 00 01 e3 04  # -29 fps, 4 ticks/frame")
    piece = decode(data)
    assert piece.smpte
    assert piece.notes["end_s"][0] == pytest.approx(96 / (4 * 30000 / 1001), rel=1e-12)
    assert piece.ticks_to_seconds(np.array([96]))[0] == pytest.approx(piece.notes["end_s"][0],
                                                                      rel=1e-5)


def test_demo_corpus_matches_pretty_midi():
    # Reference: pretty_midi 0.2 (a general-purpose MIDI library) on every demo file it reads the
    # same way we do. Files needing a repair that pretty_midi does not make (hanging notes, SMPTE
    # timing) are skipped. pretty_midi reads tempo events only from track 0 and warns when a
    # re-upload carries them elsewhere; we apply them globally, as a player does, so those files
    # are compared tick-exactly against mido (tests/fixtures_midi.mido_rows) instead.
    import warnings
    from pathlib import Path
    from pipeline.errors import DecodeError
    root = Path(__file__).resolve().parents[1] / "sample_corpus"
    compared = 0
    for p in sorted(root.rglob("*")):
        if p.suffix.lower() not in (".mid", ".midi", ".kar"):
            continue
        data = p.read_bytes()
        try:
            piece = decode(data)
        except DecodeError:
            continue
        if piece.smpte or piece.repairs.get("hanging_notes_closed") or not len(piece.notes):
            continue
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            pretty_midi_rows(data)
        if any("non-zero tracks" in str(w.message) for w in caught):
            assert piece_rows(piece) == mido_rows(data), p
        else:
            assert_same_as_pretty_midi(data, piece)
        compared += 1
    assert compared >= 50


def test_distinct_is_numpy_unique():
    # pipeline.midi.piece.distinct: numpy's np.unique (the reference) on ordered input (one pass
    # over runs) and on unordered input (a sort)
    from pipeline.midi.piece import distinct
    rng = np.random.default_rng(5)
    for n in (0, 1, 2, 7, 500):
        ordered = np.sort(rng.integers(-3, 40, n)).astype(np.int64)
        shuffled = rng.permutation(ordered)
        for a in (ordered, shuffled, ordered[::-1].copy()):
            got = distinct(a)
            assert got.dtype == np.unique(a).dtype and np.array_equal(got, np.unique(a))
