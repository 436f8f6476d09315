"""The normalized MIDI keeps the source's control changes, pitch bends, aftertouch, program
changes and text-like meta events (issue 19 item 4); a transposition moves only notes (and the
key numbers of polyphonic aftertouch on pitched channels); transpose's ``notes_only`` strips
them.

Reference readers: mido (every message with its absolute tick, per channel and per track) and
pretty_midi (control changes, pitch bends, notes, lyrics and text events in seconds, as a
user's training code reads them). Sources are built in code with mido.
"""
from __future__ import annotations

import io
import random
from collections import Counter
from pathlib import Path

import mido
import numpy as np
import pretty_midi
import pytest

from fixtures_midi import random_midi, smf_bytes
from pipeline.midi import accel
from pipeline.midi import decode as smf
from pipeline.midi.encode import encode
from pipeline.outputs.render import render
from pipeline.analysis.transpose import shift_controls
from pipeline.outputs.files import staged_path
from pipeline.engine.worker import output_variants
from pipeline.stages.transpose import Transpose
from pipeline.midi.piece import CONTROL_DTYPE

CHANNEL_TYPES = ("control_change", "pitchwheel", "aftertouch", "polytouch", "program_change")
DRUMS = 9  # General MIDI percussion channel ("channel 10"; GM 1 specification)


def rich_midi(seed: int, tpb: int = 480, fps: int | None = None) -> bytes:
    """A format-1 file with what a performance file carries besides notes: sustain pedal (CC
    64), modulation (1), volume (7), expression (11), dense pitch-bend ramps, channel and
    polyphonic aftertouch (on a pitched and on the drum channel), program changes in the middle
    of a track, markers, a cue point, copyright, lyrics on the melody track and a .kar-style
    words track (text events, no notes), and a track that holds controllers only."""
    rng = random.Random(seed)
    mid = mido.MidiFile(type=1, ticks_per_beat=tpb)
    cond = [(0, mido.MetaMessage("track_name", name="Song")),
            (0, mido.MetaMessage("copyright", text="(c) nobody")),
            (0, mido.MetaMessage("set_tempo", tempo=500_000)),
            (4 * tpb, mido.MetaMessage("set_tempo", tempo=400_000)),
            (0, mido.MetaMessage("marker", text="Intro")),
            (8 * tpb, mido.MetaMessage("marker", text="Verse")),
            (12 * tpb, mido.MetaMessage("cue_marker", text="lights"))]
    if fps is not None:  # SMPTE time has no tempo
        cond = [e for e in cond if e[1].type != "set_tempo"]
    tracks = [cond]
    for k, ch in enumerate((0, 1, DRUMS)):
        ev = [(0, mido.MetaMessage("track_name", name=f"Part {k}")),
              (0, mido.Message("control_change", channel=ch, control=7, value=100)),
              (0, mido.Message("control_change", channel=ch, control=11, value=90))]
        if ch != DRUMS:
            ev.append((0, mido.Message("program_change", channel=ch, program=rng.randrange(128))))
        tick = 0
        for i in range(60):
            tick += rng.choice([0, tpb // 4, tpb // 2, tpb])
            pitch = rng.randint(40, 80) if ch != DRUMS else rng.choice([36, 38, 42, 46])
            dur = rng.choice([tpb // 4, tpb // 2, tpb])
            if ch == 1 and i == 30:  # before the note-on of its tick (pretty_midi reads the
                # program at note-off, pipeline.midi.decode at note-on: a change after a note-on at its
                # own tick is where the two differ)
                ev.append((tick, mido.Message("program_change", channel=ch, program=rng.randrange(128))))
            ev.append((tick, mido.Message("note_on", channel=ch, note=pitch, velocity=rng.randint(20, 120))))
            ev.append((tick + dur, mido.Message("note_off", channel=ch, note=pitch, velocity=0)))
            if rng.random() < 0.3:
                ev.append((tick + 1, mido.Message("polytouch", channel=ch, note=pitch, value=rng.randrange(128))))
            if ch == 0 and i % 8 == 0:  # sustain pedal down and up
                ev.append((tick, mido.Message("control_change", channel=ch, control=64, value=127)))
                ev.append((tick + 2 * tpb, mido.Message("control_change", channel=ch, control=64, value=0)))
            if ch == 0 and i % 5 == 0:
                ev.append((tick, mido.MetaMessage("lyrics", text=f"la{i} ")))
            if ch == 1 and i % 10 == 0:  # a bend ramp up and back, 20 steps
                for j in range(20):
                    ev.append((tick + j * 5, mido.Message("pitchwheel", channel=ch, pitch=(j - 10) * 800)))
                ev.append((tick + 100, mido.Message("control_change", channel=ch, control=1, value=rng.randrange(128))))
                ev.append((tick, mido.Message("aftertouch", channel=ch, value=rng.randrange(128))))
        tracks.append(ev)
    words = [(0, mido.MetaMessage("track_name", name="Words")),
             (0, mido.MetaMessage("text", text="@KMIDI KARAOKE FILE"))]
    words += [(i * tpb, mido.MetaMessage("text", text=f"/word{i}")) for i in range(1, 12)]
    tracks.append(words)
    ctl_only = [(i * tpb, mido.Message("control_change", channel=3, control=10, value=i * 9)) for i in range(12)]
    tracks.append(ctl_only)
    for events in tracks:
        tr = mido.MidiTrack()
        last = 0
        for t, msg in sorted(events, key=lambda e: e[0]):  # stable: written order within a tick
            tr.append(msg.copy(time=t - last))
            last = t
        mid.tracks.append(tr)
    data = bytearray(smf_bytes(mid))
    if fps is not None:  # SMPTE division: -fps in the high byte, ticks per frame in the low
        data[12:14] = bytes(((256 - fps) & 0xFF, 40))
    return bytes(data)


def mido_events(data: bytes, types=CHANNEL_TYPES) -> list[tuple]:
    """(absolute tick, track name, message fields) of the given message types, read with mido,
    in file order per track (tracks in file order)."""
    out = []
    for tr in mido.MidiFile(file=io.BytesIO(data)).tracks:
        tick, name = 0, ""
        for msg in tr:
            tick += msg.time
            if msg.type == "track_name" and not name:
                name = msg.name
            if msg.type in types:
                d = msg.dict()
                d.pop("time")
                out.append((tick, name, tuple(sorted(d.items()))))
    return out


def streams(data: bytes, types=CHANNEL_TYPES) -> dict[tuple, list]:
    """Per (track name, channel): the sequence of (tick, message fields), file order."""
    got: dict[tuple, list] = {}
    for tick, name, fields in mido_events(data, types):
        got.setdefault((name, dict(fields)["channel"]), []).append((tick, fields))
    return got


def render_outputs(tmp_path: Path, data: bytes, options: dict, values: dict) -> dict[str, bytes]:
    """The normalized outputs of one source, as the worker renders them (the transpose stage's
    output variants, encoded by outputs.render)."""
    piece = smf.decode(data)
    stage = Transpose(options)
    variants = output_variants([stage], piece, {"transpose": {"values": values}})
    staging = str(tmp_path / "staging")
    sha, fp = "ab" * 32, "cd" * 8
    suffixes = render(variants, staging, sha, fp)
    return {s: Path(staged_path(staging, sha, fp, s)).read_bytes() for s in suffixes}


def pm_controls(data: bytes) -> tuple[Counter, Counter]:
    """pretty_midi's control changes (time, number, value) and pitch bends (time, value) over
    all instruments, times rounded to the microsecond."""
    pm = pretty_midi.PrettyMIDI(io.BytesIO(data))
    cc = Counter((round(c.time, 6), c.number, c.value) for i in pm.instruments for c in i.control_changes)
    pb = Counter((round(b.time, 6), b.pitch) for i in pm.instruments for b in i.pitch_bends)
    return cc, pb


def pm_notes(data: bytes, shift: int = 0) -> Counter:
    """pretty_midi's notes (time, pitch, velocity, drum flag, program), pitched ones moved by
    ``shift`` semitones."""
    pm = pretty_midi.PrettyMIDI(io.BytesIO(data))
    return Counter((round(n.start, 6), round(n.end, 6), n.pitch + (0 if i.is_drum else shift),
                    n.velocity, i.is_drum, i.program) for i in pm.instruments for n in i.notes)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_control_streams_survive_normalization_and_transposition(tmp_path, seed):
    src = rich_midi(seed)
    outs = render_outputs(tmp_path, src, {"notes_only": False},
                          {"transpose": 3, "augment": [-5, 4]})
    assert sorted(outs) == ["", ".t+4", ".t-5"]
    want = streams(src, ("control_change", "pitchwheel", "aftertouch"))
    assert sum(map(len, want.values())) > 100
    for suffix, total in (("", 3), (".t-5", -2), (".t+4", 7)):
        out = outs[suffix]
        # mido: per (source track, channel), the same controller, bend and channel-pressure
        # messages at the same ticks in the same order; the values are not transposed
        assert streams(out, ("control_change", "pitchwheel", "aftertouch")) == want, suffix
        # pretty_midi: the same control changes and pitch bends at the same times (seconds)
        assert pm_controls(out) == pm_controls(src), suffix
        # pretty_midi: the notes moved by the transposition, drums not
        assert pm_notes(out) == pm_notes(src, total), suffix
        # polyphonic aftertouch follows its notes on pitched channels, not on the drum channel
        poly_src = streams(src, ("polytouch",))
        poly_out = streams(out, ("polytouch",))
        assert poly_out.keys() == poly_src.keys()
        for key, seq in poly_src.items():
            moved = [(t, tuple(sorted({**dict(f), "note": dict(f)["note"] + (0 if key[1] == DRUMS else total)}.items())))
                     for t, f in seq]
            assert poly_out[key] == moved, (suffix, key)
        # every source program change is still there, at its tick (mido)
        pcs_out = streams(out, ("program_change",))
        for key, seq in streams(src, ("program_change",)).items():
            assert Counter(seq) <= Counter(pcs_out[key]), (suffix, key)


def test_lyrics_text_and_markers_kept(tmp_path):
    # a .kar file is a plain SMF whose words are text events of a track without notes
    # (common practice); pretty_midi reads lyric (0x05) and text (0x01) metas from any track
    src = rich_midi(4)
    out = render_outputs(tmp_path, src, {}, {"transpose": -4})[""]
    a, b = pretty_midi.PrettyMIDI(io.BytesIO(src)), pretty_midi.PrettyMIDI(io.BytesIO(out))
    assert len(a.lyrics) == 12 and len(a.text_events) == 12
    assert [(x.text, round(x.time, 6)) for x in b.lyrics] == [(x.text, round(x.time, 6)) for x in a.lyrics]
    assert ([(x.text, round(x.time, 6)) for x in b.text_events]
            == [(x.text, round(x.time, 6)) for x in a.text_events])
    metas = ("marker", "cue_marker", "copyright", "lyrics", "text")
    ev = lambda d: Counter((t, f) for t, _, f in mido_events(d, metas))  # noqa: E731
    assert ev(out) == ev(src)


def test_notes_only_strips_everything_but_notes(tmp_path):
    src = rich_midi(5)
    outs = render_outputs(tmp_path, src, {"notes_only": True}, {"transpose": 2, "augment": [1]})
    for suffix, total in (("", 2), (".t+1", 3)):
        out = outs[suffix]
        assert not mido_events(out, ("control_change", "pitchwheel", "aftertouch", "polytouch",
                                     "lyrics", "text", "marker", "cue_marker", "copyright"))
        pm = pretty_midi.PrettyMIDI(io.BytesIO(out))
        assert not pm.lyrics and not pm.text_events
        assert pm_controls(out) == (Counter(), Counter())
        assert pm_notes(out) == pm_notes(src, total)  # programs included (pretty_midi)
        # the program changes left are those the notes need: one per group track here, plus
        # the change in the middle of part 1
        assert len(mido_events(out, ("program_change",))) == 4


def test_decoded_controls_match_mido():
    # the decoder's control table against mido's messages (absolute ticks, per track), both
    # paths; random_midi's control changes (cc_rate) and rich_midi's full set
    for data in (random_midi(7, n_notes=400, cc_rate=0.5), rich_midi(6)):
        ref = []
        for ti, tr in enumerate(mido.MidiFile(file=io.BytesIO(data)).tracks):
            tick = 0
            for msg in tr:
                tick += msg.time
                if msg.type in CHANNEL_TYPES:
                    raw = msg.bytes()
                    ref.append((tick, ti, raw[0] & 0x0F, raw[0] & 0xF0, raw[1],
                                raw[2] if len(raw) > 2 else 0))
        assert len(ref) > 50
        for accelerated in (False, True) if accel.HAVE_ACCEL else (False,):
            got = smf.decode(data, accelerated=accelerated).controls
            assert got.dtype == CONTROL_DTYPE
            assert [tuple(int(v) for v in r) for r in got] == ref


def test_random_midi_control_changes_round_trip():
    # random_midi puts a volume change on the chance cc_rate per note (fixtures_midi)
    src = random_midi(11, n_notes=600, n_tracks=4, cc_rate=0.4)
    out = encode(smf.decode(src))
    assert streams(out).keys() == streams(src).keys()
    for key, seq in streams(src, ("control_change",)).items():
        assert streams(out, ("control_change",))[key] == seq
    assert pm_controls(out) == pm_controls(src)


def test_smpte_controls_rebased_like_notes(tmp_path):
    # SMPTE 25 fps x 40 ticks/frame = 1000 ticks per second (SMF 1.0, division); the output
    # is re-based on 960 ticks per second (pipeline.midi.encode); a control keeps its time in seconds
    src = rich_midi(8, fps=25)
    out = render_outputs(tmp_path, src, {}, {"transpose": 0})[""]
    mf = mido.MidiFile(file=io.BytesIO(out))
    assert mf.ticks_per_beat == 480
    # each event at the output tick nearest to its source time in seconds
    types = ("control_change", "pitchwheel", "aftertouch", "polytouch")
    want = Counter((int(np.rint(t / 1000 * 960)), f) for t, _, f in mido_events(src, types))
    assert sum(want.values()) > 100
    assert Counter((t, f) for t, _, f in mido_events(out, types)) == want
    pcs = Counter((t, f) for t, _, f in mido_events(out, ("program_change",)))
    assert Counter((int(np.rint(t / 1000 * 960)), f)
                   for t, _, f in mido_events(src, ("program_change",))) <= pcs
    # the lyrics keep their seconds too, within half an output tick (pretty_midi on the output)
    src_lyrics = [t / 1000 for t, _, _ in mido_events(src, ("lyrics",))]
    got = [x.time for x in pretty_midi.PrettyMIDI(io.BytesIO(out)).lyrics]
    assert len(got) == len(src_lyrics) == 12
    assert max(abs(a - b) for a, b in zip(got, src_lyrics)) <= 1 / 1920 + 1e-9


def test_shift_controls_moves_only_pitched_poly_aftertouch():
    c = np.zeros(5, dtype=CONTROL_DTYPE)
    c["kind"] = [0xA0, 0xA0, 0xB0, 0xE0, 0xA0]
    c["channel"] = [0, DRUMS, 0, 0, 2]
    c["data1"] = [60, 38, 64, 0, 125]
    c["data2"] = [10, 20, 127, 64, 30]
    out = shift_controls(c, 5)
    # 125 + 5 = 130 is folded down an octave to 118, as shift_notes folds notes
    assert out["data1"].tolist() == [65, 38, 64, 0, 118]
    assert out["data2"].tolist() == c["data2"].tolist()
    assert shift_controls(c, 0) is c


def test_control_layout_is_what_the_compiled_code_writes():
    # pipeline/midi/csrc/ (decode.c writes, encode.c reads) CONTROL_DTYPE records packed, 14 bytes each
    assert CONTROL_DTYPE.itemsize == 14
    assert [CONTROL_DTYPE.fields[f][1] for f in CONTROL_DTYPE.names] == [0, 8, 10, 11, 12, 13]


def test_compiled_encoder_with_controls_equals_numpy():
    # pipeline/midi/csrc/encode.c group_events with the other events against encode._all_group_events
    if not accel.HAVE_ACCEL:
        pytest.skip("pipeline.midi._smf_accel is not built")
    for seed in range(6):
        p = smf.decode(rich_midi(seed))
        assert encode(p, accelerated=True) == encode(p, accelerated=False)
        only = smf.decode(rich_midi(seed))
        only.notes = only.notes[:0]  # controls and texts without a note
        assert encode(only, accelerated=True) == encode(only, accelerated=False)
        assert streams(encode(only)) == streams(rich_midi(seed))
    # format 0 (every channel in one track: the controls must be regrouped) and SMPTE time
    mf = mido.MidiFile(file=io.BytesIO(rich_midi(7)))
    zero = mido.MidiFile(type=0, ticks_per_beat=mf.ticks_per_beat)
    zero.tracks.append(mido.merge_tracks(mf.tracks))
    for data in (smf_bytes(zero), rich_midi(8, fps=25)):
        p = smf.decode(data)
        out = encode(p, accelerated=True)
        assert out == encode(p, accelerated=False)
        if not p.smpte:  # per channel, the same streams (mido)
            per_channel = lambda d: Counter((k[1], t, f) for k, v in streams(d).items()  # noqa: E731
                                            for t, f in v if dict(f)["type"] != "program_change")
            assert per_channel(out) == per_channel(data)


@pytest.mark.parametrize("notes_only", [False, True])
def test_a_run_writes_them_unless_notes_only(tmp_path, notes_only):
    # the option goes from the config to the worker that renders (config -> StagePlan -> the stage's output variants)
    from pipeline.config import load_config
    from pipeline.engine.runner import Runner
    (tmp_path / "in").mkdir()
    src = rich_midi(9)
    (tmp_path / "in" / "song.kar").write_bytes(src)  # .kar: a plain SMF (common practice)
    cfg_path = tmp_path / "c.yaml"
    cfg_path.write_text("stages:\n  - validate: {}\n"
                        f"  - transpose: {{notes_only: {str(notes_only).lower()}}}\n")
    cfg = load_config(cfg_path, input=str(tmp_path / "in"), output=str(tmp_path / "out"), workers=1)
    Runner(cfg, quiet=True).run()
    [out] = list((tmp_path / "out" / "midi").rglob("*.mid"))
    data = out.read_bytes()
    assert bool(mido_events(data, ("control_change", "pitchwheel", "lyrics"))) is not notes_only
    assert pm_controls(data) == ((Counter(), Counter()) if notes_only else pm_controls(src))


def test_generated_corpus_round_trip_with_mido():
    # every decodable file of a generated corpus with every planted quirk (format 0, .kar
    # lyrics, SMPTE, RMID, running status, controller-only tracks...): mido reads the same
    # control changes, pitch bends and aftertouch per channel in the normalized output, at the
    # same ticks (SMPTE: the nearest output tick), and the same lyric/text/marker payloads
    from pipeline.tools import synth
    from pipeline.errors import DecodeError
    outs, _ = synth.build(200, 3, "small", None)
    types = ("control_change", "pitchwheel", "aftertouch", "polytouch")
    metas = ("lyrics", "text", "marker", "cue_marker", "copyright")
    checked = events = texts = 0
    for o in outs:
        try:
            piece = smf.decode(o.data)
        except DecodeError:
            continue
        body = encode(piece)
        src = o.data
        if src[:4] == b"RIFF":  # mido reads the SMF inside the RMID container
            src = src[src.index(b"MThd"):]
        try:
            ref = mido_events(src, types)
            ref_text = Counter((t, f) for t, _, f in mido_events(src, metas))
        except Exception:  # a file mido refuses (a quirk it does not tolerate): no reference
            continue
        per_s = None
        if piece.smpte:
            div = int.from_bytes(src[12:14], "big")
            fps = {24: 24.0, 25: 25.0, 29: 30000 / 1001, 30: 30.0}[256 - (div >> 8)]
            per_s = fps * (div & 0xFF)
        at = (lambda t: t) if per_s is None else (lambda t: int(np.rint(t / per_s * 960)))  # noqa: E731
        want = Counter((dict(f)["channel"], at(t), f) for t, _, f in ref)
        got = Counter((dict(f)["channel"], t, f) for t, _, f in mido_events(body, types))
        assert got == want, o.kind
        got_text = Counter((t, f) for t, _, f in mido_events(body, metas))
        assert (Counter(f for _, f in got_text.elements())
                == Counter(f for _, f in ref_text.elements())), o.kind
        checked += 1
        events += sum(want.values())
        texts += sum(ref_text.values())
    assert checked >= 150 and events >= 100 and texts >= 50, (checked, events, texts)
