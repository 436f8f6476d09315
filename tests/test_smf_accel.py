"""Differential tests of the compiled decoder path (pipeline/midi/csrc/) against the
pure-Python one in pipeline.midi.decode: the same ``Piece`` (every field, array dtypes and bytes, repairs
in order) or the same ``DecodeError`` (code, message, offset, track, file) on the demo corpus,
a generated corpus with every planted defect, mutated files from pipeline.tools.fuzz, a fuzzer aimed
at the track loop itself and hand-built edge cases. Every decoded piece is also encoded both
ways (pipeline.midi.encode: compiled ``group_events`` vs numpy ``_all_group_events``): same bytes. The outside references (mido, pretty_midi,
the SMF 1.0 examples) are checked in tests/test_smf.py, which runs on the accelerated path by
default; a few mido checks here pin the accelerated path to the reference directly.
"""
from __future__ import annotations

import dataclasses
import os
import random
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from fixtures_midi import mido_rows, parse_hexdump, piece_rows, random_midi
from pipeline.analysis import timing
from pipeline.midi import accel
from pipeline.tools import fuzz, synth
from pipeline.midi import decode as smf
from pipeline.midi.encode import encode, vlq
from pipeline.errors import DecodeError
from pipeline.midi.piece import NOTE_DTYPE, TEMPO_DTYPE, Piece, ticks_to_seconds

REPO = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.skipif(
    not accel.HAVE_ACCEL, reason="pipeline.midi._smf_accel is not built (no C compiler at install "
    "time); the pure-Python decoder is in use and tested by test_smf.py")


def outcome(data: bytes, accelerated: bool, **limits: int) -> Piece | DecodeError:
    try:
        return smf.decode(data, source="case.mid", accelerated=accelerated, **limits)
    except DecodeError as err:
        return err


class TrackSpy:
    """Stands in for the extension module: every ``read_track`` result is checked against the
    pure-Python loop on the same track (all fourteen fields, or both giving up), so a C loop
    that gives up where Python would not, which the fallback would hide, is caught too."""

    def __init__(self, real):
        self.real, self.calls, self.gave_up = real, 0, 0
        self.note_table = real.note_table

    def read_track(self, data: bytes, start: int, length: int, track: int = 0):
        got = self.real.read_track(data, start, length, track)
        try:
            want = smf._read_track_alone(data, start, length, track, False, "")
        except DecodeError:
            want = None
        assert (got is None) == (want is None), f"C loop gave {got!r:.60}, Python {want!r:.60}"
        assert got == want
        self.calls += 1
        self.gave_up += got is None
        return got


def assert_same(data: bytes, label: str = "", **limits: int) -> Piece | DecodeError:
    """Both paths give the same Piece, field by field, or the same DecodeError; and the C
    track loop agrees with the Python one on every track it was given."""
    ref = outcome(data, False, **limits)
    spy = TrackSpy(accel.module)
    accel.module = spy
    try:
        got = outcome(data, True, **limits)
    finally:
        accel.module = spy.real
    assert spy.gave_up <= isinstance(ref, DecodeError), label
    if isinstance(ref, DecodeError):
        assert isinstance(got, DecodeError), f"{label}: accelerated decoded what pure rejects: {ref}"
        assert type(got) is type(ref)
        assert ((got.code, got.message, got.offset, got.track, got.file)
                == (ref.code, ref.message, ref.offset, ref.track, ref.file)), label
        return ref
    assert not isinstance(got, DecodeError), f"{label}: accelerated raised {got}"
    for f in dataclasses.fields(Piece):
        a, b = getattr(ref, f.name), getattr(got, f.name)
        if isinstance(a, np.ndarray):
            assert b.dtype == a.dtype and b.shape == a.shape, (label, f.name)
            assert b.tobytes() == a.tobytes(), (label, f.name)
            assert b.flags.writeable, (label, f.name)
        else:
            assert type(b) is type(a) and b == a, (label, f.name, a, b)
    assert list(got.repairs.items()) == list(ref.repairs.items()), label
    assert_same_encoding(ref, label=label)
    return ref


def assert_same_encoding(piece: Piece, notes: np.ndarray | None = None, label: str = "") -> bytes:
    """The compiled and the numpy group-track encoder give the same bytes (or ValueError)."""
    try:
        want = encode(piece, notes, accelerated=False)
    except ValueError as err:
        with pytest.raises(ValueError) as got:
            encode(piece, notes, accelerated=True)
        assert str(got.value) == str(err), label
        return b""
    assert encode(piece, notes, accelerated=True) == want, label
    return want


def test_the_accelerated_path_is_the_default_unless_switched_off():
    forced = os.environ.get("MIDISIFT_PURE_PYTHON", "") not in ("", "0")
    assert accel.USE_ACCEL is (not forced)


def test_environment_switch_forces_pure_python():
    code = "import pipeline.midi.accel as s; print(s.HAVE_ACCEL, s.USE_ACCEL)"
    env = {**os.environ, "MIDISIFT_PURE_PYTHON": "1"}
    here = Path(smf.__file__).resolve().parents[1]  # the same package this process imported
    out = subprocess.run([sys.executable, "-c", code], env=env, cwd=here, check=True,
                         capture_output=True, text=True).stdout.split()
    assert out == ["True", "False"]


def test_asking_for_a_missing_accelerator_is_an_error(monkeypatch):
    monkeypatch.setattr(accel, "HAVE_ACCEL", False)
    with pytest.raises(ValueError, match="not built"):
        smf.decode(random_midi(1, n_notes=20), accelerated=True)


# --- corpora ----------------------------------------------------------------------------------

def test_demo_corpus():
    # invented demo data: self-consistency of the two paths only
    files = sorted(p for p in (REPO / "sample_corpus").rglob("*") if p.is_file()
                   and p.suffix.lower() in (".mid", ".midi", ".kar", ".rmi"))
    assert len(files) >= 80
    kept = sum(isinstance(assert_same(p.read_bytes(), str(p)), Piece) for p in files)
    assert kept >= 60


def test_generated_corpus_with_every_planted_defect():
    outs, _ = synth.build(320, 7, "small", None)
    forms = {o.truth.get("defect") for o in outs} | {o.truth.get("quirk") for o in outs}
    assert set(sum(synth.CORRUPT_FORMS.values(), ())) <= forms  # every corrupt form planted
    assert {"rmid", "kar", "smpte", "missing_eot", "hanging_notes", "running_status"} <= forms
    errors = sum(isinstance(assert_same(o.data, o.kind), DecodeError) for o in outs)
    assert errors >= len(sum(synth.CORRUPT_FORMS.values(), ()))


def test_fuzz_mutated_files():
    rng = random.Random("accel fuzz")
    verdicts = set()
    for i in range(2500):
        data, applied = fuzz.random_case(rng)
        res = assert_same(data, f"case {i} {applied}")
        verdicts.add(res.code if isinstance(res, DecodeError) else "piece")
    assert {"piece", "bad_event", "truncated", "bad_chunk", "not_midi"} <= verdicts


def test_fuzz_every_mutation_kind_forced():
    rng = random.Random("accel each kind")
    for kind in fuzz.MUTATIONS:
        for i in range(40):
            data, _ = fuzz.random_case(rng, kinds=(kind,))
            assert_same(data, f"{kind} {i}")


def _track_events(rng: random.Random, bad: float) -> bytes:
    """A track body of random events aimed at the loop's corners: 1-4 byte deltas, running
    status, stacked and zero-length notes on few keys, metas of every kind, sysex, events after
    an end-of-track; each event is damaged with chance ``bad`` (5-byte delta, system common or
    stray byte, wrong meta length or value, lying sysex length, a missing data byte)."""
    out = bytearray()
    status = 0  # the running status in effect (kept across metas, as the decoder does)
    for _ in range(rng.randint(0, 80)):
        wrong = rng.random() < bad
        r = rng.random()
        if wrong and r < 0.1:
            out += b"\x81\x80\x80\x80\x00"  # five bytes: too long
        elif r < 0.5:
            out += b"\x00"
        else:
            out += vlq(rng.choice((rng.randint(1, 127), rng.randint(128, 0x3FFF),
                                   rng.randint(0x4000, 0x1FFFFF), rng.randint(0x200000, 0x0FFFFFFF))))
        ch = rng.choice((0, 0, 1, 9, 15))
        pitch = rng.choice((60, 60, 61, 127, rng.randint(0, 127)))
        kind = rng.randrange(16)
        two = status and not 0xC0 <= status < 0xE0  # the status in effect takes 2 data bytes
        if wrong and rng.random() < 0.3:
            out += bytes([rng.choice((0xF1, 0xF2, 0xF4, 0xF5, 0xF8, 0xFE, rng.randrange(256)))])
            continue
        if kind < 5:  # note-on, maybe by running status
            ev = bytes([0x90 | ch, pitch, rng.randint(1, 127)])
            if two and rng.random() < 0.3:
                out += ev[1:]
            else:
                out += ev
                status = ev[0]
        elif kind < 8:  # note-off, either form
            ev = bytes([0x80 | ch, pitch, rng.randrange(128)]) if kind == 5 else \
                bytes([0x90 | ch, pitch, 0])
            out += ev
            status = ev[0]
        elif kind == 8:
            if two or wrong:
                out += bytes([pitch, 0])  # a running-status event (note-off if a note status)
            else:
                out += bytes([0xD0 | ch, 0])
                status = 0xD0 | ch
        elif kind == 9:
            out += bytes([0xC0 | ch, rng.randrange(128) | (0x80 if wrong else 0)])
            status = 0xC0 | ch
        elif kind == 10:
            ev = bytes([rng.choice((0xA0, 0xB0, 0xD0, 0xE0)) | ch, rng.randrange(128), rng.randrange(128)])
            out += ev[:2] if wrong or 0xD0 <= ev[0] < 0xE0 else ev
            status = ev[0]
        elif kind < 14:
            mt = rng.choice((0x01, 0x01, 0x03, 0x2F, 0x51, 0x58, 0x59, 0x7F, 0x20, 0x09,
                             rng.randrange(128), rng.choice((0x0F, 0x10, 0x21, 0x22, 0x54, 0x7E))))
            ln = {0x51: 3, 0x58: 4, 0x59: 2, 0x2F: 0, 0x20: 1}.get(mt, rng.randint(0, 200))
            if mt == 0x51:
                body = b"\x00\x00\x00" if wrong else rng.choice((b"\x07\xa1\x20", b"\x0f\x42\x40"))
            elif mt == 0x58:
                body = bytes([0, 2, 24, 8] if wrong else [rng.randint(1, 12), rng.randint(0, 6), 24, 8])
            elif mt == 0x59:
                body = bytes([8, 0] if wrong else [rng.randint(-7, 7) & 0xFF, rng.randint(0, 1)])
            else:
                body = bytes(rng.choice((0x20, 0x00, 0x09, 0x41, 0xE9)) for _ in range(ln))
            if wrong and rng.random() < 0.5:
                ln = rng.randint(0, 6)
            body = (body + bytes(ln))[:ln]
            length = b"\x80" * rng.randint(1, 12) + vlq(ln) if rng.random() < 0.05 else vlq(ln)
            out += b"\xff" + bytes([mt]) + length + body
        elif kind == 14:
            payload = bytes(rng.randrange(128) for _ in range(rng.randint(0, 10)))
            out += bytes([rng.choice((0xF0, 0xF7))]) + vlq(len(payload) + 200 * wrong) + payload
        else:
            out += b"\xff\x2f\x00"  # end of track in the middle: events may follow
    if rng.random() < 0.8:
        out += b"\x00\xff\x2f\x00"
    return bytes(out)


def test_fuzz_aimed_at_the_track_loop():
    rng = random.Random("track loop")
    codes = set()
    for i in range(1500):
        n = rng.choice((1, 1, 2, 3))
        bodies = [_track_events(rng, rng.choice((0.0, 0.0, 0.005, 0.02))) for _ in range(n)]
        division = rng.choice((96, 480, 0xE728, 0xE250))
        data = bytearray(b"MThd\x00\x00\x00\x06" + (1).to_bytes(2, "big") + n.to_bytes(2, "big")
                         + division.to_bytes(2, "big"))
        for body in bodies:
            declared = len(body) if rng.random() < 0.97 else max(0, len(body) + rng.randint(-5, 5))
            data += b"MTrk" + declared.to_bytes(4, "big") + body
        if rng.random() < 0.04:
            del data[rng.randint(14, len(data)):]
        res = assert_same(bytes(data), f"case {i}")
        codes.add(res.code if isinstance(res, DecodeError) else
                  ("repaired" if res.repairs else "clean"))
    assert {"clean", "repaired", "bad_event", "truncated"} <= codes


def test_reference_files_match_mido_on_the_accelerated_path():
    # Reference: mido 1.3 (tests/fixtures_midi.mido_rows), on files mido itself wrote.
    for seed in range(6):
        data = random_midi(seed, n_notes=200, n_tracks=1 + seed % 4)
        piece = smf.decode(data, accelerated=True)
        assert piece_rows(piece) == mido_rows(data)
        assert_same(data)


# --- hand-built edge cases ----------------------------------------------------------------

HEADER = "4d 54 68 64 00 00 00 06  00 01 00 01 00 60  # format 1, 1 track, 96 per beat"


def one_track(body: str, header: str = HEADER, length: int | None = None) -> bytes:
    b = parse_hexdump(body)
    n = len(b) if length is None else length
    return parse_hexdump(header) + b"MTrk" + n.to_bytes(4, "big") + b


EDGES = {
    "running status across meta and sysex":
        "00 90 3c 64  00 ff 01 02 41 42  00 f0 02 7e f7  00 40 50  60 3c 00  00 40 00  00 ff 2f 00",
    "4-byte delta, largest legal": "ff ff ff 7f 90 3c 64  01 80 3c 40  00 ff 2f 00",
    "5-byte delta": "81 80 80 80 00 90 3c 64  00 ff 2f 00",
    "stacked same-pitch notes": "00 90 3c 64  10 90 3c 50  00 90 3c 40  10 80 3c 00  00 ff 2f 00",
    "note-on at the note-off tick stays open":
        "00 90 3c 64  60 90 3c 50  00 80 3c 00  60 80 3c 00  00 ff 2f 00",
    "zero-length notes dropped": "00 90 3c 64  00 80 3c 00  00 90 3d 64  00 90 3d 60  00 80 3d 00"
        "  10 ff 2f 00",
    "notes hanging at end of track": "00 90 3c 64  00 91 40 64  60 80 3c 40  60 ff 2f 00",
    "hanging at the last tick are zero-length": "00 90 3c 64  60 90 40 64  00 ff 2f 00",
    "missing end of track": "00 90 3c 64  60 80 3c 40",
    "events after end of track": "00 90 3c 64  00 ff 2f 00  60 80 3c 40  00 ff 2f 00",
    "program at note-on": "00 c0 05  00 90 3c 64  00 c0 06  60 80 3c 40  00 90 3c 64  60 80 3c 40"
        "  00 ff 2f 00",
    "names and texts": "00 ff 01 03 20 00 09  00 ff 03 00  00 ff 03 02 41 42  00 ff 01 04 20 e9 41 00"
        "  00 ff 01 01 5a  00 90 3c 64  60 80 3c 40  00 ff 2f 00",
    "two-byte meta length": "00 ff 01 81 00" + " 41" * 128 + "  00 90 3c 64  60 80 3c 40  00 ff 2f 00",
    "meta length that overflows": "00 ff 01" + " ff" * 12 + " 7f  00 ff 2f 00",
    "meta length past the chunk": "00 ff 01 10 41 41",
    "meta length of 2**64 + 2": "00 ff 01 82 80 80 80 80 80 80 80 80 02 41 42  00 90 3c 64  60 80 3c 40"
        "  00 ff 2f 00",
    "sysex length of 2**64 + 1": "00 f0 82 80 80 80 80 80 80 80 80 01 f7  00 ff 2f 00",
    "sysex length past the chunk": "00 f0 10 41 41",
    "tempo, meter, key events": "00 ff 51 03 07 a1 20  00 ff 58 04 06 03 18 08  00 ff 59 02 fd 01"
        "  00 90 3c 64  60 ff 51 03 0f 42 40  00 80 3c 40  00 ff 2f 00",
    "tempo of 0": "00 ff 51 03 00 00 00  00 ff 2f 00",
    "tempo of 4 bytes": "00 ff 51 04 00 00 00 01  00 ff 2f 00",
    "meter 0/4": "00 ff 58 04 00 02 18 08  00 ff 2f 00",
    "meter denominator 2**7": "00 ff 58 04 04 07 18 08  00 ff 2f 00",
    "key with 8 sharps": "00 ff 59 02 08 00  00 ff 2f 00",
    "key mode 2": "00 ff 59 02 00 02  00 ff 2f 00",
    "metas at the known/unknown borders": "".join(f"00 ff {t:02x} 00  " for t in (
        0x00, 0x0F, 0x10, 0x1F, 0x20, 0x21, 0x22, 0x2E, 0x30, 0x50, 0x52, 0x53, 0x54, 0x55, 0x57,
        0x5A, 0x60, 0x7E, 0x7F, 0x80, 0xFF)) + "00 90 3c 64  60 80 3c 40  00 ff 2f 00",
    "system common status": "00 f4 00  00 ff 2f 00",
    "data byte at track start": "00 3c 64  00 ff 2f 00",
    "data byte > 0x7f in a note": "00 90 3c 94  00 ff 2f 00",
    "data byte > 0x7f in a program change": "00 c0 85  00 ff 2f 00",
    "data byte > 0x7f in channel pressure": "00 d0 85  00 ff 2f 00",
    "data byte > 0x7f in a control change": "00 b0 07 85  00 ff 2f 00",
    "event cut at chunk end": "00 90 3c",
    "delta cut at chunk end": "00 90 3c 64 81",
    "meta type cut": "00 ff",
}


@pytest.mark.parametrize("name", list(EDGES))
def test_edge_case(name):
    assert_same(one_track(EDGES[name]), name)
    # the same body in the middle of a file (bad_event) and at its end (truncated)
    data = one_track(EDGES[name], header="4d 54 68 64 00 00 00 06  00 01 00 02 00 60")
    assert_same(data + b"MTrk\x00\x00\x00\x04\x00\xff\x2f\x00", name)
    assert_same(data, name)


def test_edge_case_results_are_what_the_policy_says():
    # spot checks that the differential cases above reach the branches they are named for
    stacked = smf.decode(one_track(EDGES["stacked same-pitch notes"]), accelerated=True)
    assert stacked.notes[["start", "end", "velocity"]].tolist() == [(0, 32, 100), (16, 32, 80),
                                                                     (16, 32, 64)]
    metas = smf.decode(one_track(EDGES["metas at the known/unknown borders"]), accelerated=True)
    assert metas.repairs == {"unknown_meta_skipped": 15}  # 6 of the 21 are in smf._KNOWN_META
    hanging = smf.decode(one_track(EDGES["notes hanging at end of track"]), accelerated=True)
    assert hanging.repairs == {"hanging_notes_closed": 1}
    texts = smf.decode(one_track(EDGES["names and texts"]), accelerated=True)
    assert texts.track_names == ("",) and texts.title == "\xe9A"
    program = smf.decode(one_track(EDGES["program at note-on"]), accelerated=True)
    assert program.notes["program"].tolist() == [5, 6]
    with pytest.raises(DecodeError, match="longer than the 4 bytes"):
        smf.decode(one_track(EDGES["5-byte delta"]), accelerated=True)


def test_smpte_and_riff_files():
    body = "00 90 3c 64  83 60 80 3c 40  00 ff 51 03 07 a1 20  00 ff 2f 00"
    for division in ("e7 28", "e2 50", "e3 02", "e8 01"):  # 25x40, 30x80, 29.97x2, 24x1
        data = one_track(body, header=f"4d 54 68 64 00 00 00 06  00 00 00 01 {division}")
        piece = assert_same(data, division)
        assert piece.smpte
        riff = b"RIFF" + (len(data) + 4).to_bytes(4, "little") + b"RMID" + b"data" \
            + len(data).to_bytes(4, "little") + data
        assert assert_same(riff, "riff").repairs["riff_unwrapped"] == 1


def test_many_tracks_huge_ticks_and_event_limit():
    # 300 tracks (track index packing), ticks beyond 2**36 (the sort's wide-key branch)
    tracks = b"".join(b"MTrk" + (12).to_bytes(4, "big") + bytes.fromhex(
        f"{i % 128:02x} 90 {i % 128:02x} 64 01 80 {i % 128:02x} 00 00 ff 2f 00") for i in range(300))
    data = parse_hexdump("4d 54 68 64 00 00 00 06 00 01 01 2c 00 60") + tracks
    assert len(assert_same(data, "300 tracks", max_tracks=1024).notes) == 300
    body = "ff ff ff 7f ff 01 00  " * 300 + "00 90 3c 64  01 90 3d 64  00 80 3c 00  01 ff 2f 00"
    piece = assert_same(one_track(body), "huge ticks")
    assert int(piece.notes["start"].max()) >= 1 << 36
    err = assert_same(one_track(body), "event limit", max_events=100)
    assert isinstance(err, DecodeError) and err.code == "too_large"


def test_fallback_when_the_compiled_loop_gives_up(monkeypatch):
    # Where the C loop returns None the Python loop runs; on a valid track (which the C loop
    # never gives up on) that must still give the same piece.
    real = accel.module

    class GivesUp:
        read_track = staticmethod(lambda data, start, length, track=0: None)
        note_table = staticmethod(real.note_table)
    data = random_midi(4, n_notes=120, n_tracks=3, hanging=2)
    want = smf.decode(data, accelerated=False)
    monkeypatch.setattr(accel, "module", GivesUp)
    got = smf.decode(data, accelerated=True)
    assert got.notes.tobytes() == want.notes.tobytes() and got.repairs == want.repairs


def test_note_table_against_numpy_sort_and_seconds():
    # the C table vs the numpy one (smf._note_table + score.ticks_to_seconds) on random columns
    # with many ties, wide ticks and random tempo maps
    rng = np.random.default_rng(5)
    for trial in range(60):
        n_tracks = int(rng.integers(1, 6))
        big = trial % 5 == 0
        chunks, tracks, flat, note_tracks = [], [], [], []
        for ti in rng.choice(2000, n_tracks, replace=False).tolist():
            k = int(rng.integers(0, 300))
            start = rng.integers(0, 1 << 40 if big else 2000, k)
            end = start + rng.integers(1, 50, k)
            info = (rng.integers(0, 4, k) + 58) | (rng.integers(0, 3, k) << 7) \
                | (rng.integers(1, 128, k) << 11) | (rng.integers(0, 128, k) << 18)
            cols = np.stack([start, end, info], axis=1).astype(np.int64).ravel()
            chunks.append(cols.tobytes())
            tracks.append(ti)
            flat.append(cols)
            note_tracks += (ti, k)
        tpb = int(rng.choice([96, 480, 7]))
        ticks = np.unique(np.concatenate(([0], rng.integers(1, 3000, int(rng.integers(0, 6))))))
        tempo = np.zeros(len(ticks), dtype=TEMPO_DTYPE)
        tempo["tick"], tempo["us_per_beat"] = ticks, rng.integers(1, 1 << 24, len(ticks))
        want = smf._note_table(np.concatenate(flat), note_tracks)
        if len(want):
            secs = ticks_to_seconds(np.concatenate((want["start"], want["end"])), tempo, tpb)
            want["start_s"], want["end_s"] = secs[:len(want)], secs[len(want):]
        got = np.frombuffer(accel.module.note_table(chunks, tracks, tempo.tobytes(), tpb),
                            dtype=NOTE_DTYPE)
        assert got.tobytes() == want.tobytes(), trial


# --- the encoder ------------------------------------------------------------------------------

def _random_notes(rng: np.random.Generator, n: int, wide: bool = False) -> np.ndarray:
    notes = np.zeros(n, dtype=NOTE_DTYPE)
    notes["start"] = rng.integers(0, 1 << 27 if wide else 3000, n)
    notes["end"] = notes["start"] + rng.integers(0, 500, n)  # some zero-length
    notes["pitch"] = rng.integers(58, 64, n)  # few pitches: stacked and equal-tick notes
    notes["velocity"] = rng.integers(1, 128, n)
    notes["channel"] = rng.choice([0, 1, 9, 15], n)
    notes["program"] = rng.choice([0, 0, 0, 5, 127], n)
    notes["track"] = rng.choice([0, 1, 2, 300], n)
    return notes


def test_encoder_on_random_and_transposed_note_tables():
    from pipeline.midi.piece import sort_notes
    from pipeline.stages.transpose import Transpose
    rng = np.random.default_rng(11)
    base = smf.decode(random_midi(2, n_notes=50, n_tracks=3), accelerated=False)
    for trial in range(150):
        n = int(rng.integers(0, 400))
        notes = _random_notes(rng, n, wide=trial % 10 == 0)
        if trial % 2:
            notes = sort_notes(notes)  # the decoder's order (the encoder takes any order)
        out = assert_same_encoding(base, notes, f"trial {trial}")
        if trial % 10 == 1:  # what it writes reads back: the same audible notes, either path
            back = smf.decode(out, accelerated=True)
            assert len(back.notes) == int((notes["end"] > notes["start"]).sum())
    values = {"transpose": -5, "augment": [1, 7]}
    for _, notes, _ in Transpose.output_notes(base, values):
        assert_same_encoding(base, notes, "transposed")


def test_encoder_smpte_and_out_of_range_values():
    rng = np.random.default_rng(3)
    smpte = smf.decode(one_track("00 90 3c 64  83 60 80 3c 40  00 ff 2f 00",
                                 header="4d 54 68 64 00 00 00 06  00 00 00 01 e7 28"))
    assert smpte.smpte
    notes = _random_notes(rng, 200)
    notes["start_s"], notes["end_s"] = notes["start"] / 1000.0, notes["end"] / 1000.0
    assert_same_encoding(smpte, notes, "smpte")
    piece = smf.decode(random_midi(5, n_notes=40))
    odd = piece.notes.copy()
    odd["velocity"][:5] = 200  # written modulo 256 by both paths
    odd["pitch"][5:10] = -1
    odd["program"][10:15] = 300
    assert_same_encoding(piece, odd, "out of range bytes")
    late = piece.notes.copy()
    late["start"][-1] += 0x20000000  # a delta over 0x0FFFFFFF: ValueError from both
    late["end"][-1] += 0x20000000
    assert assert_same_encoding(piece, late, "delta too large") == b""
    early = piece.notes.copy()
    early["start"][0] = -5  # a negative first tick: ValueError from both
    assert assert_same_encoding(piece, early, "negative tick") == b""
    assert assert_same_encoding(piece, piece.notes[:0], "no notes")


def test_encoder_delta_length_boundaries():
    # each note in its own group, so its first delta is its start tick: every VLQ length edge
    # (SMF 1.0 variable-length quantities: 1 to 4 bytes, 7 bits each)
    edges = [0, 127, 128, 16383, 16384, 2097151, 2097152, 0x0FFFFFFF - 1]
    notes = np.zeros(len(edges), dtype=NOTE_DTYPE)
    notes["start"], notes["end"] = edges, np.array(edges) + 1
    notes["pitch"], notes["velocity"], notes["track"] = 60, 90, np.arange(len(edges))
    piece = smf.decode(random_midi(1, n_notes=10), accelerated=False)
    out = assert_same_encoding(piece, notes, "vlq edges")
    assert smf.decode(out).notes["start"].tolist() == edges


# --- the per-file analyses ----------------------------------------------------------------------
# The compiled analyses (pc_histogram, meter_accents, note_stats, voice_shingles, content_rows,
# shift_sort, table_group_events) against the numpy formulations they stand in for, which stay
# the specification: every value equal to the last bit, on decoded pieces and on the variants
# of tests/test_speed_equivalence.py that take each general path, plus tables the compiled
# code must hand back (None) because numpy treats them otherwise.

def _analysis_pieces() -> list[Piece]:
    from test_speed_equivalence import _variants
    decoded = [smf.decode(random_midi(seed, n_notes=n, n_tracks=tracks))
               for seed, n, tracks in ((1, 60, 1), (2, 500, 3), (3, 500, 4), (4, 1500, 5),
                                       (5, 200, 2), (6, 40, 3), (7, 3000, 8))]
    decoded.append(smf.decode(one_track("00 90 3c 64  83 60 80 3c 40  00 ff 2f 00",
                                        header="4d 54 68 64 00 00 00 06  00 00 00 01 e7 28")))
    out = [v for p in decoded for v in _variants(p)]
    rep = dataclasses.replace
    p = decoded[1]
    for field, value in (("start_s", np.nan), ("start_s", -0.0), ("end_s", -0.0),
                         ("pitch", 200), ("pitch", -3), ("program", 130), ("track", -1),
                         ("channel", 20), ("start", -480), ("start", 2 ** 62), ("track", 30000)):
        m = p.notes.copy()  # one value the compiled code must refuse or treat like numpy
        m[field][3] = value
        if field == "start":
            m["end"][3] = max(int(m["end"][3]), value + 1)
        out.append(rep(p, notes=m))
    m = p.notes.copy()
    m["pitch"][m["channel"] != 9] = 127  # one pitch everywhere: ties on every key
    out.append(rep(p, notes=m))
    out.append(rep(p, notes=p.notes[::2]))  # not contiguous: the numpy path only
    return out


@pytest.fixture(scope="module")
def analysis_pieces() -> list[Piece]:
    return _analysis_pieces()


def _both_paths(monkeypatch, pieces, fn) -> None:
    """``fn(piece)`` with the compiled analyses and without: identical values or errors."""
    from test_speed_equivalence import identical
    for i, p in enumerate(pieces):
        monkeypatch.setattr(accel, "USE_ACCEL", False)
        try:
            want = fn(p)
        except (ValueError, IndexError) as exc:
            monkeypatch.setattr(accel, "USE_ACCEL", True)
            with pytest.raises(type(exc)):
                fn(p)
            continue
        monkeypatch.setattr(accel, "USE_ACCEL", True)
        got = fn(p)
        if isinstance(want, np.generic):  # a numpy scalar: its type and its bytes
            assert type(got) is type(want) and got.tobytes() == want.tobytes(), f"piece {i}"
            continue
        assert identical(got, want), f"piece {i}: {got!r:.200} != {want!r:.200}"


def test_pairwise_sum_is_numpys():
    # numpy's float64 add.reduce: pairwise summation in blocks of 8 up to 128 values
    # (numpy/_core/src/umath/loops_utils.h.src); every size up to 300 and around the block edges,
    # and beyond numpy 2.2's 8192-value buffer, once the module follows this numpy's chunking
    from pipeline.midi.accel import _sums_follow_numpy
    assert _sums_follow_numpy(accel.module), f"numpy {np.__version__}: no chunking matches"
    rng = np.random.default_rng(8)
    for n in list(range(300)) + [1000, 1023, 1024, 1025, 8191, 8192, 8193, 20000, 100001]:
        a = rng.standard_normal(n) * 10.0 ** rng.integers(-6, 6, n)
        assert (np.float64(accel.module.add_reduce(a)).tobytes()
                == np.float64(np.add.reduce(a)).tobytes()), n
    assert np.float64(accel.module.add_reduce(np.array([-0.0]))).tobytes() == \
        np.float64(np.add.reduce(np.array([-0.0]))).tobytes()


@pytest.mark.parametrize("weights", [(0.0, 0.0, 4.0), (1.0, 2.0, 4.0), (0.37, 0.0, 3.0),
                                     (0.0, 3.5, 1.0)])
def test_compiled_key_histogram(monkeypatch, analysis_pieces, weights):
    from pipeline.analysis import key as keymod
    _both_paths(monkeypatch, analysis_pieces,
                lambda p: keymod.pitch_class_histogram(p, *weights))
    _both_paths(monkeypatch, analysis_pieces[:40], keymod.estimate_key)


def test_compiled_key_features_and_path(monkeypatch, analysis_pieces):
    # key_features (keyfeat.c: the learned key method's sums and the windowed key path in one
    # pass) against key._feature_sums and modulation.windowed_path: the same features, segment
    # numbers, sets and Viterbi path; then what key_meter derives from them (the estimate with
    # its probabilities, the modulation flag). Random decoded pieces with the variants that
    # take the general paths, and real-shaped ones: Bach chorales of music21's corpus.
    from pipeline.analysis import key as keymod
    from pipeline.analysis import modulation
    from music21_fixtures import chorales, decode
    pieces = analysis_pieces + [decode(w["midi"]) for w in chorales(100)[:20]]
    rep = dataclasses.replace
    pieces += [rep(p, ticks_per_beat=tpb) for p in pieces[-3:] for tpb in (97, 1, 7)]

    def key_and_flag(p):
        est = keymod.estimate_key(p)
        regions = modulation.key_regions(p, est.tonic_pc + 12 * (est.mode == "minor"),
                                         windowed=est.windowed)
        return est, est.windowed, regions
    _both_paths(monkeypatch, pieces, keymod.features_and_path)
    _both_paths(monkeypatch, pieces, key_and_flag)
    # the compiled path ran on the ordered pieces (not only the fallback)
    ran = [p for p in pieces if p.notes.flags.c_contiguous and accel.module.key_features(
        p.notes, p.ticks_per_beat, keymod.FINAL_BEATS, 8 * p.ticks_per_beat,
        modulation.PRESENCE_TABLE, modulation.SWITCH_COST, keymod.MELODY_MIN_SHARE) is not None]
    assert len(ran) > len(pieces) // 2


def test_compiled_key_features_hand_back_the_general_cases():
    from pipeline.analysis import modulation
    p = smf.decode(random_midi(3, n_notes=300, n_tracks=3))
    mod, table = accel.module, modulation.PRESENCE_TABLE

    def call(notes, tpb=480):
        return mod.key_features(notes, tpb, 4.0, 8 * tpb, table, 12.0, 0.1)
    assert call(p.notes) is not None
    shuffled = p.notes[np.random.default_rng(1).permutation(len(p.notes))]
    assert call(shuffled) is None  # out of time order: numpy's general path
    chord = p.notes.copy()
    chord["start"] = 0
    assert call(chord) is None  # one onset out of pitch order
    far = p.notes.copy()
    far["end"][5] = 2 ** 54  # beyond float64's exact integers
    assert call(far) is None
    drums = p.notes.copy()
    drums["channel"] = 9
    assert call(drums) is None  # no pitched note
    voices = p.notes.copy()
    voices["track"] = np.arange(len(voices)) % 65  # more voices than the compiled code keeps
    voices["channel"] = 0
    assert call(voices) is None
    voices["track"] = np.arange(len(voices)) % 64
    assert call(voices) is not None
    with pytest.raises(ValueError):
        mod.key_features(p.notes, 480, 4.0, 3840, table[:10], 12.0, 0.1)


def test_compiled_meter(monkeypatch, analysis_pieces):
    from pipeline.analysis import meter as metermod
    _both_paths(monkeypatch, analysis_pieces, metermod.accent_function)
    _both_paths(monkeypatch, analysis_pieces, metermod.estimate_meter)
    _both_paths(monkeypatch, analysis_pieces, timing.grid_fraction)
    _both_paths(monkeypatch, analysis_pieces, lambda p: timing.grid_fraction(p, (4, 3, 5), 1 / 96))


def test_compiled_stats(monkeypatch, analysis_pieces):
    from pipeline.analysis import stats as statsmod
    _both_paths(monkeypatch, analysis_pieces, statsmod.piece_stats)


def test_compiled_shingles_and_content_hash(monkeypatch, analysis_pieces):
    from pipeline.analysis import shingles as shmod
    for spec in (shmod.ShingleSpec(), shmod.ShingleSpec(ngram=3, grid=8),
                 shmod.ShingleSpec(ngram=1, grid=2, max_shingles=50),
                 shmod.ShingleSpec(ngram=9, grid=3, max_interval=5, max_ratio=2, min_distinct=4),
                 shmod.ShingleSpec(bass_below=0, lead_monophony=0.5, pitch_extra=0)):
        _both_paths(monkeypatch, analysis_pieces, lambda p: shmod.shingle_hashes(p, spec))
    _both_paths(monkeypatch, analysis_pieces, shmod.content_hash)


def test_compiled_output_notes(monkeypatch, analysis_pieces):
    from pipeline.analysis.transpose import fold_count
    from pipeline.stages.transpose import Transpose
    for shift in (-70, -11, -6, -1, 0, 1, 5, 11, 40):
        _both_paths(monkeypatch, analysis_pieces, lambda p: fold_count(p.notes, shift))
    for values in ({"transpose": 0}, {"transpose": 3, "augment": [-11, -4, 1, 8]},
                   {"transpose": -6, "augment": [40, -70]}):
        _both_paths(monkeypatch, analysis_pieces, lambda p: Transpose.output_notes(p, values))


def test_compiled_encoder_from_the_table(monkeypatch, analysis_pieces):
    # encode's table path (table_group_events) against its numpy path, and against the
    # compiled column path (group_events) on the same columns
    def both(p):
        try:
            return encode(p)
        except ValueError as exc:
            return str(exc)
    _both_paths(monkeypatch, analysis_pieces, both)
    def outcome(fn, *args):
        try:
            return fn(*args)
        except ValueError as exc:
            return str(exc)
    for p in analysis_pieces:
        n = p.notes
        got = outcome(accel.module.table_group_events, np.ascontiguousarray(n))
        if got is None:
            assert not (n["end"] > n["start"]).all()
            continue
        cols = [n["track"].astype(np.int64) * 16 + n["channel"]] + \
            [np.ascontiguousarray(n[f].astype(np.int64))
             for f in ("start", "end", "pitch", "velocity", "program")]
        assert got == outcome(accel.module.group_events, *cols)


def test_compiled_analyses_hand_back_what_numpy_treats_otherwise():
    from pipeline.midi.accel import compiled_analyses
    p = smf.decode(random_midi(2, n_notes=200, n_tracks=3))
    mod = accel.module
    assert (compiled_analyses(p.notes) is mod) == accel.USE_ACCEL
    shuffled = p.notes[np.random.default_rng(1).permutation(len(p.notes))]
    if (np.diff(shuffled["start"][shuffled["channel"] != 9]) < 0).any():
        assert mod.meter_accents(shuffled, 480.0, (6, 12), 144) is None
        assert mod.pc_histogram(shuffled, 480.0, 1.0, 2.0, 4.0) is None
    bad = p.notes.copy()
    bad["start_s"][0] = np.nan
    assert mod.note_stats(bad) is None
    zero = p.notes.copy()
    zero["end"][0] = zero["start"][0]
    assert mod.table_group_events(zero) is None
    assert compiled_analyses(p.notes[::2]) is None


def test_compiled_minhash_equals_similarity_minhash():
    # minhash32 (offered to similarity.minhash) against it, both table layouts, and datasketch
    from datasketch import MinHash
    from pipeline.similarity.minhash import fold32, minhash, permutations
    rng = np.random.default_rng(4)
    for size in (1, 2, 100, 255, 256, 257, 4096):
        sh = np.unique(rng.integers(0, 2 ** 64, size, dtype=np.uint64))
        for num_perm, seed in ((128, 1), (64, 9), (8, 3)):
            a, b = permutations(num_perm, seed)
            got = np.frombuffer(accel.module.minhash32(sh, a, b), dtype=np.uint32)
            assert got.tobytes() == minhash(sh, num_perm, seed, compiled=False).tobytes(), (size, num_perm)
            assert got.tobytes() == minhash(sh, num_perm, seed).tobytes()  # what the stages call
    ref = MinHash(num_perm=128, seed=1, hashfunc=int)  # datasketch affine32, identity hash
    ref.update_batch([int(v) for v in fold32(sh)])
    a, b = permutations(128, 1)
    assert np.array_equal(np.frombuffer(accel.module.minhash32(sh, a, b), dtype=np.uint32),
                          ref.digest())
