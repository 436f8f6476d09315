"""Dedup keeps, of a cluster, a file that the per-file stages after it keep too: with the
shipped stage order (dedup before filter) the file the keep policy prefers may fail the
filter, and the piece would then leave the corpus with it (found by an audit: a clean file
dropped as a near-duplicate of a copy with a few notes added after a long silence, which the
filter then dropped as long_silence).

The piece is a real arrangement, POP909 song 051 (tests/data/pop909, MIT licence, Music X Lab
2020); its copy is made here with mido, the outside writer.
"""
from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import mido
import yaml

from pipeline.config import load_config
from pipeline.engine.runner import Runner

SONG = Path(__file__).parent / "data" / "pop909" / "051" / "051.mid"


def _with_coda(src: Path, dst: Path, gap_beats: int = 200) -> None:
    """``src`` with four more notes on its first track, ``gap_beats`` beats after its end
    (more notes: the default keep policy, most_notes, prefers this copy)."""
    mid = mido.MidiFile(src)
    track = mid.tracks[-1]
    end = track.pop() if track and track[-1].type == "end_of_track" else mido.MetaMessage("end_of_track")
    gap = gap_beats * mid.ticks_per_beat
    for k, pitch in enumerate((60, 64, 67, 72)):
        track.append(mido.Message("note_on", note=pitch, velocity=80, time=gap if k == 0 else 0))
        track.append(mido.Message("note_off", note=pitch, velocity=0, time=mid.ticks_per_beat))
    end.time = 0
    track.append(end)
    mid.save(dst)


def _rows(tmp_path: Path, corpus: Path, name: str, filter_opts: dict,
          dedup_opts: dict | None = None) -> dict[str, dict]:
    cfg = tmp_path / f"{name}.yaml"
    cfg.write_text(yaml.safe_dump({
        "input": str(corpus), "output": str(tmp_path / name), "workers": 1,
        "stages": [{"validate": {}}, {"key_meter": {}}, {"dedup": dedup_opts or {}}, {"filter": filter_opts},
                   {"split": {"ratios": {"train": 0.5, "test": 0.5}}}]}))
    Runner(load_config(cfg), quiet=True).run()
    lines = (tmp_path / name / "manifest.jsonl").read_text().splitlines()
    return {r["source"]: r for r in map(json.loads, lines)}


def test_the_kept_file_of_a_cluster_passes_the_filter_after_dedup(tmp_path):
    corpus = tmp_path / "in"
    corpus.mkdir()
    shutil.copy(SONG, corpus / "clean.mid")
    _with_coda(SONG, corpus / "coda.mid")
    rows = _rows(tmp_path, corpus, "out", {"max_silence_s": 30.0})
    clean, coda = rows["clean.mid"], rows["coda.mid"]
    # one piece, one cluster; the copy the policy prefers fails the filter, so the other is kept
    assert clean["status"] == "kept" and clean["cluster"] == coda["cluster"]
    assert coda["status"] == "dropped" and coda["stage"] == "dedup"
    assert coda["duplicate_of"] == clean["id"]
    assert "files the stages after dedup keep first" in _explain_detail(tmp_path / "out", "clean.mid")
    # with a filter that keeps both, the policy decides as before: the copy with more notes
    loose = _rows(tmp_path, corpus, "loose", {"max_silence_s": 1000.0})
    assert loose["coda.mid"]["status"] == "kept"
    assert loose["clean.mid"]["duplicate_of"] == loose["coda.mid"]["id"]


def test_a_filter_option_changed_on_a_rerun_decides_the_kept_file_again(tmp_path):
    """Dedup's stored results depend on the stages after it: a rerun with another filter
    option does not reuse a keep choice made under the old one."""
    corpus = tmp_path / "in"
    corpus.mkdir()
    shutil.copy(SONG, corpus / "clean.mid")
    _with_coda(SONG, corpus / "coda.mid")
    first = _rows(tmp_path, corpus, "out", {"max_silence_s": 1000.0})
    assert first["coda.mid"]["status"] == "kept"
    again = _rows(tmp_path, corpus, "out", {"max_silence_s": 30.0})
    assert again["clean.mid"]["status"] == "kept"
    assert again["coda.mid"]["stage"] == "dedup" and again["coda.mid"]["duplicate_of"] == again["clean.mid"]["id"]
    # and back: the limit relaxed, the policy's choice returns, as in a fresh run (an audit
    # found the stand-in kept from the tightened run staying kept)
    relaxed = _rows(tmp_path, corpus, "out", {"max_silence_s": 1000.0})
    assert relaxed["coda.mid"]["status"] == "kept"
    assert relaxed["clean.mid"]["duplicate_of"] == relaxed["coda.mid"]["id"]


def test_a_keep_policy_changed_on_a_rerun_is_applied(tmp_path):
    """The files kept last time stay kept before newcomers, but a rerun under another
    keep_policy chooses by that policy, as a fresh run does (an audit found the new policy
    named in summary.json and the old one's files kept)."""
    corpus = tmp_path / "in"
    corpus.mkdir()
    shutil.copy(SONG, corpus / "clean.mid")
    clean_id = hashlib.sha256((corpus / "clean.mid").read_bytes()).hexdigest()[:16]
    gap = 200  # a copy with more notes (most_notes keeps it) and a larger id (smallest_id does not)
    while True:
        _with_coda(SONG, corpus / "coda.mid", gap)
        if hashlib.sha256((corpus / "coda.mid").read_bytes()).hexdigest()[:16] > clean_id:
            break
        gap += 1
    loose = {"max_silence_s": 1000.0}
    first = _rows(tmp_path, corpus, "out", loose)
    assert first["coda.mid"]["status"] == "kept" and first["clean.mid"]["status"] == "dropped"
    by_id = _rows(tmp_path, corpus, "out", loose, {"keep_policy": "smallest_id"})
    assert by_id["clean.mid"]["status"] == "kept" and by_id["coda.mid"]["status"] == "dropped"
    fresh = _rows(tmp_path, corpus, "fresh", loose, {"keep_policy": "smallest_id"})
    assert {k: r["status"] for k, r in fresh.items()} == {k: r["status"] for k, r in by_id.items()}


def test_when_every_file_fails_the_filter_the_drop_says_so(tmp_path):
    corpus = tmp_path / "in"
    corpus.mkdir()
    _with_coda(SONG, corpus / "a.mid", gap_beats=200)
    _with_coda(SONG, corpus / "b.mid", gap_beats=220)
    rows = _rows(tmp_path, corpus, "out", {"max_silence_s": 30.0})
    dup = next(r for r in rows.values() if r["stage"] == "dedup")
    kept = next(r for r in rows.values() if r["stage"] == "filter")
    assert kept["reason"] == "long_silence" and dup["duplicate_of"] == kept["id"]
    assert f"{kept['id']} is dropped later by filter (long_silence), as this file would be" in dup["detail"]


def _explain_detail(out: Path, source: str) -> str:
    from pipeline.store.ledger import Ledger
    with Ledger(out / "state.sqlite", read_only=True) as ledger:
        trail = json.loads(dict(ledger.db.execute("SELECT source, trail FROM decisions"))[source])
    return next(step["detail"] for step in trail if step["stage"] == "dedup")
