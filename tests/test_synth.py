"""Tests of pipeline/tools/synth.py: the generated files read back with mido (the reference decoder)
and agree with truth.json; planted defects fail where the SMF spec says they must; the demo
corpus is reproducible byte for byte.

Reference for the file format: the Standard MIDI File 1.0 specification (MMA), as implemented
by mido 1.3 (``mido.MidiFile``). Where mido is lenient it is noted beside the check.
"""
from __future__ import annotations

import hashlib
import io
import json
from collections import Counter, defaultdict
from pathlib import Path

import mido
import numpy as np
import pytest

from pipeline.tools import synth

REPO = Path(__file__).resolve().parents[1]
SAMPLE = REPO / "sample_corpus"
REASONS = {"kept", "not_midi", "truncated", "bad_chunk", "bad_event", "unsupported_format",
           "no_notes", "exact_duplicate", "near_duplicate", "too_short", "too_long",
           "too_few_notes", "drums_only"}


# ----------------------------------------------------------------------------- helpers
def unwrap(data: bytes) -> bytes:
    """SMF bytes of a RIFF RMID file ('data' chunk at offset 12, per the RMID layout)."""
    assert data[8:12] == b"RMID" and data[12:16] == b"data"
    return data[20:20 + int.from_bytes(data[16:20], "little")]


def load(path: Path) -> mido.MidiFile:
    data = path.read_bytes()
    if data[:4] == b"RIFF":
        data = unwrap(data)
    return mido.MidiFile(file=io.BytesIO(data))


def notes_of(mid: mido.MidiFile) -> list[tuple[int, int, int, int, int]]:
    """(start, end, pitch, velocity, channel) in ticks, note-ons paired first-in first-out
    per (channel, pitch); a note left hanging ends at its track's end (common practice)."""
    out = []
    for track in mid.tracks:
        t, pending = 0, defaultdict(list)
        for msg in track:
            t += msg.time
            if msg.type == "note_on" and msg.velocity > 0:
                pending[msg.channel, msg.note].append((t, msg.velocity))
            elif msg.type in ("note_on", "note_off") and pending[msg.channel, msg.note]:
                s, v = pending[msg.channel, msg.note].pop(0)
                out.append((s, t, msg.note, v, msg.channel))
        for (ch, p), rest in pending.items():
            out += [(s, t, p, v, ch) for s, v in rest]
    return sorted(out)


def end_seconds(mid: mido.MidiFile, notes) -> float:
    """Seconds at the last note end, through the file's tempo map (mido.tick2second)."""
    end = max(n[1] for n in notes)
    if mid.ticks_per_beat < 0:  # SMPTE division: -fps (signed high byte) x ticks per frame
        fps = -(mid.ticks_per_beat >> 8)  # arithmetic shift keeps the sign of the high byte
        return end / (fps * (mid.ticks_per_beat & 0xFF))
    tempos = sorted((t, m.tempo) for tr in mid.tracks for t, m in _abs(tr) if m.type == "set_tempo")
    tempos = [(0, 500000)] + tempos if not tempos or tempos[0][0] > 0 else tempos
    total, prev_t, prev_us = 0.0, 0, tempos[0][1]
    for t, us in tempos[1:]:
        if t >= end:
            break
        total += mido.tick2second(t - prev_t, mid.ticks_per_beat, prev_us)
        prev_t, prev_us = t, us
    return total + mido.tick2second(end - prev_t, mid.ticks_per_beat, prev_us)


def _abs(track):
    t = 0
    for msg in track:
        t += msg.time
        yield t, msg


def metas(mid: mido.MidiFile, kind: str) -> list:
    return [m for tr in mid.tracks for m in tr if m.type == kind]


def key_of_mido(name: str) -> str:
    """mido's key-signature text ('Eb', 'F#m') as our 'Eb major' / 'F# minor' with fixed
    spelling of synth.TONIC_NAMES."""
    minor = name.endswith("m")
    root = name[:-1] if minor else name
    pc = ("C D EF G A B".index(root[0]) + root[1:].count("#") - root[1:].count("b")) % 12
    return f"{synth.TONIC_NAMES[pc]} {'minor' if minor else 'major'}"


@pytest.fixture(scope="module")
def corpus(tmp_path_factory) -> tuple[Path, dict]:
    root = tmp_path_factory.mktemp("plain")
    return root, synth.generate(root, 160, seed=11)


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> tuple[Path, dict]:
    gen = json.loads((SAMPLE / "truth.json").read_text(encoding="utf-8"))["generator"]
    root = tmp_path_factory.mktemp("demo")
    truth = synth.generate(root, gen["count"], seed=gen["seed"], profile=gen["profile"],
                           naming=gen["naming"])
    return root, truth


# ----------------------------------------------------------------------------- determinism
def test_same_arguments_give_identical_bytes(tmp_path):
    a = synth.generate(tmp_path / "a", 50, seed=5)
    b = synth.generate(tmp_path / "b", 50, seed=5)
    assert a == b
    for rel in a["files"]:
        assert (tmp_path / "a" / rel).read_bytes() == (tmp_path / "b" / rel).read_bytes()
    c = synth.generate(tmp_path / "c", 50, seed=6)
    assert sorted(c["files"]) != sorted(a["files"]) or any(
        (tmp_path / "a" / r).read_bytes() != (tmp_path / "c" / r).read_bytes() for r in a["files"])


def test_count_and_truth_shape(corpus):
    root, truth = corpus
    files = sorted(p.relative_to(root).as_posix() for p in root.rglob("*") if p.is_file())
    assert files == sorted(list(truth["files"]) + ["truth.json"])
    assert truth["generator"] == {"count": 160, "seed": 11, "profile": "small",
                                  "naming": "plain", "version": 1}
    for rel, t in truth["files"].items():
        assert t["expect"] in REASONS, rel
        assert t["stage"] == (None if t["expect"] == "kept" else synth.STAGE_OF_REASON[t["expect"]])


# ----------------------------------------------------------------------------- read back with mido
@pytest.mark.parametrize("which", ["corpus", "demo"])
def test_valid_files_agree_with_truth(which, request):
    root, truth = request.getfixturevalue(which)
    checked = Counter()
    for rel, t in truth["files"].items():
        if t["stage"] == "validate":
            continue
        mid = load(root / rel)
        notes = notes_of(mid)
        assert len(notes) == t["notes"], rel
        sigs = metas(mid, "time_signature")
        if t["meter_declared"]:
            assert [f"{m.numerator}/{m.denominator}" for m in sigs] == [t["meter"]], rel
            # SMF spec: clocks per click = 24 per quarter; a dotted quarter (compound) is 36
            compound = synth.METERS[t["meter"]]["per_beat"] == 3
            assert sigs[0].clocks_per_click == (36 if compound else 96 // sigs[0].denominator)
        else:
            assert sigs == [], rel
        keys = [key_of_mido(m.key) for m in metas(mid, "key_signature")]
        assert keys == ([t["key_declared"]] if t["key_declared"] else []), rel
        if t["key_declared"] and t["key_declared"] != "C major":
            assert t["key_declared"] == f"{t['tonic']} {t['mode']}", rel
        if notes:
            assert end_seconds(mid, notes) == pytest.approx(t["duration_s"], abs=2e-3), rel
            tempo = metas(mid, "set_tempo")
            if tempo:
                assert mido.tempo2bpm(tempo[0].tempo) == pytest.approx(t["bpm"], abs=1e-3)
        checked[t["quirk"] or t["variant"]] += 1
    assert checked["original"] > 10


def test_quirks_are_present_as_planted(demo):
    root, truth = demo
    by_quirk = {t["quirk"]: rel for rel, t in truth["files"].items() if t["quirk"]}
    assert set(by_quirk) == set(synth.QUIRKS)
    # mido cannot read an RMID file directly: it wants 'MThd' at byte 0 (it is not lenient here)
    with pytest.raises(OSError, match="MThd"):
        mido.MidiFile(str(root / by_quirk["rmid"]))
    assert by_quirk["rmid"].endswith(".rmi") and by_quirk["kar"].endswith(".kar")
    assert by_quirk["ext_upper"].endswith(".MID") and by_quirk["ext_midi"].endswith(".midi")
    kar = load(root / by_quirk["kar"])
    texts = [m.text for m in metas(kar, "text")]
    assert "@KMIDI KARAOKE FILE" in texts
    smpte = load(root / by_quirk["smpte"])
    # SMF spec: a negative division high byte is -frames per second (here -25), low byte
    # ticks per frame; mido keeps the raw signed 16-bit value
    assert smpte.ticks_per_beat < 0 and (smpte.ticks_per_beat & 0xFF) == 40
    eot = load(root / by_quirk["missing_eot"])
    assert eot.tracks[-1][-1].type != "end_of_track"  # mido is lenient: no end_of_track needed
    for rel, t in truth["files"].items():
        if t["quirk"] != "missing_eot" and t["stage"] != "validate":
            assert load(root / rel).tracks[-1][-1].type == "end_of_track", rel
    raw = (root / by_quirk["running_status"]).read_bytes()
    plain = len(notes_of(load(root / by_quirk["running_status"])))
    # running status omits repeated status bytes: fewer than 2 status bytes per note remain
    assert raw.count(0x90) + raw.count(0x80) < plain
    hang = load(root / by_quirk["hanging_notes"])
    ons = sum(1 for tr in hang.tracks for m in tr if m.type == "note_on" and m.velocity)
    offs = sum(1 for tr in hang.tracks for m in tr
               if m.type == "note_off" or (m.type == "note_on" and m.velocity == 0))
    assert ons - offs == 2


def test_corrupt_files_fail_in_mido_as_planted(demo, corpus):
    seen = Counter()
    for root, truth in (demo, corpus):
        for rel, t in truth["files"].items():
            if t["stage"] != "validate":
                continue
            seen[t["defect"] or t["expect"]] += 1
            path = root / rel
            if t["expect"] == "unsupported_format":
                # mido is lenient: it reads format 2 (MidiFile.type == 2) without complaint
                assert load(path).type == 2
            elif t["expect"] == "no_notes":
                mid = load(path)
                assert notes_of(mid) == []
                assert any(m.type == "control_change" for tr in mid.tracks for m in tr)
            else:
                # mido raises a bare EOFError (no message) for empty, cut and short-header files
                err = {"html": "MThd", "png": "MThd", "text": "MThd", "empty": None,
                       "cut_mid_track": None, "garbage_chunk_id": "no MTrk header",
                       "bad_header_length": None, "status_f4": "undefined status byte 0xf4",
                       "status_f5": "undefined status byte 0xf5",
                       "running_status_at_track_start": "running status without last_status"}
                with pytest.raises((OSError, EOFError), match=err[t["defect"]]):
                    mido.MidiFile(str(path))
    forms = {f for fs in synth.CORRUPT_FORMS.values() for f in fs}
    assert forms <= set(seen), forms - set(seen)


def test_truncated_file_is_a_prefix_cut_inside_the_last_track(corpus):
    root, truth = corpus
    for rel, t in truth["files"].items():
        if t["defect"] == "cut_mid_track":
            data = (root / rel).read_bytes()
            last = data.rfind(b"MTrk")
            declared = int.from_bytes(data[last + 4:last + 8], "big")
            assert 0 < len(data) - last - 8 < declared


# ----------------------------------------------------------------------------- variants vs originals
def _members(truth):
    clusters = defaultdict(dict)
    for rel, t in truth["files"].items():
        if t["cluster"]:
            clusters[t["cluster"]][rel] = t
    return clusters


def _original(members):
    return next(rel for rel, t in members.items() if t["variant"] == "original")


@pytest.mark.parametrize("which", ["corpus", "demo"])
def test_cluster_keeper_is_richest_and_duplicates_point_to_it(which, request):
    root, truth = request.getfixturevalue(which)
    clusters = _members(truth)
    assert clusters
    for cid, members in clusters.items():
        kept = [rel for rel, t in members.items() if t["expect"] == "kept"]
        assert len(kept) == 1, cid
        k = members[kept[0]]
        for rel, t in members.items():
            if rel == kept[0]:
                continue
            assert t["duplicate_of"] == kept[0]
            assert (t["notes"], t["duration_s"]) <= (k["notes"], k["duration_s"]), rel
            if t["variant"] in synth.NEAR_KINDS:
                assert t["expect"] == "near_duplicate" and t["notes"] < k["notes"], rel
            else:
                assert t["expect"] == "exact_duplicate", rel
                sha = hashlib.sha256((root / rel).read_bytes()).hexdigest()
                assert sha >= hashlib.sha256((root / kept[0]).read_bytes()).hexdigest()


def test_transposed_copies_shift_every_pitched_note(corpus, demo):
    n = 0
    for root, truth in (corpus, demo):
        for members in _members(truth).values():
            orig = notes_of(load(root / _original(members)))
            for rel, t in members.items():
                if t["variant"] != "transposed":
                    continue
                k = t["transform"]["semitones"]
                got = notes_of(load(root / rel))
                assert [(s, e, p + k, v, c) for s, e, p, v, c in orig if c != 9] == \
                    [x for x in got if x[4] != 9]
                drums_o = [x for x in orig if x[4] == 9]
                drums_t = [x for x in got if x[4] == 9]
                lost = Counter(drums_o) - Counter(drums_t)
                assert sum(lost.values()) == 1 and next(iter(lost))[2] == 49  # the final crash
                assert (t["tonic_pc"] - members[_original(members)]["tonic_pc"]) % 12 == k % 12
                n += 1
    assert n >= 3


def test_tempo_requantized_excerpt_edited_relations(corpus, demo):
    seen = Counter()
    for root, truth in (corpus, demo):
        for members in _members(truth).values():
            o_rel = _original(members)
            o_mid, o_t = load(root / o_rel), members[o_rel]
            orig = notes_of(o_mid)
            for rel, t in members.items():
                mid = load(root / rel)
                got = notes_of(mid)
                v, tr = t["variant"], t["transform"]
                if v == "tempo":
                    assert [m.tempo for m in metas(mid, "set_tempo")] == \
                        [round(m.tempo / tr["factor"]) for m in metas(o_mid, "set_tempo")]
                    assert t["duration_s"] == pytest.approx(o_t["duration_s"] / tr["factor"], rel=2e-3)
                elif v == "requantized":
                    assert mid.ticks_per_beat == tr["ticks_per_beat"] != o_mid.ticks_per_beat
                    assert len(got) == len(orig) - 1
                    scale = mid.ticks_per_beat / o_mid.ticks_per_beat
                    starts_o = sorted(x[0] * scale for x in orig)[:len(got)]
                    dev = np.abs(np.array(sorted(x[0] for x in got)) - np.array(starts_o))
                    assert 0 < dev.max() <= 2 * tr["jitter_ticks"] + 1  # humanized, not re-timed
                elif v == "excerpt":
                    assert 0.75 <= t["duration_s"] / o_t["duration_s"] <= 0.95
                    assert len(got) < len(orig)
                elif v == "edited":
                    assert len(got) == len(orig) - tr["deleted"] + tr["inserted"]
                    assert tr["deleted"] > tr["inserted"]
                    changed = len(Counter(orig) - Counter(got)) / len(orig)
                    assert 0.005 < changed < 0.1
                elif v == "same_content":
                    key = sorted((round(s / o_mid.ticks_per_beat * 960), p, c if c == 9 else 0)
                                 for s, e, p, _, c in orig)
                    assert sorted((round(s / mid.ticks_per_beat * 960), p, c if c == 9 else 0)
                                  for s, e, p, _, c in got) == key
                elif v == "reorchestrated":
                    progs_o = sorted(m.program for m in metas(o_mid, "program_change"))
                    progs = sorted(m.program for m in metas(mid, "program_change"))
                    assert progs != progs_o
                    assert {x[4] for x in got} != {x[4] for x in orig}
                    lost = Counter(x[:3] for x in orig) - Counter(x[:3] for x in got)
                    assert sum(lost.values()) == 1 and next(iter(lost))[2] == 49  # final crash
                seen[v] += 1
    assert set(synth.variant_kinds()) <= set(seen)


def test_style_family_shares_changes_but_not_melody(corpus):
    root, truth = corpus
    fams = defaultdict(list)
    for rel, t in truth["files"].items():
        if t["family"] and t["variant"] == "original":
            fams[t["family"]].append((rel, t))
    assert any(len(m) >= 2 for m in fams.values())
    for members in fams.values():
        assert len({(t["tonic_pc"], t["mode"], t["meter"]) for _, t in members}) == 1
        melodies = {tuple(x[2] for x in notes_of(load(root / rel)) if x[4] == 0)[:40]
                    for rel, _ in members}
        assert len(melodies) == len(members)


# ----------------------------------------------------------------------------- the music
def test_key_agrees_with_krumhansl_kessler(corpus):
    """A duration-weighted pitch-class profile correlated with the Krumhansl-Kessler (1982)
    probe-tone profiles as shipped by music21 (analysis.discrete.KrumhanslSchmuckler)
    finds the truth key for most originals."""
    from music21.analysis.discrete import KrumhanslSchmuckler
    ks = KrumhanslSchmuckler()
    profiles = {m: np.array(ks.getWeights(m)) for m in ("major", "minor")}
    root, truth = corpus
    hits = total = 0
    for rel, t in truth["files"].items():
        if t["variant"] != "original" or t["tonic_pc"] is None or t["quirk"] == "smpte":
            continue
        hist = np.zeros(12)
        for s, e, p, _, c in notes_of(load(root / rel)):
            if c != 9:
                hist[p % 12] += e - s
        best = max((np.corrcoef(hist, np.roll(w, pc))[0, 1], pc, m)
                   for m, w in profiles.items() for pc in range(12))
        hits += (best[1], best[2]) == (t["tonic_pc"], t["mode"])
        total += 1
    assert total > 40 and hits / total >= 0.8, (hits, total)


def test_accents_follow_the_meter(corpus):
    """Downbeats are louder than the other pulses; compound meters accent eighths 1 and 4 of
    each group of three (common practice)."""
    root, truth = corpus
    checked = Counter()
    for rel, t in truth["files"].items():
        if t["variant"] != "original" or t["quirk"] or t["tonic_pc"] is None:
            continue
        mid = load(root / rel)
        num, den = (int(x) for x in t["meter"].split("/"))
        pulse = mid.ticks_per_beat * 4 // den
        by_pos = defaultdict(list)
        for s, _, _, v, _ in notes_of(mid):
            if s % pulse == 0:
                by_pos[(s // pulse) % num].append(v)
        means = {k: np.mean(v) for k, v in by_pos.items()}
        assert means[0] > max(m for k, m in means.items() if k), rel
        if synth.METERS[t["meter"]]["per_beat"] == 3 and num > 3:
            group_starts = [means[k] for k in means if k % 3 == 0]
            others = [means[k] for k in means if k % 3]
            assert min(group_starts) > max(others), rel
            checked["compound"] += 1
        checked["all"] += 1
    assert checked["compound"] >= 3


def test_meters_keys_and_modes_are_varied(corpus):
    _, truth = corpus
    orig = [t for t in truth["files"].values() if t["variant"] == "original" and t["tonic_pc"] is not None]
    assert len({t["meter"] for t in orig}) >= 7
    assert len({t["tonic_pc"] for t in orig}) >= 10
    assert {t["mode"] for t in orig} == {"major", "minor"}
    assert any(t["key_declared"] == "C major" and t["tonic"] + " " + t["mode"] != "C major" for t in orig)
    assert any(not t["meter_declared"] for t in orig)


def test_filter_cases_measure_as_planted(corpus):
    _, truth = corpus
    by = {t["expect"]: t for t in truth["files"].values()}
    assert by["too_short"]["duration_s"] < 8 and by["too_short"]["notes"] >= 32
    assert by["too_long"]["duration_s"] > 1200
    assert by["too_few_notes"]["notes"] < 32 and by["too_few_notes"]["duration_s"] >= 8
    assert by["drums_only"]["tonic"] is None and by["drums_only"]["notes"] > 100


# ----------------------------------------------------------------------------- sizes and demo
def test_profile_sizes(tmp_path, corpus):
    root, truth = corpus
    small = [(root / r).stat().st_size for r, t in truth["files"].items()
             if t["variant"] == "original" and not t["quirk"]]
    notes = [t["notes"] for t in truth["files"].values() if t["variant"] == "original"]
    assert 3000 <= np.median(small) <= 7000 and 400 <= np.median(notes) <= 650
    big = synth.generate(tmp_path / "large", 3, seed=1, profile="large")
    sizes = [(tmp_path / "large" / r).stat().st_size for r in big["files"]]
    assert all(35_000 <= s <= 100_000 for s in sizes), sizes
    assert all(6500 <= t["notes"] <= 9500 for t in big["files"].values())
    mids = [load(tmp_path / "large" / r) for r in big["files"]]
    assert all(m.type == 0 or len(m.tracks) >= 7 for m in mids), [len(m.tracks) for m in mids]


def test_demo_corpus_is_reproducible_and_small(demo):
    root, truth = demo
    committed = json.loads((SAMPLE / "truth.json").read_text(encoding="utf-8"))
    assert truth == committed
    assert (root / "truth.json").read_bytes() == (SAMPLE / "truth.json").read_bytes()
    total = 0
    for rel in truth["files"]:
        a, b = (SAMPLE / rel).read_bytes(), (root / rel).read_bytes()
        assert hashlib.sha256(a).hexdigest() == hashlib.sha256(b).hexdigest(), rel
        total += len(a)
    assert 60 <= len(truth["files"]) <= 100 and total < 2_000_000
    gen = truth["generator"]
    readme = (SAMPLE / "README.md").read_text(encoding="utf-8")
    assert (f"midisift synth sample_corpus --count {gen['count']} --seed {gen['seed']} "
            f"--naming {gen['naming']}") in readme
    counts = Counter(t["expect"] for t in truth["files"].values())
    assert f"{counts['kept']} should be kept" in readme
    assert f"{counts['near_duplicate']} are near" in readme
    shipped = {p.relative_to(SAMPLE).as_posix() for p in SAMPLE.rglob("*") if p.is_file()}
    assert shipped == set(truth["files"]) | {"truth.json", "README.md"}
    kinds = Counter(t["variant"] for t in truth["files"].values())
    assert set(synth.NEAR_KINDS + synth.EXACT_KINDS + synth.FILTER_KINDS) <= set(kinds)
    assert any(" " in r for r in truth["files"]) and any(not r.isascii() for r in truth["files"])
    assert any(r.count("/") >= 3 for r in truth["files"])


def test_bad_arguments_are_refused(tmp_path):
    with pytest.raises(ValueError, match="profile"):
        synth.generate(tmp_path, 5, profile="huge")
    with pytest.raises(ValueError, match="naming"):
        synth.generate(tmp_path, 5, naming="fancy")
    with pytest.raises(ValueError, match="count"):
        synth.generate(tmp_path, 0)


def test_planted_fraction_is_configurable(tmp_path):
    clean = synth.generate(tmp_path / "clean", 30, seed=2, planted=0.0)
    assert {t["expect"] for t in clean["files"].values()} == {"kept"}
    assert {t["variant"] for t in clean["files"].values()} == {"original"}
    heavy = synth.generate(tmp_path / "heavy", 400, seed=2, planted=0.5, naming="workshop")
    dropped = sum(t["expect"] != "kept" for t in heavy["files"].values())
    assert 0.4 <= dropped / 400 <= 0.6, dropped
    with pytest.raises(ValueError, match="planted fraction"):
        synth.generate(tmp_path / "x", 10, planted=0.9)


def test_regenerating_in_place_deletes_nothing(tmp_path):
    """Generating again over a folder overwrites its own names and deletes no file (a user's
    files and the first run's files that the second does not write stay)."""
    first = synth.generate(tmp_path, 40, seed=1)
    (tmp_path / "notes.txt").write_text("mine")
    second = synth.generate(tmp_path, 40, seed=2)
    on_disk = {p.relative_to(tmp_path).as_posix() for p in tmp_path.rglob("*") if p.is_file()}
    assert on_disk == set(first["files"]) | set(second["files"]) | {"truth.json", "notes.txt"}
    assert (tmp_path / "notes.txt").read_text() == "mine"


def test_synth_command_refuses_a_folder_that_is_not_empty(tmp_path, capsys):
    from pipeline.cli import main
    (tmp_path / "truth.json").write_text('{"mine": true}')
    assert main(["synth", str(tmp_path), "--count", "5"]) == 2
    err = capsys.readouterr().err
    assert "not empty" in err and "--force" in err and str(tmp_path) in err
    assert (tmp_path / "truth.json").read_text() == '{"mine": true}'
    assert main(["synth", str(tmp_path), "--count", "5", "--force"]) == 0
    assert json.loads((tmp_path / "truth.json").read_text())["generator"]["count"] == 5