"""The split without a dedup stage (issue 20 item 5), for files of one note content in two track
layouts: they travel together.

Dedup links files with the same canonical notes as exact duplicates (content hash), whatever
their layout. The shingles follow the voices: one piece with its melody's odd bars moved to a
track of their own shares little with itself (0.09, below ``group_threshold`` 0.2), so grouping
on shingles alone put its two layouts in different parts (5 of 10 seeds here, split version 3):
the same notes in train and test. The split's own ``prepare`` keeps the content hash (dedup's
function, ``signature_of``) and the split ties members of one content together."""
from __future__ import annotations

import json
from collections import Counter

import yaml

from pipeline.analysis.shingles import content_hash
from pipeline.config import load_config
from pipeline.engine.runner import Runner
from pipeline.stages.base import CorpusState, FileContext, Member
from pipeline.stages.dedup import Dedup
from pipeline.stages.split import Split

from test_dedup import compose, family, jaccard_or_containment
from test_dedup_own_pairs import _layouts
from test_shingles import make_piece
from test_split import _midi_bytes

HALVES = {"x": 0.5, "y": 0.5}


def _pieces():
    """The piece of ``test_dedup_own_pairs._layouts`` in its plain and alternate layouts, and
    20 other pieces (test_dedup.compose): ``[(name, rows)]``."""
    rows, other, _ = _layouts()
    return ([("plain.mid", rows), ("alt.mid", other["alternate"])]
            + [(f"other{i}.mid", compose(family(10 + i), seed=900 + i)) for i in range(20)])


def _split_members():
    """Members carrying the split's own arrays (``Split.prepare``), as the runner stores them
    when no dedup stage runs; ids in name order."""
    stage, out = Split(), []
    for i, (name, rows) in enumerate(_pieces()):
        piece = make_piece(rows)
        mid = f"{i:016x}"
        out.append(Member(mid, mid * 4, name, {}, {"split": stage.prepare(piece, FileContext(piece, name, mid))}))
    return out


def test_the_split_without_dedup_keeps_one_note_content_in_one_part():
    members = _split_members()
    plain, alt = members[0], members[1]
    a, b = plain.artifacts["split"], alt.artifacts["split"]
    # the hash is dedup's (one function): equal to what dedup's prepare stores for the piece
    piece = make_piece(_pieces()[0][1])
    assert a["content_hash"] == Dedup().prepare(piece, FileContext(piece, "p", "0" * 16))["content_hash"] \
        == content_hash(piece)
    assert a["content_hash"] == b["content_hash"]
    # the shingles alone do not link them
    assert jaccard_or_containment(a["shingles"], b["shingles"]) < Split().opts["group_threshold"]
    for seed in range(10):
        state = CorpusState()
        got = Split({"seed": seed, "ratios": HALVES}).run_corpus(members, state)
        assert got[plain.id].values["split"] == got[alt.id].values["split"], seed
        assert got[plain.id].values["group"] == got[alt.id].values["group"] == plain.id
        assert any("note content of another file" in n for n in state.notes)


def test_an_incremental_rerun_puts_a_new_layout_in_its_contents_part():
    """The alternate layout arrives in a second run: it joins the plain layout's part (the
    stored parts of the first run stand), as in a fresh run of every file."""
    members = _split_members()
    plain, alt = members[0], members[1]
    first = [m for m in members if m is not alt]
    for seed in range(10):
        stage = Split({"seed": seed, "ratios": HALVES})
        state1 = CorpusState()
        got1 = stage.run_corpus(first, state1)
        state2 = CorpusState(previous=state1.current)
        got2 = Split({"seed": seed, "ratios": HALVES}).run_corpus(members, state2)
        assert got2[alt.id].values["split"] == got2[plain.id].values["split"] == got1[plain.id].values["split"], seed
        assert all(got2[m.id].values["split"] == got1[m.id].values["split"] for m in first)


def test_group_threshold_null_turns_content_grouping_off_too():
    """``group_threshold: null`` groups nothing: the two layouts are placed as single files
    (some seed separates them) and summary says grouping was off."""
    members = _split_members()
    plain, alt = members[0], members[1]
    apart = 0
    for seed in range(10):
        state = CorpusState()
        got = Split({"seed": seed, "ratios": HALVES, "group_threshold": None}).run_corpus(members, state)
        apart += got[plain.id].values["split"] != got[alt.id].values["split"]
        assert state.current["summary"]["near_duplicate_grouping"] is False
    assert apart > 0


def _notes_by_mido(data: bytes) -> Counter:
    """(start tick, end tick, pitch, drum) of every note, decoded by mido (the outside reader)."""
    import io

    import mido
    mid = mido.MidiFile(file=io.BytesIO(data))
    notes: Counter = Counter()
    for track in mid.tracks:
        now, on = 0, {}
        for msg in track:
            now += msg.time
            if msg.type == "note_on" and msg.velocity > 0:
                on[(msg.channel, msg.note)] = now
            elif msg.type in ("note_on", "note_off"):
                start = on.pop((msg.channel, msg.note))
                notes[(start, now, msg.note, msg.channel == 9)] += 1
    return notes


def _run(tmp_path, corpus, stages, out, seed=0):
    cfg_path = tmp_path / f"{out}.yaml"
    cfg_path.write_text(yaml.safe_dump({"input": str(corpus), "output": str(tmp_path / out), "workers": 1,
                                        "stages": stages(seed)}))
    report = Runner(load_config(cfg_path), quiet=True).run()
    rows = [json.loads(line) for line in (tmp_path / out / "manifest.jsonl").read_text().splitlines()]
    summary = json.loads((tmp_path / out / "summary.json").read_text())["split"]["stage"]
    return {r["source"]: r for r in rows}, summary, report


def _no_dedup(**opts):
    return lambda seed: [{"validate": {}}, {"split": {"ratios": HALVES, "seed": seed, **opts}}]


def test_runs_without_dedup_keep_the_layouts_together_and_reruns_equal_fresh_runs(tmp_path):
    """End to end (files written by mido): the alternate layout (and a byte-identical copy of
    it) added in a rerun shares the plain layout's part and the rerun writes what a fresh run writes; with ``group_threshold:
    null`` the layouts are split as single files and the table and summary.json say grouping
    was off; with dedup the two are one dedup cluster (one kept, the other an exact duplicate)."""
    corpus = tmp_path / "corpus"
    corpus.mkdir()
    pieces = dict(_pieces())
    data = {name: _midi_bytes(rows) for name, rows in pieces.items()}
    # the same notes by an outside decoder (mido), in other tracks
    assert _notes_by_mido(data["plain.mid"]) == _notes_by_mido(data["alt.mid"])
    for name in pieces:
        if name != "alt.mid":
            (corpus / name).write_bytes(data[name])
    seed = 1  # a seed at which grouping on shingles alone (split version 3) put them apart,
    # in the rerun and in a fresh run
    first, _, _ = _run(tmp_path, corpus, _no_dedup(), "out", seed)
    (corpus / "alt.mid").write_bytes(data["alt.mid"])
    (corpus / "copy").mkdir()
    (corpus / "copy" / "alt.mid").write_bytes(data["alt.mid"])  # byte-identical: one content
    rerun, summary, _ = _run(tmp_path, corpus, _no_dedup(), "out", seed)
    assert rerun["alt.mid"]["split"] == rerun["plain.mid"]["split"] == rerun["copy/alt.mid"]["split"]
    assert rerun["alt.mid"]["group"] == rerun["plain.mid"]["group"]
    assert all(rerun[n]["split"] == r["split"] for n, r in first.items())  # the stored parts stand
    # a fresh run of every file keeps them together too
    fresh, _, _ = _run(tmp_path, corpus, _no_dedup(), "fresh", seed)
    assert fresh["alt.mid"]["split"] == fresh["plain.mid"]["split"]
    assert summary["near_duplicate_grouping"] is True and summary["near_duplicate_signatures"] == "split"

    off, summary, report = _run(tmp_path, corpus, _no_dedup(group_threshold=None), "off", seed)
    assert off["alt.mid"]["split"] != off["plain.mid"]["split"]
    assert summary["near_duplicate_grouping"] is False
    assert "near-duplicate grouping OFF (group_threshold: null)" in report.table()

    default = lambda s: [{"validate": {}}, {"dedup": {}}, {"split": {"ratios": HALVES, "seed": s}}]
    dd, summary, _ = _run(tmp_path, corpus, default, "dedup", seed)
    assert summary["near_duplicate_signatures"] == "dedup"
    assert dd["alt.mid"]["cluster"] == dd["plain.mid"]["cluster"]
    assert sorted(r.get("reason") or "kept" for n, r in dd.items() if n in ("alt.mid", "plain.mid")) \
        == ["exact_duplicate", "kept"]


def test_relayout_keeps_the_notes_and_moves_odd_bars_to_tracks_of_their_own():
    """``pipeline.tools.relayout`` (the benchmark's other layouts): the same notes by mido, in
    more tracks, and the same content hash by our decoder."""
    import io

    import mido

    from pipeline.midi.decode import decode
    from pipeline.tools.relayout import relayout
    data = _midi_bytes(_pieces()[0][1])
    other = relayout(data)
    assert _notes_by_mido(other) == _notes_by_mido(data)
    assert len(mido.MidiFile(file=io.BytesIO(other)).tracks) > len(mido.MidiFile(file=io.BytesIO(data)).tracks)
    assert content_hash(decode(other)) == content_hash(decode(data))
