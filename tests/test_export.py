"""midisift export: piano-roll and performance-event shards of a finished run, and the loader.

Outside references: pretty_midi's ``get_piano_roll`` (with and without its sustain pedal) and
note reading (test extra), mido's tick/second conversion, Pillow (when installed) to read our PNG
previews, and the vocabulary size of Oore et al. 2018 ("This time with feeling"). The demo corpus
is invented and has no pedal; the pedal checks use twelve real POP909 files (tests/data/pop909,
MIT licence, Music X Lab), each with sustain-pedal events.
"""
from __future__ import annotations

import io
import json
import math
import re
import shutil
from pathlib import Path

import numpy as np
import pytest

from pipeline.cli import main
from pipeline.config import load_config
from pipeline.errors import MidisiftError, UsageError
from pipeline.export import ExportOptions, export_output, open_export
from pipeline.export.encodings import decode_events, encode_events, pianoroll, vocabulary, windows
from pipeline.export.png import png_bytes, roll_image
from pipeline.engine.runner import Runner
from pipeline.midi.decode import decode

from fixtures_midi import random_midi, smf_bytes

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "sample_corpus"


def _run(out: Path, input_dir: Path = DEMO, config: Path = ROOT / "configs" / "default.yaml") -> None:
    cfg = load_config(config, input=str(input_dir), output=str(out), workers=1)
    Runner(cfg, quiet=True).run()


@pytest.fixture(scope="module")
def demo_out(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("export") / "out"
    _run(out)
    return out


@pytest.fixture(scope="module")
def roll_export(demo_out) -> Path:
    assert main(["export", str(demo_out), "--format", "pianoroll", "--previews", "3", "--quiet"]) == 0
    return demo_out / "export" / "pianoroll"


@pytest.fixture(scope="module")
def event_export(demo_out) -> Path:
    assert main(["export", str(demo_out), "--format", "events", "--quiet"]) == 0
    return demo_out / "export" / "events"


def _kept_outputs(out: Path) -> dict[str, str]:
    """output path -> part, from the split lists."""
    return {line: p.stem for p in (out / "splits").glob("*.txt") for line in p.read_text().split()}


# layout and index --------------------------------------------------------------------------
def test_index_names_every_kept_file_once_with_its_shard_and_key(demo_out, roll_export):
    index = [json.loads(line) for line in (roll_export / "index.jsonl").read_text().splitlines()]
    assert {e["midi"]: e["part"] for e in index} == _kept_outputs(demo_out)
    manifest = {r["id"]: r for r in map(json.loads, (demo_out / "manifest.jsonl").read_text().splitlines())
                if r["status"] == "kept"}
    for e in index:
        assert set(e) >= {"id", "source", "part", "file", "key", "shape", "options"}
        assert manifest[e["id"]]["source"] == e["source"] and manifest[e["id"]]["split"] == e["part"]
        assert e["file"].startswith(f"{e['part']}/") and (roll_export / e["file"]).is_file()
        assert e["options"]["step"] == 0.05 and e["shape"][1] == 128
        with np.load(roll_export / e["file"]) as z:
            assert z[e["key"]].shape == tuple(e["shape"]) and z[e["key"]].dtype == np.uint8


def test_pianoroll_agrees_with_pretty_midi_on_every_demo_piece(demo_out, roll_export):
    # reference: pretty_midi.PrettyMIDI(file).get_piano_roll(fs=20) of the same normalized file
    # (the bar: >= 98% of the cells agree on note/no note, for every piece)
    pytest.importorskip("pretty_midi")
    ex = open_export(roll_export)
    shares = [_roll_agreement(roll, demo_out / next(e for e in ex.entries if e["key"] == key)["midi"])
              for key, roll in ex.iter_part()]
    assert len(shares) == len(ex) and min(shares) >= 0.98, min(shares)


def _roll_agreement(roll: np.ndarray, midi: Path | bytes, pedal_threshold: int | None = 64) -> float:
    """The share of cells on which ``roll`` (frames x 128 at 20 frames a second) and
    pretty_midi's ``get_piano_roll(fs=20, pedal_threshold=...)`` of ``midi`` agree on note /
    no note (the shorter padded with silence). pretty_midi's default threshold, 64, holds notes
    under the sustain pedal; None ignores the pedal."""
    import pretty_midi  # reference library, test extra
    pm = pretty_midi.PrettyMIDI(io.BytesIO(midi) if isinstance(midi, bytes) else str(midi))
    ref = pm.get_piano_roll(fs=20, pedal_threshold=pedal_threshold).T > 0
    frames = max(len(ref), len(roll))
    ours = np.zeros((frames, 128), bool)
    ours[:len(roll)] = roll > 0
    theirs = np.zeros((frames, 128), bool)
    theirs[:len(ref)] = ref
    return float((ours == theirs).mean())


POP = ROOT / "tests" / "data" / "pop909"  # twelve POP909 files (MIT licence, Music X Lab)


def _pedal_events(piece) -> int:
    c = piece.controls
    return int(((c["kind"] == 0xB0) & (c["data1"] == 64)).sum())


def test_pianoroll_ignores_the_pedal_by_default_and_holds_notes_under_it_with_sustain():
    # reference: pretty_midi's get_piano_roll(fs=20) of the same real files (POP909, a pianist's
    # pedal on the PIANO track): pedal_threshold=None (the pedal ignored) against our default
    # roll, its default threshold 64 (notes held from pedal-down to pedal-up) against our roll
    # with sustain=True; the bar of the demo check, 98% of the cells, on every file
    pytest.importorskip("pretty_midi")
    files = sorted(POP.rglob("*.mid"))
    assert len(files) == 12
    plain, held, crossed = [], [], []
    for f in files:
        data = f.read_bytes()
        piece = decode(data)
        assert _pedal_events(piece) >= 30, f  # every one has a pedal
        roll, _ = pianoroll(piece, step=0.05)
        roll_held, _ = pianoroll(piece, step=0.05, sustain=True)
        plain.append(_roll_agreement(roll, data, pedal_threshold=None))
        held.append(_roll_agreement(roll_held, data, pedal_threshold=64))
        crossed.append(_roll_agreement(roll, data, pedal_threshold=64))
        assert (roll_held > 0).sum() >= (roll > 0).sum() and ((roll_held > 0) >= (roll > 0)).all(), f
    assert min(plain) >= 0.98 and min(held) >= 0.98, (plain, held)
    # the pedal matters on these files: sustained, the roll agrees better with the pedalled
    # reference than the plain roll does (which misses 1-2% of the cells on most of them)
    assert sum(held) > sum(crossed) and min(crossed) < 0.99, crossed


def _pedal_case() -> bytes:
    """A hand-made file at 120 bpm, 480 ticks a beat: a frame of 0.05 s is 48 ticks."""
    import mido
    mid = mido.MidiFile(type=1, ticks_per_beat=480)
    cond = mido.MidiTrack([mido.MetaMessage("set_tempo", tempo=500_000, time=0)])

    def track(channel: int, notes: list[tuple[int, int, int]], pedal: list[tuple[int, int]]) -> mido.MidiTrack:
        ev = [(s, 1, mido.Message("note_on", channel=channel, note=p, velocity=80)) for s, e, p in notes]
        ev += [(e, 0, mido.Message("note_off", channel=channel, note=p)) for s, e, p in notes]
        ev += [(t, 2, mido.Message("control_change", channel=channel, control=64, value=v)) for t, v in pedal]
        tr, now = mido.MidiTrack(), 0
        for t, _, msg in sorted(ev, key=lambda x: (x[0], x[1])):
            tr.append(msg.copy(time=t - now))
            now = t
        return tr
    # track 1, channel 0: pedal down at frame 1 (a value of 100), a value of 70 (still down),
    # up at frame 10 (a value of 20); down again at frame 30 and never up
    mid.tracks += [cond, track(0, [(0, 96, 60),      # sounding at pedal-down: held to frame 10
                                   (192, 240, 62),   # struck while down: held to frame 10
                                   (0, 48, 64),      # ended in the frame of pedal-down: not held
                                   (528, 576, 65),   # after pedal-up: not held
                                   (0, 960, 67),     # longer than the pedal: unchanged
                                   (1440, 1488, 69)],  # under a pedal never lifted: not held
                               [(48, 100), (300, 70), (480, 20), (1440, 127)]),
                   # track 2, the same channel, no pedal of its own: not held by track 1's
                   track(0, [(192, 240, 72)], []),
                   # the drum channel is never held
                   track(9, [(192, 240, 38)], [(48, 127), (480, 0)])]
    return smf_bytes(mid)


def test_sustain_holds_a_note_sounding_at_pedal_down_or_struck_before_pedal_up():
    data = _pedal_case()
    piece = decode(data)
    roll, drums = pianoroll(piece, step=0.05, sustain=True, drums="apart")
    expected = {60: (0, 10), 62: (4, 10), 64: (0, 1), 65: (11, 12), 67: (0, 20), 69: (30, 31), 72: (4, 5)}
    assert roll.shape == (31, 128)
    for p in range(128):
        frames = np.flatnonzero(roll[:, p])
        a, b = expected.get(p, (0, 0))
        assert frames.tolist() == list(range(a, b)), p
    assert np.flatnonzero(drums[:, 38]).tolist() == [4]
    plain, _ = pianoroll(piece, step=0.05)
    assert np.flatnonzero(plain[:, 60]).tolist() == [0, 1] and np.flatnonzero(plain[:, 62]).tolist() == [4]
    # the same frames by beats: 10 frames a beat are 48 ticks each here too
    assert np.array_equal(pianoroll(piece, per_beat=10, sustain=True)[0], roll)
    # reference: pretty_midi's get_piano_roll(fs=20) holds the same cells, and none without
    # the pedal
    pytest.importorskip("pretty_midi")
    assert _roll_agreement(roll, data) == 1.0
    assert _roll_agreement(plain, data, pedal_threshold=None) == 1.0


def test_sustain_enters_the_export_options_and_events_refuse_it(tmp_path, capsys):
    out = tmp_path / "out"
    _run(out, POP)
    plain = export_output(out, ExportOptions("pianoroll"))
    ex = open_export(out, "pianoroll")
    assert "sustain" not in ex.options  # an export without it records what it did before
    rolls = {key: roll for key, roll in ex.iter_part()}
    fingerprint = json.loads((out / "export" / "pianoroll" / "export.json").read_text())["fingerprint"]
    assert main(["export", str(out), "--format", "pianoroll", "--sustain", "--quiet"]) == 0
    held = open_export(out, "pianoroll")
    meta = json.loads((out / "export" / "pianoroll" / "export.json").read_text())
    assert held.options["sustain"] is True and meta["fingerprint"] != fingerprint
    assert all(e["options"]["sustain"] is True for e in held.entries)
    pretty_midi = pytest.importorskip("pretty_midi")
    changed = []
    for e in held.entries:  # the normalized files keep their pedal: the option holds notes
        arr = held.load(e["key"])
        assert _roll_agreement(arr, out / e["midi"], pedal_threshold=64) >= 0.98, e["key"]
        pm = pretty_midi.PrettyMIDI(str(out / e["midi"]))
        pedalled = not np.array_equal(pm.get_piano_roll(fs=20) > 0,
                                      pm.get_piano_roll(fs=20, pedal_threshold=None) > 0)
        changed.append((not np.array_equal(arr, rolls[e["key"]]), pedalled))
    # held where the reference's pedal holds notes (not in 051, whose pedal, once down, never
    # comes up)
    assert len(held) == plain.pieces and sum(c for c, _ in changed) >= 3
    assert all(c == p for c, p in changed), changed
    again = export_output(out, ExportOptions("pianoroll"))  # back without: all written anew
    assert again.computed == again.pieces
    assert {key: roll.tobytes() for key, roll in open_export(out, "pianoroll").iter_part()} == \
        {key: roll.tobytes() for key, roll in rolls.items()}
    assert main(["export", str(out), "--format", "events", "--sustain"]) == 2
    assert "--sustain applies to --format pianoroll only" in capsys.readouterr().err


def _merged_reference(notes: list[tuple[float, float, int]], step: float) -> list[tuple[float, float, int]]:
    """The notes the encoding can hold (its module doc): per pitch, the union of the notes'
    sounding times, struck again at every onset (decided on times rounded to the step; a note
    that rounds to nothing takes the step its start falls in). Written as a plain loop over the reference's notes; the times
    returned are the reference's own, not rounded."""
    by_pitch: dict[int, list[tuple[int, int, float, float]]] = {}
    for s, e, p in notes:
        on, off = round(s / step), round(e / step)
        if off <= on:  # a note that rounds to nothing: the step its start falls in
            on = math.floor(s / step)
            off = on + 1
        by_pitch.setdefault(p, []).append((on, off, s, e))
    out = []
    for p, ns in by_pitch.items():
        ns.sort()
        reach, reach_s = -1, 0.0
        for i, (on, off, s, e) in enumerate(ns):
            reach, reach_s = max(reach, off), max(reach_s, e)  # the union ends at the latest end
            end, end_s = reach, reach_s
            if i + 1 < len(ns) and ns[i + 1][0] < end:
                end, end_s = ns[i + 1][0], ns[i + 1][2]
            if end > on:
                out.append((p, on, s, end_s))
    # by pitch, then onset: the order does not hang on how a time on a half step is rounded
    return [(s, e, p) for p, _, s, e in sorted(out)]


def test_event_sequences_decode_back_to_the_notes_pretty_midi_reads(demo_out, event_export):
    # reference: the pitched notes pretty_midi reads from each normalized file; onsets and
    # offsets must come back within one step (the bar)
    pretty_midi = pytest.importorskip("pretty_midi")
    ex = open_export(event_export)
    v = ex.vocabulary
    step, shifts = v["step_s"], v["ranges"]["time_shift"][1] - v["ranges"]["time_shift"][0]
    bins = v["ranges"]["velocity"][1] - v["ranges"]["velocity"][0]
    checked = 0
    for key, tokens in ex.iter_part():
        entry = next(e for e in ex.entries if e["key"] == key)
        pm = pretty_midi.PrettyMIDI(str(demo_out / entry["midi"]))
        ref = np.array(_merged_reference([(n.start, n.end, n.pitch) for i in pm.instruments if not i.is_drum
                                          for n in i.notes], step))
        got = decode_events(tokens, step=step, max_shift_steps=shifts, velocity_bins=bins)
        got = got[np.lexsort((got[:, 0], got[:, 2]))]  # by pitch, then onset, as the reference
        assert len(got) == len(ref), key
        assert (got[:, 2] == ref[:, 2]).all(), key
        assert np.abs(got[:, 0] - ref[:, 0]).max() <= step + 1e-9, key
        assert np.abs(got[:, 1] - ref[:, 1]).max() <= step + 1e-9, key
        checked += 1
    assert checked == len(ex) > 40


def test_events_round_trip_exact_notes_onsets_and_velocity_bins():
    # a hand-made case: re-struck pitch, chord, a gap longer than the longest shift
    on = np.array([0.0, 0.1, 0.1, 0.3, 3.0])
    off = np.array([0.5, 0.2, 0.25, 0.35, 3.5])
    pitch = np.array([60, 60, 64, 60, 67])
    vel = np.array([100, 100, 20, 100, 127])
    tokens = encode_events(on, off, pitch, vel, step=0.01, max_shift_steps=100, velocity_bins=32)
    got = decode_events(tokens, step=0.01, max_shift_steps=100, velocity_bins=32)
    # 60 struck at 0, again at 0.1 (ends at 0.3, its next onset), again at 0.3 (the union
    # of the 60s reaches 0.5)
    expected = [(0.0, 0.1, 60), (0.1, 0.3, 60), (0.1, 0.25, 64), (0.3, 0.5, 60), (3.0, 3.5, 67)]
    assert np.allclose(got[:, :3], expected)
    assert got[:, 3].tolist() == [102, 102, 22, 102, 126]  # bin middles of 4-wide bins
    # the 2.5 s gap after the last 60 ends: two full 1 s shifts and one of 0.5 s; then the
    # 0.5 s of the last note
    shifts = [t - 256 + 1 for t in tokens.tolist() if 256 <= t < 356]
    assert shifts[-4:] == [100, 100, 50, 50]


def test_a_note_shorter_than_a_step_keeps_both_ends_within_one_step():
    # 0.05 ms long, starting just past half a step: rounding would make it vanish
    tokens = encode_events(np.array([0.0050001]), np.array([0.00505]), np.array([60]), np.array([64]),
                           step=0.01, max_shift_steps=100, velocity_bins=32)
    got = decode_events(tokens, step=0.01, max_shift_steps=100, velocity_bins=32)
    assert np.allclose(got[:, :3], [(0.0, 0.01, 60)])


def test_vocabulary_is_the_published_388_tokens_by_default():
    # Oore et al. 2018, section 3.2: 128 note-on, 128 note-off, 100 time-shift (10 ms to 1 s),
    # 32 velocity events: 388
    v = vocabulary(100, 32, 0.01)
    assert v["size"] == 388 == len(v["tokens"])
    assert v["tokens"][0] == "NOTE_ON_0" and v["tokens"][256] == "TIME_SHIFT_1"
    assert v["tokens"][355] == "TIME_SHIFT_100" and v["tokens"][356] == "VELOCITY_0"


def test_event_export_writes_its_vocabulary_and_int16_tokens_inside_it(event_export):
    ex = open_export(event_export)
    assert ex.vocabulary["size"] == 388
    for _, tokens in ex.iter_part("valid"):
        assert tokens.dtype == np.int16 and 0 <= tokens.min() and tokens.max() < 388


# options ---------------------------------------------------------------------------------
def test_per_beat_frames_follow_the_tempo_map_as_pretty_midi_converts_it():
    # reference: pretty_midi's time_to_tick (its own reading of the tempo map) of each note's
    # start in seconds; a frame is 1/4 beat, so frame = floor(tick * 4 / resolution)
    pretty_midi = pytest.importorskip("pretty_midi")
    data = random_midi(0, n_notes=200, n_tracks=2)  # four tempos
    piece = decode(data)
    pm = pretty_midi.PrettyMIDI(io.BytesIO(data))
    assert len(pm.get_tempo_changes()[0]) == 4
    roll, _ = pianoroll(piece, per_beat=4)
    starts = sorted({(int(pm.time_to_tick(n.start) * 4 // pm.resolution), n.pitch)
                     for i in pm.instruments if not i.is_drum for n in i.notes})
    for frame, p in starts:
        assert roll[frame, p] > 0


def test_pitch_range_windows_and_drums_apart(tmp_path, demo_out):
    out = demo_out
    assert main(["export", str(out), "--format", "pianoroll", "--pitch-low", "21", "--pitch-high", "108",
                 "--window", "4", "--hop", "2", "--drums", "apart", "--quiet"]) == 0
    ex = open_export(out, "pianoroll")
    full = open_export(out / "export" / "pianoroll")
    assert ex.options["pitch_low"] == 21 and ex.options["window"] == 4
    for e in full.entries[:5]:
        arr = full.load(e["key"])
        assert arr.shape[1:] == (80, 88)  # 4 s / 0.05 s frames, pitches 21..108
        piece = decode((out / e["midi"]).read_bytes())
        roll, drums = pianoroll(piece, step=0.05, low=21, high=108, drums="apart")
        frames = roll.shape[0]
        assert arr.shape[0] == (1 if frames <= 80 else -(-(frames - 80) // 40) + 1)
        assert np.array_equal(arr[0, :min(80, frames)], roll[:80])
        assert np.array_equal(arr[1, :min(40, frames - 40)], roll[40:80][:min(40, frames - 40)])
        assert e["drums_shape"][1:] == [80, 128]
    drum_arrays = dict(full.iter_part("train", drums=True))
    assert sum(int(a.astype(bool).sum()) for a in drum_arrays.values()) > 0
    # and the default export (no windows) is written anew: other options, other fingerprint
    assert main(["export", str(out), "--format", "pianoroll", "--previews", "3", "--quiet"]) == 0


def test_windows_in_beats_with_per_beat_frames(demo_out, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(demo_out, out, ignore=shutil.ignore_patterns("export"))
    export_output(out, ExportOptions("pianoroll", per_beat=4, window=8, hop=4))
    ex = open_export(out, "pianoroll")
    for e in ex.entries[:5]:
        arr = ex.load(e["key"])
        piece = decode((out / e["midi"]).read_bytes())
        roll, _ = pianoroll(piece, per_beat=4)
        assert arr.shape[1:] == (32, 128)  # 8 beats of 4 frames; a window every 16 frames
        assert np.array_equal(windows(roll, 32, 16), arr)
        # the roll spans the piece's last note end, in beats (ticks / ticks per beat)
        assert len(roll) == int(np.floor(piece.notes["end"][piece.notes["channel"] != 9].max() * 4
                                         / piece.ticks_per_beat + 1e-9))


def test_windows_cover_the_roll_and_pad_the_last():
    roll = np.arange(10 * 3, dtype=np.uint8).reshape(10, 3)
    w = windows(roll, 4, 3)
    assert w.shape == (3, 4, 3)
    assert np.array_equal(w[2, :4], roll[6:10])
    w = windows(roll, 8, 8)
    assert w.shape == (2, 8, 3) and not w[1, 2:].any() and np.array_equal(w[1, :2], roll[8:])
    assert windows(roll, 20, 5).shape == (1, 20, 3)


@pytest.mark.parametrize("args, message", [
    (["--format", "pianoroll", "--step", "0"], "--step must be above 0"),
    (["--format", "pianoroll", "--window", "0.01"], "shorter than one frame"),
    (["--format", "pianoroll", "--per-beat", "4", "--window", "0.1"], "shorter than one frame"),
    (["--format", "midi"], "unknown format 'midi'"),
    (["--format", "events", "--window", "4"], "pianoroll only"),
    (["--format", "pianoroll", "--pitch-low", "90", "--pitch-high", "80"], "low <= high"),
    (["--format", "pianoroll", "--drums", "keep"], "--drums must be one of"),
    # an audit: tracebacks, a 35 GiB allocation, a ten-minute run at 8 GB
    (["--format", "pianoroll", "--step", "0.00001"], "--step must be above 0, from 0.001 to 10"),
    (["--format", "events", "--step", "1e-300"], "--step must be above 0, from 0.001 to 10"),
    (["--format", "pianoroll", "--step", "nan"], "--step must be above 0"),
    (["--format", "pianoroll", "--per-beat", "1000000"], "--per-beat must be from 1 to 960"),
    (["--format", "pianoroll", "--window", "inf"], "--window must be at most 3600 seconds"),
    (["--format", "pianoroll", "--window", "nan"], "--window must be at most 3600"),
    (["--format", "pianoroll", "--window", "1e300"], "--window must be at most 3600"),
    (["--format", "pianoroll", "--window", "4", "--hop", "inf"], "--hop must be at most 3600"),
    (["--format", "pianoroll", "--window", "4", "--hop", "nan"], "--hop must be at most 3600"),
    (["--format", "events", "--max-shift", "inf"], "--max-shift must be at most 10 seconds"),
    (["--format", "events", "--max-shift", "1e300"], "--max-shift must be at most 10 seconds"),
])
def test_bad_options_are_clear_errors_with_exit_2(demo_out, capsys, args, message):
    assert main(["export", str(demo_out), *args]) == 2
    assert message in capsys.readouterr().err


@pytest.mark.parametrize("fmt, flag, value", [
    ("events", "--per-beat", "4"), ("events", "--pitch-low", "0"), ("events", "--pitch-high", "127"),
    ("events", "--window", "4"), ("events", "--hop", "2"), ("events", "--previews", "0"),
    ("events", "--sustain", None),
    ("pianoroll", "--max-shift", "1"), ("pianoroll", "--velocity-bins", "16"),
    ("pianoroll", "--velocity-bins", "32"),
])
def test_an_option_of_the_other_format_exits_2_whatever_its_value(tmp_path, capsys, fmt, flag, value):
    """README, Training arrays: an option of the other format exits 2 and says why; in both
    directions, and also when the value given is the default (before, pianoroll took
    --velocity-bins and --max-shift silently, and events took --pitch-low 0 or --previews 0).
    The options are checked before the folder is read, so no run is needed."""
    other = "pianoroll" if fmt == "events" else "events"
    assert main(["export", str(tmp_path / "nowhere"), "--format", fmt, flag, *([value] if value else [])]) == 2
    assert f"{flag} applies to --format {other} only" in capsys.readouterr().err


def test_a_folder_without_a_finished_run_says_so(tmp_path, capsys):
    (tmp_path / "half").mkdir()
    (tmp_path / "half" / "state.sqlite").write_bytes(b"")
    assert main(["export", str(tmp_path / "half"), "--format", "pianoroll"]) == 2
    err = capsys.readouterr().err
    assert "not the output folder of a finished run" in err and "summary.json" in err
    assert main(["export", str(tmp_path / "nowhere"), "--format", "events"]) == 2
    assert "no such output folder" in capsys.readouterr().err


# shards, reruns, augmentation, loader -------------------------------------------------------
def test_shards_are_bounded_and_the_loader_reads_them_in_index_order(demo_out, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(demo_out, out, ignore=shutil.ignore_patterns("export"))
    r = export_output(out, ExportOptions("pianoroll", shard_mb=0.5))
    ex = open_export(out, "pianoroll")
    by_file: dict[str, int] = {}
    for e in ex.entries:
        by_file[e["file"]] = by_file.get(e["file"], 0) + int(np.prod(e["shape"]))
    assert r.shards_written == len(by_file) > 3
    for shard, nbytes in by_file.items():  # bounded unless one piece alone is bigger
        members = [e for e in ex.entries if e["file"] == shard]
        assert nbytes <= 0.5 * (1 << 20) or len(members) == 1
    keys = [k for k, _ in ex.iter_part("train")]
    assert keys == [e["key"] for e in ex.entries if e["part"] == "train"] and len(keys) == 44
    assert ex.parts == ["train", "valid", "test"]


def _exported_demo(tmp_path: Path, opts: ExportOptions):
    """The demo corpus copied under ``tmp_path``, run and exported with ``opts``: (corpus, the
    output folder, opts, the export's report, the export's folder)."""
    corpus = tmp_path / "corpus"
    shutil.copytree(DEMO, corpus)
    out = tmp_path / "out"
    _run(out, corpus)
    return corpus, out, opts, export_output(out, opts), out / "export" / opts.format


def test_an_export_made_before_the_last_run_is_refused_until_exported_again(tmp_path):
    """Found by an audit: after a run that removed a kept file (or moved a piece between
    parts), the loader served the old export as it was: the removed file's array, a moved
    piece in its old part. The loader now holds export.json's recorded state of the output
    folder against the folder's (``freshness``); the run names the export it left behind."""
    corpus, out, opts, _, folder = _exported_demo(tmp_path, ExportOptions("events"))
    ex = open_export(out, "events")
    assert len(ex) == sum(len(p.read_text().split()) for p in (out / "splits").glob("*.txt"))
    # a run with nothing changed leaves the export current, as does one that only drops a new
    # file (the split lists and the normalized files unchanged; a second audit found it refused)
    cfg = load_config(ROOT / "configs" / "default.yaml", input=str(corpus), output=str(out), workers=1)
    Runner(cfg, quiet=True).run()
    assert len(open_export(out, "events")) == len(ex)
    (corpus / "not a song.mid").write_bytes(b"<html>a page saved as .mid</html>")
    report = Runner(cfg, quiet=True).run()
    assert len(open_export(out, "events")) == len(ex) and not any("export" in w for w in report.warnings)
    rows = [json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines()]
    gone = next(r for r in rows if r["status"] == "kept" and r["group_size"] == 1)
    (corpus / gone["source"]).unlink()
    report = Runner(cfg, quiet=True).run()
    assert any(str(folder) in w and "midisift export" in w for w in report.warnings)
    with pytest.raises(MidisiftError, match=r"made before the output folder's last run.*midisift export"):
        open_export(out, "events")
    assert gone["id"] in {key for key, _ in open_export(out, "events", stale_ok=True).iter_part()}
    export_output(out, opts)
    assert gone["id"] not in {key for key, _ in open_export(out, "events").iter_part()}
    # an export folder copied away from its output folder has nothing to be held against
    shutil.copytree(folder, tmp_path / "copied")
    assert len(open_export(tmp_path / "copied")) == len(ex) - 1
    # an export of a midisift that did not record the state is refused, with the reason
    meta = json.loads((folder / "export.json").read_text())
    del meta["output_state"]
    (folder / "export.json").write_text(json.dumps(meta))
    with pytest.raises(MidisiftError, match="did not record the run it was made from"):
        open_export(out, "events")


def test_rerun_writes_only_what_changed(tmp_path):
    corpus, out, opts, first, folder = _exported_demo(tmp_path, ExportOptions("events", shard_mb=0.02))
    shards = {p: p.stat().st_mtime_ns for p in folder.glob("*/*.npz")}
    assert first.computed == first.pieces and len(shards) > 3

    files = {p: p.stat().st_mtime_ns for p in folder.rglob("*") if p.is_file()}
    again = export_output(out, opts)  # nothing changed: nothing written at all
    assert (again.computed, again.shards_written, again.shards_removed) == (0, 0, 0)
    assert {p: p.stat().st_mtime_ns for p in folder.rglob("*") if p.is_file()} == files

    (corpus / "new").mkdir()
    (corpus / "new" / "fresh piece.mid").write_bytes(random_midi(11, n_notes=300, n_tracks=2))
    _run(out, corpus)
    third = export_output(out, opts)
    assert third.computed == 1 and third.shards_written == 1 and third.shards_removed == 0
    assert all(p.stat().st_mtime_ns == t for p, t in shards.items())
    ex = open_export(folder)
    assert len(ex) == first.pieces + 1 and any(e["source"] == "new/fresh piece.mid" for e in ex.entries)

    # a kept file removed: its shard is rewritten without it, the others stay untouched
    gone = next(e for e in ex.entries if e["file"] == ex.entries[0]["file"])
    (corpus / gone["source"]).unlink()
    _run(out, corpus)
    fourth = export_output(out, opts)
    assert fourth.shards_removed == 1 and fourth.shards_written == 1
    assert not (folder / gone["file"]).exists()
    assert all(p.stat().st_mtime_ns == t for p, t in shards.items() if p.exists())
    assert gone["key"] not in {e["key"] for e in open_export(folder).entries}


def test_augmentation_copies_are_exported_in_the_part_of_their_file(tmp_path):
    config = tmp_path / "aug.yaml"
    config.write_text((ROOT / "configs" / "default.yaml").read_text().replace(
        "transpose:  {major_to: C, minor_to: A}", "transpose:  {major_to: C, minor_to: A, augment: [-2, 3]}"))
    assert "augment" in config.read_text()
    out = tmp_path / "aug"
    _run(out, config=config)
    export_output(out, ExportOptions("pianoroll"))
    ex = open_export(out, "pianoroll")
    assert {e["midi"]: e["part"] for e in ex.entries} == _kept_outputs(out)
    copies = [e for e in ex.entries if "." in e["key"]]
    assert copies and len(copies) == 2 * len([e for e in ex.entries if "." not in e["key"]])
    part_of = {e["key"]: e["part"] for e in ex.entries}
    for e in copies:
        assert e["part"] == part_of[e["id"]]
        main_roll, copy_roll = ex.load(e["id"]), ex.load(e["key"])
        shift = int(e["key"].split(".t")[1])
        # the copy is the piece moved by its semitones (up to notes pushed off the range)
        used = np.flatnonzero(main_roll.any(axis=0))
        assert np.array_equal(np.flatnonzero(copy_roll.any(axis=0)), used + shift)


# previews ----------------------------------------------------------------------------------
def test_previews_are_valid_png_of_the_first_pieces(roll_export):
    ex = open_export(roll_export)
    pngs = sorted((roll_export / "previews").glob("*.png"))
    assert [p.stem for p in pngs] == sorted(e["key"] for e in ex.entries[:3])
    Image = pytest.importorskip("PIL.Image")  # reference reader: Pillow
    for p in pngs:
        with Image.open(p) as im:
            im.load()
            assert im.mode == "L" and im.size[0] == min(1200, ex.load(p.stem).shape[0])


def test_png_writer_round_trips_through_pillow():
    Image = pytest.importorskip("PIL.Image")  # reference reader: Pillow
    gray = (np.arange(7 * 13) * 3 % 256).astype(np.uint8).reshape(7, 13)
    with Image.open(io.BytesIO(png_bytes(gray))) as im:
        assert im.size == (13, 7) and np.array_equal(np.asarray(im), gray)
    img = roll_image(np.array([[0, 100], [0, 0]], dtype=np.uint8), row_px=1)
    assert img.shape[1] == 2 and (img < 255).sum() == 1


# an export never damages the one that is there (audit s17) ------------------------------------
def _arrays(folder: Path) -> dict[str, np.ndarray]:
    return dict(open_export(folder).iter_part())


def _copy_run(demo_out: Path, tmp_path: Path) -> Path:
    out = tmp_path / "out"
    shutil.copytree(demo_out, out, ignore=shutil.ignore_patterns("export"))
    return out


class _Stopped(BaseException):
    """Stands for the kill of an export process (nothing after it runs, as with SIGKILL)."""


def test_an_export_stopped_before_its_index_leaves_the_previous_export_intact(demo_out, tmp_path, monkeypatch):
    # before: an export with other options numbered its shards from 00000 again and wrote over
    # the previous export's shards; stopped before its index, the old index served its arrays
    # (wrong shapes, KeyErrors) and a rerun of the old options "reused" them
    from pipeline.export import build
    out = _copy_run(demo_out, tmp_path)
    folder = out / "export" / "pianoroll"
    export_output(out, ExportOptions("pianoroll", shard_mb=0.05))
    before = _arrays(folder)
    index = (folder / "index.jsonl").read_bytes()
    real, saved = build._save_shard, []

    def save_then_stop(path: Path, arrays: dict) -> tuple[int, str]:
        signature = real(path, arrays)
        saved.append(path)
        if len(saved) == 2:
            raise _Stopped
        return signature
    monkeypatch.setattr(build, "_save_shard", save_then_stop)
    with pytest.raises(_Stopped):
        export_output(out, ExportOptions("pianoroll", step=0.1, shard_mb=0.05))
    monkeypatch.undo()
    assert len(saved) == 2 and all(p.is_file() for p in saved)
    assert (folder / "index.jsonl").read_bytes() == index
    after = _arrays(folder)  # the previous export, untouched
    assert after.keys() == before.keys() and all(np.array_equal(after[k], before[k]) for k in before)
    again = export_output(out, ExportOptions("pianoroll", shard_mb=0.05))
    assert again.computed == 0 and again.shards_removed == 2  # the stopped export's shards
    assert not any(p.exists() for p in saved)
    after = _arrays(folder)
    assert all(np.array_equal(after[k], before[k]) for k in before)
    # the other options' completed export names its shards apart, then removes the old ones
    other = export_output(out, ExportOptions("pianoroll", step=0.1, shard_mb=0.05))
    names = {e["file"] for e in open_export(folder).entries}
    assert other.shards_removed == again.shards_kept and {p.name for p in folder.glob("*/*.npz")} == {
        n.split("/")[1] for n in names}


def test_a_shard_that_is_not_the_one_the_index_describes_is_refused_and_recomputed(demo_out, tmp_path):
    # before: reuse checked only that the shard file existed; the loader served what it held
    out = _copy_run(demo_out, tmp_path)
    folder = out / "export" / "pianoroll"
    export_output(out, ExportOptions("pianoroll", step=0.1, shard_mb=0.05))
    other = {p.name: p.read_bytes() for p in folder.glob("train/*.npz")}
    export_output(out, ExportOptions("pianoroll", shard_mb=0.05))
    before = _arrays(folder)
    entries = open_export(folder).entries
    first = entries[0]
    # the same members at step 0.1 (the arrays of other options) in the shard's place
    shard = folder / first["file"]
    with np.load(shard) as z:
        members = list(z.files)
    with np.load(io.BytesIO(next(iter(other.values())))) as z:
        shrunk = {k: z[k] for k in z.files}
    fake = {k: shrunk.get(k, np.zeros((3, 128), np.uint8)) for k in members}
    np.savez(shard, **fake)
    with pytest.raises(MidisiftError, match="index.jsonl says") as err:
        open_export(folder).load(first["key"])
    assert str(shard) in str(err.value) and "rerun `midisift export`" in str(err.value)
    r = export_output(out, ExportOptions("pianoroll", shard_mb=0.05))
    assert r.computed == len(members) and r.shards_written == 1 and r.shards_removed == 1
    after = _arrays(folder)
    assert all(np.array_equal(after[k], before[k]) for k in before)
    # a deleted shard: a clear error naming it (before: a bare FileNotFoundError)
    gone = folder / open_export(folder).entries[-1]["file"]
    gone.unlink()
    with pytest.raises(MidisiftError, match="a shard index.jsonl names is missing") as err:
        list(open_export(folder).iter_part())
    assert str(gone) in str(err.value)


def test_an_export_of_the_older_layout_is_refused_by_the_loader_and_rewritten(demo_out, tmp_path):
    # the layout before audit s17: shards <part>-00000.npz, no fingerprint nor shard sha256 in
    # the index lines, no "layout" in export.json
    out = _copy_run(demo_out, tmp_path)
    folder = out / "export" / "events"
    export_output(out, ExportOptions("events"))
    before = _arrays(folder)
    lines = []
    for n, e in enumerate(open_export(folder).entries):
        old = f"{e['part']}/{e['part']}-00000.npz"
        if (folder / e["file"]).exists():
            (folder / e["file"]).rename(folder / old)
        for name in ("fingerprint", "shard_bytes", "shard_sha256", "no_pitched_note"):
            e.pop(name)
        lines.append(json.dumps({**e, "file": old}) + "\n")
    (folder / "index.jsonl").write_text("".join(lines))
    meta = json.loads((folder / "export.json").read_text())
    del meta["layout"]
    (folder / "export.json").write_text(json.dumps(meta))
    with pytest.raises(UsageError, match="older midisift"):
        open_export(folder)
    r = export_output(out, ExportOptions("events"))
    assert r.computed == r.pieces and r.shards_removed == 3
    assert not any(p.name.endswith("-00000.npz") and p.name.count("-") == 1 for p in folder.glob("*/*.npz"))
    after = _arrays(folder)
    assert after.keys() == before.keys() and all(np.array_equal(after[k], before[k]) for k in before)


def test_index_and_export_json_of_two_exports_are_an_error_not_a_misreading(demo_out, tmp_path):
    # an export stopped between replacing index.jsonl and export.json
    out = _copy_run(demo_out, tmp_path)
    folder = out / "export" / "events"
    export_output(out, ExportOptions("events"))
    stale = (folder / "export.json").read_text()
    export_output(out, ExportOptions("events", step=0.02))
    (folder / "export.json").write_text(stale)
    with pytest.raises(MidisiftError, match="of different exports"):
        open_export(folder)
    (folder / "export.json").unlink()  # a first export stopped right after its index
    with pytest.raises(MidisiftError, match="export.json is missing beside index.jsonl"):
        open_export(folder)


# configured parts, formats, drum keys ------------------------------------------------------
def test_empty_configured_parts_are_listed_and_give_nothing(tmp_path):
    # before: export.json listed only parts with pieces; iter_part("valid") raised
    corpus = tmp_path / "in"
    corpus.mkdir()
    for seed in (1, 2):
        (corpus / f"piece{seed}.mid").write_bytes(random_midi(seed, n_notes=60, n_tracks=2))
    config = tmp_path / "two.yaml"
    config.write_text("input: in\noutput: out\nworkers: 1\nstages:\n  - validate: {}\n"
                      "  - split: {ratios: {train: 0.8, valid: 0.1, test: 0.1}}\n")
    out = tmp_path / "out"
    _run(out, corpus, config)
    assert (out / "splits" / "valid.txt").read_text() == "" == (out / "splits" / "test.txt").read_text()
    export_output(out, ExportOptions("pianoroll"))
    meta = json.loads((out / "export" / "pianoroll" / "export.json").read_text())
    assert meta["parts"] == {"train": 2, "valid": 0, "test": 0}
    ex = open_export(out, "pianoroll")
    assert ex.parts == ["train", "valid", "test"]
    assert list(ex.iter_part("valid")) == [] == list(ex.iter_part("test"))
    assert len(list(ex.iter_part("train"))) == 2
    with pytest.raises(UsageError, match="no part 'nope'"):
        list(ex.iter_part("nope"))


def test_open_export_refuses_another_format_and_load_gives_drum_arrays(demo_out, tmp_path):
    out = _copy_run(demo_out, tmp_path)
    export_output(out, ExportOptions("events", drums="apart"))
    events_folder = out / "export" / "events"
    with pytest.raises(UsageError, match="of format 'events', not 'pianoroll'"):
        open_export(events_folder, "pianoroll")
    ex = open_export(out, "events")
    drums = dict(ex.iter_part(drums=True))
    e = next(e for e in ex.entries if drums[e["key"]].size)
    assert np.array_equal(ex.load(f"{e['key']}.drums"), drums[e["key"]])
    assert list(ex.load(e["key"]).shape) == e["shape"]
    with pytest.raises(KeyError):
        ex.load("0123456789abcdef.drums")
    export_output(out, ExportOptions("events"))
    with pytest.raises(UsageError, match="no drum arrays"):
        open_export(out, "events").load(f"{e['key']}.drums")


# time options are whole steps --------------------------------------------------------------
@pytest.mark.parametrize("args, message", [
    # before: --step 6 --max-shift 10 made 12 s shifts; windows and hops were rounded to frames
    (["--format", "events", "--step", "6", "--max-shift", "10"],
     "--max-shift 10 s is not a whole multiple of the step (--step 6 s); the nearest valid value is 6 s"),
    (["--format", "events", "--step", "0.025", "--max-shift", "0.04"],
     "--max-shift 0.04 s is not a whole multiple of the step (--step 0.025 s); the nearest valid values "
     "are 0.025 and 0.05 s"),
    (["--format", "events", "--step", "0.03", "--max-shift", "0.1"], "the nearest valid values are 0.09 and 0.12 s"),
    (["--format", "pianoroll", "--window", "1.03", "--hop", "0.1"],
     "--window 1.03 seconds is not a whole multiple of the frame (--step 0.05 s); the nearest valid values "
     "are 1 and 1.05 seconds"),
    (["--format", "pianoroll", "--window", "1", "--hop", "0.125"], "--hop 0.125 seconds is not a whole multiple"),
    (["--format", "pianoroll", "--per-beat", "4", "--window", "1.1"],
     "--window 1.1 beats is not a whole multiple of the frame (--per-beat 4: 0.25 beats); the nearest valid "
     "values are 1 and 1.25 beats"),
])
def test_time_options_that_are_not_whole_steps_exit_2(tmp_path, capsys, args, message):
    assert main(["export", str(tmp_path / "nowhere"), *args]) == 2
    assert message in capsys.readouterr().err


def test_whole_step_time_options_are_accepted_despite_float_error_and_recorded_in_frames():
    opts = ExportOptions("pianoroll", step=0.1, window=0.3, hop=0.7).checked()  # 0.3 / 0.1 = 2.9999...
    assert (opts.recorded()["window_frames"], opts.recorded()["hop_frames"]) == (3, 7)
    opts = ExportOptions("events", step=0.03, max_shift=0.09).checked()
    assert opts.max_shift_steps == 3
    assert ExportOptions("events", step=0.001, max_shift=10).checked().max_shift_steps == 10_000
    assert ExportOptions("pianoroll", per_beat=3, window=1 / 3 * 5).checked().recorded()["window_frames"] == 5


# pieces with no pitched note, error texts ----------------------------------------------------
def _drums_only_midi() -> bytes:
    import mido  # reference writer: mido
    mid = mido.MidiFile(type=1, ticks_per_beat=480)
    tr = mido.MidiTrack()
    for i in range(64):
        tr.append(mido.Message("note_on", channel=9, note=36 + i % 5, velocity=100, time=0 if i == 0 else 120))
        tr.append(mido.Message("note_off", channel=9, note=36 + i % 5, velocity=0, time=120))
    mid.tracks.append(tr)
    return smf_bytes(mid)


def test_pieces_with_no_pitched_note_are_counted(tmp_path, capsys):
    # before: a drum-only file exported as an empty array without a word
    corpus = tmp_path / "in"
    corpus.mkdir()
    (corpus / "drums.mid").write_bytes(_drums_only_midi())
    (corpus / "tune.mid").write_bytes(random_midi(3, n_notes=80, n_tracks=2))
    config = tmp_path / "plain.yaml"
    config.write_text("input: in\noutput: out\nworkers: 1\nstages:\n  - validate: {}\n")
    out = tmp_path / "out"
    _run(out, corpus, config)
    for fmt, empty_shape in (("pianoroll", [0, 128]), ("events", [0])):
        assert main(["export", str(out), "--format", fmt]) == 0
        assert re.search(r"pieces with no pitched note\s+1\n", capsys.readouterr().out)
        folder = out / "export" / fmt
        assert json.loads((folder / "export.json").read_text())["no_pitched_note"] == 1
        shapes = sorted(e["shape"] for e in open_export(folder).entries)
        assert shapes[0] == empty_shape and shapes[1] != empty_shape
    assert main(["export", str(out), "--format", "pianoroll", "--window", "2", "--quiet"]) == 0
    ex = open_export(out, "pianoroll")
    assert ex.meta["no_pitched_note"] == 1
    assert sorted(e["shape"] for e in ex.entries)[0] == [1, 40, 128]  # one silent window


def test_a_file_as_output_and_a_damaged_normalized_file_say_what_they_are(demo_out, tmp_path, capsys):
    (tmp_path / "afile").write_text("x")
    assert main(["export", str(tmp_path / "afile"), "--format", "events"]) == 2
    assert "this is a file, not an output folder" in capsys.readouterr().err
    out = _copy_run(demo_out, tmp_path)
    victim = out / next(iter(_kept_outputs(out)))
    victim.write_bytes(victim.read_bytes()[:40])
    assert main(["export", str(out), "--format", "events"]) == 1
    err = capsys.readouterr().err
    assert str(victim) in err and "cannot be decoded" in err and "rerun `midisift run`" in err
    assert "cut off during download" not in err


# the pedal across a program change, the roll's length ---------------------------------------
def _program_change_under_pedal() -> bytes:
    """120 bpm, 480 ticks a beat (a frame of 0.05 s is 48 ticks), all on track 1, channel 0:
    note 55 (frame 0, ended before the pedal); pedal down at frame 1; notes 60 (frames 0-1) and
    62 (frame 3) on program 0, the program changed to 40 at frame 5, note 64 (frame 6); pedal up
    at frame 10; then a controller at frame 30, after the last note. (pretty_midi gives a
    controller to the instrument of the channel's current program once that instrument has a
    finished note: note 55 makes the pedal-down program 0's.)"""
    import mido  # reference writer: mido
    mid = mido.MidiFile(type=1, ticks_per_beat=480)
    mid.tracks.append(mido.MidiTrack([mido.MetaMessage("set_tempo", tempo=500_000, time=0)]))
    mid.tracks.append(mido.MidiTrack([
        mido.Message("program_change", channel=0, program=0, time=0),
        mido.Message("note_on", channel=0, note=55, velocity=80, time=0),
        mido.Message("note_on", channel=0, note=60, velocity=80, time=0),
        mido.Message("note_off", channel=0, note=55, time=48),
        mido.Message("control_change", channel=0, control=64, value=127, time=0),
        mido.Message("note_off", channel=0, note=60, time=48),
        mido.Message("note_on", channel=0, note=62, velocity=80, time=48),
        mido.Message("note_off", channel=0, note=62, time=48),
        mido.Message("program_change", channel=0, program=40, time=48),
        mido.Message("note_on", channel=0, note=64, velocity=80, time=48),
        mido.Message("note_off", channel=0, note=64, time=48),
        mido.Message("control_change", channel=0, control=64, value=0, time=144),
        mido.Message("control_change", channel=0, control=7, value=90, time=960)]))
    return smf_bytes(mid)


def test_the_pedal_is_the_tracks_and_channels_whatever_the_program_and_the_roll_ends_at_the_last_note():
    # README, Training arrays: kept behaviour, documented where pretty_midi differs (audit s17)
    data = _program_change_under_pedal()
    piece = decode(data)
    held, _ = pianoroll(piece, step=0.05, sustain=True)
    plain, _ = pianoroll(piece, step=0.05)
    expected_held = {55: (0, 1), 60: (0, 10), 62: (3, 10), 64: (6, 10)}
    expected_plain = {55: (0, 1), 60: (0, 2), 62: (3, 4), 64: (6, 7)}
    for p, (a, b) in expected_held.items():
        assert np.flatnonzero(held[:, p]).tolist() == list(range(a, b)), p
    for p, (a, b) in expected_plain.items():
        assert np.flatnonzero(plain[:, p]).tolist() == list(range(a, b)), p
    assert held.shape == (10, 128) and plain.shape == (7, 128)  # ends with the last note (as held)
    pretty_midi = pytest.importorskip("pretty_midi")  # reference: its pedal is an instrument's
    ref = pretty_midi.PrettyMIDI(io.BytesIO(data)).get_piano_roll(fs=20).T
    for p, (a, b) in expected_plain.items():  # its pedal holds nothing here
        assert np.flatnonzero(ref[:, p]).tolist() == list(range(a, b)), p
    assert len(ref) == 30  # its roll reaches the controller after the last note (1.5 s)


# a shard that lost pieces: the survivors' arrays carried from it, not decoded again ------------
def _counting_arrays_of(monkeypatch) -> list[str]:
    """Count the calls of the array function (each one decodes a normalized file)."""
    from pipeline.export import build
    calls: list[str] = []
    real = build.arrays_of

    def counted(path: Path, opts: ExportOptions):
        calls.append(Path(path).stem)
        return real(path, opts)
    monkeypatch.setattr(build, "arrays_of", counted)
    return calls


def _remove_spread(corpus: Path, out: Path, folder: Path) -> dict[str, list[dict]]:
    """Remove one kept source from every other shard of the export in ``folder`` (its first
    piece's), rerun; the index lines of the shards that lost a piece, by shard."""
    by_shard: dict[str, list[dict]] = {}
    for e in open_export(folder).entries:
        by_shard.setdefault(e["file"], []).append(e)
    hit = {shard: lines for n, (shard, lines) in enumerate(sorted(by_shard.items())) if n % 2 == 0}
    for lines in hit.values():
        (corpus / lines[0]["source"]).unlink()
    _run(out, corpus)
    return hit


def _new_or_changed(old: dict[str, dict], entries: list[dict]) -> set[str]:
    """Keys of the index lines that are new, or whose part, source or normalized bytes changed
    (a byte-identical copy's first path removed: its source is the next one's)."""
    fields = ("part", "source", "digest")
    return {e["key"] for e in entries
            if e["key"] not in old or any(old[e["key"]][f] != e[f] for f in fields)}


def _fresh_arrays(out: Path, tmp_path: Path, opts: ExportOptions) -> dict[str, np.ndarray]:
    fresh = tmp_path / "fresh"
    shutil.copytree(out, fresh, ignore=shutil.ignore_patterns("export"))
    export_output(fresh, opts)
    return _arrays(fresh / "export" / opts.format)


@pytest.mark.parametrize("fmt", ["pianoroll", "events"])
def test_a_rerun_after_removals_reads_the_survivors_arrays_from_their_old_shards(tmp_path, monkeypatch, fmt):
    # before: a shard that lost one piece was rebuilt by decoding every other piece of it again
    # (an audit: 300 of 26,505 files removed, all 17,491 pieces recomputed)
    opts = ExportOptions(fmt, shard_mb=0.5 if fmt == "pianoroll" else 0.02, drums="apart")
    corpus, out, opts, first, folder = _exported_demo(tmp_path, opts)
    old = {e["key"]: e for e in open_export(folder).entries}
    assert first.shards_written >= 4
    hit = _remove_spread(corpus, out, folder)
    assert len(hit) >= 2
    before_rerun = tmp_path / "before_rerun"  # the same folder, for a rerun that carries nothing
    shutil.copytree(out, before_rerun)

    calls = _counting_arrays_of(monkeypatch)
    r = export_output(out, opts)
    entries = open_export(folder).entries
    new_keys = _new_or_changed(old, entries)  # e.g. a copy kept now that its kept file went
    survivors = [e["key"] for lines in hit.values() for e in lines[1:] if e["key"] in {x["key"] for x in entries}
                 and e["key"] not in new_keys]
    assert sorted(calls) == sorted(new_keys)  # no survivor decoded again
    assert (r.computed, r.carried) == (len(new_keys), len(survivors)) and r.carried > 0
    assert r.reused == r.pieces - r.computed - r.carried and r.shards_kept == first.shards_written - len(hit)
    assert r.shards_removed == len(hit)
    written = json.loads((folder / "export.json").read_text())["written"]
    assert written == {"computed": r.computed, "carried": r.carried, "reused": r.reused,
                       "shards_written": r.shards_written, "shards_kept": r.shards_kept}
    assert re.search(rf"computed / carried / reused\s+{r.computed} / {r.carried} / {r.reused}\n", r.table())

    # array for array what a fresh export writes (drum arrays too)
    after, fresh = _arrays(folder), _fresh_arrays(out, tmp_path, opts)
    assert after.keys() == fresh.keys() and all(np.array_equal(after[k], fresh[k]) for k in fresh)
    ex, ref = open_export(folder), open_export(tmp_path / "fresh" / "export" / fmt)
    for e in ex.entries:
        assert np.array_equal(ex.load(e["drums_key"]), ref.load(e["drums_key"]))
    assert [{k: v for k, v in e.items() if k not in ("file", "shard_bytes", "shard_sha256")} for e in ex.entries] == [
        {k: v for k, v in e.items() if k not in ("file", "shard_bytes", "shard_sha256")} for e in ref.entries]

    # the new shards hold the bytes the same rerun writes when it decodes every piece again
    from pipeline.export import build
    monkeypatch.setattr(build._Carried, "take", lambda self, key: None)
    again = export_output(before_rerun, opts)
    assert again.computed == r.computed + r.carried and again.carried == 0
    new_shards = {e["file"] for e in entries} - {e["file"] for e in old.values()}
    assert new_shards and all((folder / s).read_bytes() == (before_rerun / "export" / fmt / s).read_bytes()
                              for s in new_shards)

    # nothing changed since: nothing written, export.json keeps the counts of the export that wrote it
    files = {p: p.stat().st_mtime_ns for p in folder.rglob("*") if p.is_file()}
    quiet = export_output(out, opts)
    assert (quiet.computed, quiet.carried, quiet.shards_written) == (0, 0, 0)
    assert {p: p.stat().st_mtime_ns for p in folder.rglob("*") if p.is_file()} == files


def test_a_damaged_old_shard_is_not_read_from_its_pieces_are_computed(tmp_path, monkeypatch):
    corpus, out, opts, _, folder = _exported_demo(tmp_path, ExportOptions("pianoroll", shard_mb=0.5))
    old = {e["key"]: e for e in open_export(folder).entries}
    hit = _remove_spread(corpus, out, folder)
    damaged, intact = sorted(hit)[:2]
    # its bytes changed: a readable shard of the same members and shapes, every array silent
    with np.load(folder / damaged) as z:
        silent = {k: np.zeros_like(z[k]) for k in z.files}
    np.savez_compressed(folder / damaged, **silent)

    calls = _counting_arrays_of(monkeypatch)
    r = export_output(out, opts)
    listed = open_export(folder).entries
    entries = {e["key"] for e in listed}
    new_keys = _new_or_changed(old, listed)
    damaged_left = ({e["key"] for e in hit[damaged][1:]} & entries) - new_keys
    assert damaged_left and sorted(calls) == sorted(damaged_left | new_keys)
    assert r.computed == len(damaged_left | new_keys)
    assert r.carried == sum(len(({e["key"] for e in lines[1:]} & entries) - new_keys)
                            for s, lines in hit.items() if s != damaged)
    assert {e["key"] for e in hit[intact][1:]} & entries and not set(calls) & {e["key"] for e in hit[intact]}
    after, fresh = _arrays(folder), _fresh_arrays(out, tmp_path, opts)
    assert after.keys() == fresh.keys() and all(np.array_equal(after[k], fresh[k]) for k in fresh)
    assert all(after[k].any() for k in damaged_left)  # not the silent arrays of the damaged shard


def test_when_every_shard_lost_a_piece_the_rerun_writes_a_fresh_exports_shards(tmp_path, monkeypatch):
    # the layout depends on history (kept shards stay as they are, the other pieces are packed
    # into new shards after them); with no shard kept, it is a fresh export's, byte for byte
    corpus, out, opts, _, folder = _exported_demo(tmp_path, ExportOptions("events", shard_mb=0.02))
    by_shard: dict[str, list[dict]] = {}
    for e in open_export(folder).entries:
        by_shard.setdefault(e["file"], []).append(e)
    for lines in by_shard.values():
        (corpus / lines[-1]["source"]).unlink()
    _run(out, corpus)
    calls = _counting_arrays_of(monkeypatch)
    r = export_output(out, opts)
    assert r.shards_kept == 0 and r.carried > 0 and len(calls) == r.computed < r.carried
    fresh = tmp_path / "fresh"
    shutil.copytree(out, fresh, ignore=shutil.ignore_patterns("export"))
    export_output(fresh, opts)

    def shards(root: Path) -> list[bytes]:
        entries = open_export(root / "export" / "events").entries
        return [(root / "export" / "events" / f).read_bytes() for f in dict.fromkeys(e["file"] for e in entries)]
    assert shards(out) == shards(fresh)
