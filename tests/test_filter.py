"""Tests of the filter stage: each threshold on pieces with known duration and density.

Every expected measure is computed by hand from the tempo map (stated beside each piece):
at 480 ticks per beat, 500000 us/beat (120 BPM) makes one beat 0.5 s, so 240 ticks = 0.25 s.
"""
from __future__ import annotations

import pytest

from pipeline.stages.base import FileContext
from pipeline.stages.filter import GM_FAMILIES, REASONS, Filter, resolve_programs
from test_stats import make_piece

Q = 480            # ticks per beat
T120 = ((0, 500_000),)
T60 = ((0, 1_000_000),)
T240 = ((0, 250_000),)


def line(n: int, step: int, dur: int | None = None, pitches: int = 12, start: int = 0,
         channel: int = 0, program: int = 0, base: int = 60) -> list[tuple]:
    """``n`` notes, one every ``step`` ticks, each ``dur`` ticks long, cycling ``pitches``."""
    dur = step if dur is None else dur
    return [(start + i * step, start + i * step + dur, base + i % pitches, channel, program, 0)
            for i in range(n)]


def verdict(rows, tempos=T120, **opts):
    piece = make_piece(rows, tempos)
    return Filter(opts).process(piece, FileContext(piece))


def test_base_piece_is_kept_with_all_measures_and_thresholds():
    # 64 notes every 240 ticks = 0.25 s: ends at 64 * 0.25 = 16.0 s, 4 notes/s, 12 pitches.
    r = verdict(line(64, 240))
    assert r.kept and r.reason is None
    assert r.values["duration_s"] == pytest.approx(16.0)
    assert r.values["notes_per_s"] == pytest.approx(4.0)
    assert r.values["pitches"] == 12 and r.values["max_polyphony"] == 1
    for measure in ("duration_s", "notes", "notes_per_s", "pitches", "max_polyphony",
                    "mean_polyphony", "drum_fraction", "longest_silence_s", "tracks",
                    "instruments", "longest_note_s"):
        assert measure in r.values
    assert r.thresholds["duration_s"] == {"min": 8.0, "max": 1200.0}
    assert r.thresholds["notes_per_s"] == {"min": 0.5, "max": 60.0}
    assert r.thresholds["notes"] == {"min": 32}


def test_too_short_boundary_and_tempo_map():
    # 32 notes * 0.25 s = 8.0 s: exactly min_seconds, kept (the limit is inclusive).
    assert verdict(line(32, 240)).kept
    # Same ticks at 240 BPM (0.125 s per 240 ticks): 40 notes end at 5.0 s -> too_short;
    # at 120 BPM the same ticks end at 10.0 s and pass.
    r = verdict(line(40, 240), T240)
    assert (r.reason, r.values["duration_s"]) == ("too_short", pytest.approx(5.0))
    assert verdict(line(40, 240), T120).kept


def test_too_long():
    # 16.0 s against max_seconds 15.
    r = verdict(line(64, 240), max_seconds=15)
    assert r.reason == "too_long" and "16 s > max_seconds 15 s" in r.detail


def test_too_few_notes():
    # 31 notes every 0.5 s: 15.5 s long, 2 notes/s; only the note count fails.
    r = verdict(line(31, 480))
    assert r.reason == "too_few_notes" and r.detail.count("(") == 1
    assert verdict(line(32, 480)).kept


def test_too_sparse_and_boundary():
    # 40 notes every 1920 ticks at 120 BPM = 2.0 s: 80 s, 0.5 notes/s exactly -> kept.
    assert verdict(line(40, 1920)).kept
    # At 60 BPM the same ticks are 4.0 s apart: 160 s, 0.25 notes/s -> too_sparse.
    r = verdict(line(40, 1920), T60)
    assert r.reason == "too_sparse" and r.values["notes_per_s"] == pytest.approx(0.25)


def test_too_dense():
    # 1200 notes every 8 ticks = 1/120 s: 10.0 s, 120 notes/s > 60.
    r = verdict(line(1200, 8))
    assert r.reason == "too_dense" and r.values["notes_per_s"] == pytest.approx(120.0)
    # 1000 notes every 24 ticks = 0.025 s: 25 s, 40 notes/s -> kept.
    assert verdict(line(1000, 24)).kept


def test_too_few_pitches():
    r = verdict(line(64, 240, pitches=4))
    assert r.reason == "too_few_pitches" and r.values["pitches"] == 4
    assert verdict(line(64, 240, pitches=5)).kept


def chords(size: int, count: int = 10) -> list[tuple]:
    """``count`` chords of ``size`` pitches (30, 31, ...), one every 2 s (1920 ticks at 120
    BPM), each held 2 s: ``size`` notes sound at once."""
    return [(k * 1920, (k + 1) * 1920, 30 + j, 0, 0, 0) for k in range(count) for j in range(size)]


def test_too_polyphonic():
    # 10 chords of 49 notes over 20 s: 24.5 notes/s, polyphony 49 > 48.
    r = verdict(chords(49))
    assert r.reason == "too_polyphonic" and r.values["max_polyphony"] == 49
    assert verdict(chords(48)).kept


def test_drums_only_and_order():
    # 64 drum notes only: drum_fraction 1.0 and no pitches; drums_only comes first in the order,
    # too_few_pitches is listed in detail too.
    r = verdict(line(64, 240, channel=9))
    assert r.reason == "drums_only"
    assert "too_few_pitches" in r.detail and r.detail.startswith("2 rules failed")
    # 90 drum notes + 10 pitched = 0.9: at the limit, kept; 91 + 9 = 0.91 -> drums_only.
    kept = line(90, 240, channel=9) + line(10, 240, start=120, pitches=10)
    assert verdict(kept).kept
    dropped = line(91, 240, channel=9) + line(9, 240, start=120, pitches=9)
    assert verdict(dropped).reason == "drums_only"
    assert verdict(line(64, 240, channel=9), max_drum_fraction=None, min_pitches=None).kept


def test_long_silence_inner_and_leading():
    # 32 notes in 0-8 s, then the next 8 notes from 39 s (tick 37440): a 31 s silence.
    rows = line(32, 240) + line(8, 240, start=37440)
    r = verdict(rows)
    assert r.reason == "long_silence" and r.values["longest_silence_s"] == pytest.approx(31.0)
    # Leading silence: the first note at 31 s (tick 29760) also counts.
    r = verdict(line(64, 240, start=29760))
    assert r.reason == "long_silence" and r.values["longest_silence_s"] == pytest.approx(31.0)
    assert verdict(line(64, 240, start=28800)).kept   # 30.0 s exactly


def test_stuck_note():
    # One held note of 61 s (122 beats = 58560 ticks) over a 16 s line.
    r = verdict(line(64, 240) + [(0, 58560, 48, 1, 0, 1)])
    assert r.reason == "stuck_note" and r.values["longest_note_s"] == pytest.approx(61.0)
    assert verdict(line(64, 240) + [(0, 57600, 48, 1, 0, 1)]).kept   # 60.0 s exactly


def test_program_allow_and_deny():
    piano = line(64, 240, program=0)
    violin = line(64, 240, program=0) + line(8, 240, program=40, channel=1)
    # General MIDI Level 1 families (MMA GM1 sound set): 1-8 piano -> data bytes 0-7,
    # 41-48 strings -> 40-47 (violin is GM 41, data byte 40).
    assert GM_FAMILIES["piano"] == range(0, 8) and 40 in GM_FAMILIES["strings"]
    assert verdict(piano, programs_allow=["piano"]).kept
    r = verdict(violin, programs_allow=["piano"])
    assert r.reason == "program_excluded" and "program 40" in r.detail
    assert verdict(violin, programs_deny=["strings"]).reason == "program_excluded"
    assert verdict(piano, programs_deny=["strings", 41]).kept
    with_drums = piano + line(8, 240, channel=9)
    assert verdict(with_drums, programs_allow=["piano"]).reason == "program_excluded"
    assert verdict(with_drums, programs_allow=["piano", "drums"]).kept
    assert verdict(with_drums, programs_deny=["drums"]).reason == "program_excluded"


def test_several_failures_report_first_in_order_and_list_all():
    # 20 notes every 120 ticks: 2.5 s (too_short), 20 notes (too_few_notes), 4 pitches.
    r = verdict(line(20, 120, pitches=4))
    assert r.reason == "too_short"
    reasons = [code for code in REASONS if f"({code})" in r.detail]
    assert reasons == ["too_short", "too_few_notes", "too_few_pitches"]
    assert r.values["duration_s"] == pytest.approx(2.5)


def test_option_checks_and_program_names():
    opts = {o.name: o for o in Filter.options}
    assert opts["notes_per_s"].check([60, 0.5]) is not None
    assert opts["notes_per_s"].check([0.5, None]) is None
    assert opts["max_drum_fraction"].check(1.5) is not None
    assert opts["min_seconds"].check(-1) is not None
    assert "did you mean 'strings'" in opts["programs_allow"].check(["strngs"])
    assert opts["programs_deny"].check([128]) is not None
    assert resolve_programs(["Synth Lead", 3]) == frozenset(range(80, 88)) | {3}


@pytest.mark.parametrize("item", [1.5, None, [1]])
def test_a_program_that_is_neither_a_number_nor_a_name_states_the_rule(item):
    """A fraction or null in programs_allow got 'unknown instrument family 1.5; did you mean
    'bass'?' (an audit): a family name was suggested for what is not a name. GM programs are
    numbered 1-128, here 0-127 (General MIDI 1 specification, program change numbering)."""
    problem = {o.name: o for o in Filter.options}["programs_allow"].check([item])
    assert problem == (f"programs_allow: {item!r} is not a program: give a GM program number, a "
                       "whole number from 0 to 127, or a family name (piano, chromatic_percussion, "
                       "organ, guitar, bass, strings, ensemble, brass, reed, pipe, synth_lead, "
                       "synth_pad, synth_effects, ethnic, percussive, sound_effects, or 'drums')")


def test_a_value_just_under_a_limit_prints_apart_from_it():
    # 32 notes every 240 ticks at 499,999 us a beat: 16 beats * 0.499999 s = 7.999984 s, under
    # min_seconds 8 by 16 us. Three significant digits print both as "8", which reads as a
    # contradiction; the detail prints as many digits as tell them apart.
    r = verdict(line(32, 240), ((0, 499_999),))
    assert (r.reason, r.values["duration_s"]) == ("too_short", pytest.approx(7.999984))
    assert "duration_s 7.99998 s < min_seconds 8 s (too_short)" in r.detail
    # the short form stays where the numbers differ at three digits
    assert "duration_s 5 s < min_seconds 8 s" in verdict(line(40, 240), T240).detail


def test_explain_prints_a_value_apart_from_its_limits(tmp_path, capsys):
    """`midisift explain` on the file above: the why line (the stored detail) and the value
    line both tell 7.999984 s from the limit 8 s; the limits themselves stay short."""
    import mido  # writes the file; mido's own MIDI writer, not ours
    import yaml
    from pipeline.cli import main
    mid = mido.MidiFile(ticks_per_beat=Q)
    track = mido.MidiTrack([mido.MetaMessage("set_tempo", tempo=499_999, time=0)])
    for i in range(32):
        track.append(mido.Message("note_on", note=60 + i % 12, velocity=80, time=0))
        track.append(mido.Message("note_off", note=60 + i % 12, velocity=0, time=240))
    mid.tracks.append(track)
    (tmp_path / "in").mkdir()
    mid.save(str(tmp_path / "in" / "short.mid"))
    cfg = tmp_path / "c.yaml"
    cfg.write_text(yaml.safe_dump({"input": str(tmp_path / "in"), "output": str(tmp_path / "out"),
                                   "workers": 1, "stages": ["validate", "filter"]}))
    assert main(["run", str(cfg), "--quiet"]) == 0
    assert main(["explain", "short.mid", "--output", str(tmp_path / "out")]) == 0
    text = capsys.readouterr().out
    assert "why      duration_s 7.99998 s < min_seconds 8 s (too_short)" in text
    assert "duration_s           7.99998   (limit: >= 8, <= 1200)" in text
    assert "notes                32   (limit: >= 32)" in text
