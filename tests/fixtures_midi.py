"""Shared MIDI test helpers: hexdump parsing, seeded random SMF files built with mido, and
reference note tables read with mido and pretty_midi (the outside references of the tests)."""
from __future__ import annotations

import functools
import io
import random

import mido
import numpy as np

from pipeline.tools.fuzz import reference_rows


def smf_bytes(mid: mido.MidiFile) -> bytes:
    """The bytes mido writes for ``mid`` (a Standard MIDI File)."""
    buf = io.BytesIO()
    mid.save(file=buf)
    return buf.getvalue()


def parse_hexdump(hexdump: str) -> bytes:
    """Bytes from an inline commented hexdump (mido's test style: '4d 54 68 64  # MThd')."""
    out = bytearray()
    for line in hexdump.splitlines():
        out += bytes.fromhex(line.split("#")[0])
    return bytes(out)


def random_midi(seed: int, n_notes: int = 500, n_tracks: int = 3, tpb: int = 480,
                hanging: int = 0, cc_rate: float = 0.05) -> bytes:
    """A format-1 SMF made with mido: conductor track (tempo changes, meter, key) plus
    ``n_tracks`` instrument tracks on distinct channels (one on the drum channel when there
    are 3 or more), with program changes, control changes, running status and velocity-0
    note-offs. Same-pitch notes on one channel never overlap, so every reference agrees.
    ``hanging`` notes per track are left without a note-off; ``cc_rate`` is the chance of a
    control change per note."""
    rng = random.Random(seed)
    mid = mido.MidiFile(type=1, ticks_per_beat=tpb)
    cond = mido.MidiTrack()
    cond.append(mido.MetaMessage("track_name", name=f"Piece {seed}", time=0))
    cond.append(mido.MetaMessage("time_signature", numerator=rng.choice([3, 4, 6]),
                                 denominator=rng.choice([4, 8]), time=0))
    cond.append(mido.MetaMessage("key_signature", key=rng.choice(["C", "G", "Eb", "Am"]), time=0))
    cond.append(mido.MetaMessage("set_tempo", tempo=rng.randint(300_000, 900_000), time=0))
    for _ in range(rng.randint(0, 3)):
        cond.append(mido.MetaMessage("set_tempo", tempo=rng.randint(300_000, 900_000),
                                     time=rng.randint(1, 8) * tpb))
    mid.tracks.append(cond)
    per_track = max(1, n_notes // n_tracks)
    channels = [0, 1, 9, 2, 3, 4, 5][:n_tracks]
    for k, ch in enumerate(channels):
        tr = mido.MidiTrack()
        tr.append(mido.MetaMessage("track_name", name=f"Part {k}", time=0))
        tr.append(mido.Message("program_change", channel=ch, program=rng.randrange(128), time=0))
        events = []  # (abs tick, order, message)
        busy: dict[int, int] = {}
        tick = 0
        for i in range(per_track + hanging):
            tick += rng.choice([0, 0, tpb // 4, tpb // 2, tpb])
            pitch = rng.randint(36, 84)
            if busy.get(pitch, -1) >= tick:
                tick = busy[pitch] + 1
            dur = rng.choice([tpb // 8, tpb // 4, tpb // 2, tpb, 2 * tpb]) or 1
            vel = rng.randint(1, 127)
            events.append((tick, 1, mido.Message("note_on", channel=ch, note=pitch, velocity=vel)))
            if i < per_track:
                off = (mido.Message("note_off", channel=ch, note=pitch, velocity=64)
                       if rng.random() < 0.3 else
                       mido.Message("note_on", channel=ch, note=pitch, velocity=0))
                events.append((tick + dur, 0, off))
                busy[pitch] = tick + dur
            else:
                busy[pitch] = 10**9
            if rng.random() < cc_rate:
                events.append((tick, 2, mido.Message("control_change", channel=ch, control=7,
                                                     value=rng.randrange(128))))
        events.sort(key=lambda e: (e[0], e[1]))
        last = 0
        for t, _, msg in events:
            tr.append(msg.copy(time=t - last))
            last = t
        mid.tracks.append(tr)
    return smf_bytes(mid)


#: Column order of the comparable note rows used by the reference checks.
NOTE_FIELDS = ("start", "end", "pitch", "velocity", "channel", "program", "track")


def piece_rows(piece) -> list[tuple]:
    """Sorted comparable rows (ticks) of a decoded Piece."""
    return sorted(tuple(int(r[f]) for f in NOTE_FIELDS) for r in piece.notes)


def mido_rows(data: bytes) -> list[tuple]:
    """Note rows read with mido (reference decoder), using the documented policy of
    pipeline.midi.decode: program at note-on, stacked same-key notes closed together by the next
    note-off except those started at that tick, zero-length notes dropped, hanging notes
    closed at the track's last event tick. One implementation, shared with the fuzzer
    (``pipeline.tools.fuzz.reference_rows``); here mido's own error is raised for a file it cannot read."""
    rows = reference_rows(data)
    if rows is None:
        mido.MidiFile(file=io.BytesIO(data))  # raises mido's error
    return rows


def pretty_midi_rows(data: bytes) -> list[tuple]:
    """(start_s, end_s, pitch, velocity, program, is_drum) rows read with pretty_midi."""
    import pretty_midi  # reference library, test-only dependency

    pm = pretty_midi.PrettyMIDI(io.BytesIO(data))
    rows = []
    for inst in pm.instruments:
        for n in inst.notes:
            rows.append((round(n.start, 9), round(n.end, 9), n.pitch, n.velocity,
                         inst.program, inst.is_drum))
    return sorted(rows)


def piece_seconds_rows(piece) -> list[tuple]:
    """The same shape as ``pretty_midi_rows`` from a decoded Piece."""
    n = piece.notes
    return sorted(zip(np.round(n["start_s"], 9).tolist(), np.round(n["end_s"], 9).tolist(),
                      n["pitch"].tolist(), n["velocity"].tolist(), n["program"].tolist(),
                      (n["channel"] == 9).tolist()))


#: A dozen four-part Bach chorales from music21's bundled corpus (not a reserved folder).
CHORALES = ("bach/bwv66.6", "bach/bwv1.6", "bach/bwv10.7", "bach/bwv101.7", "bach/bwv102.7",
            "bach/bwv103.6", "bach/bwv104.6", "bach/bwv108.6", "bach/bwv11.6", "bach/bwv110.7",
            "bach/bwv111.6", "bach/bwv113.8")


@functools.lru_cache(maxsize=1)
def bach_chorale_midi() -> tuple[tuple[str, bytes], ...]:
    """(name, SMF bytes) for ``CHORALES``, rendered once per test session with
    music21.midi.translate.streamToMidiFile."""
    from music21 import corpus
    from music21.midi import translate

    return tuple((name, translate.streamToMidiFile(corpus.parse(name)).writestr())
                 for name in CHORALES)
