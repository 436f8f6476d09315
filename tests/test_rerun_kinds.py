"""Every kind of rerun writes what rebuilding it writes (issue 24, part 3: a rerun touches known
files only where they changed, through the last run's rows, corpus-stage results and outputs).

For each way a user changes a corpus (files added, nothing changed, files removed, a file
replaced by other bytes, a byte-identical copy added, an option changed), the rerun over a copy
of the last run's output is compared with the same rerun given nothing to reuse (its old
manifest and the corpus stages' stored results of the last run removed, so every row, trail
and corpus-stage result is made anew): manifest bytes, split lists, the normalized MIDI files,
summary.json (but its timings, the input and output folders' paths, the output's own key, and
the notes of a rerun that had nothing to do), the decision trails and the
row digests. The corpus is the invented demo corpus (sample_corpus/README.md); the oracle is
the pipeline's own full computation, as in tests/test_rowreuse.py.
"""
from __future__ import annotations

import json
import shutil
import sqlite3
from pathlib import Path
from typing import Callable

import pytest

from test_rowreuse import _splits, _tables, demo_less_some_drops
from test_safety import as_version_2

from pipeline.config import load_config
from pipeline.engine.runner import Runner
from pipeline.outputs.table import RunReport
from pipeline.store.ledger import SCHEMA_VERSION

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "sample_corpus"


def _run(inp: Path, out: Path, change_options: Callable | None = None) -> RunReport:
    cfg = load_config(ROOT / "configs" / "default.yaml", input=str(inp), output=str(out), workers=1)
    if change_options is not None:
        change_options(cfg)
    return Runner(cfg, quiet=True).run()


def _written(out: Path) -> dict:
    """What a run wrote that a rerun must reproduce."""
    summary = json.loads((out / "summary.json").read_text())
    summary.pop("timings_s", None)
    summary.pop("changes_since_last_run", None)  # what the run did against the last one, as timings
    summary.pop("output", None)  # the folder's own path
    summary.pop("input", None)  # each test's copy of the corpus
    summary.get("counts", {}).pop("quick_key", None)
    tables = _tables(out)
    midi = {p.relative_to(out).as_posix(): p.read_bytes() for p in sorted((out / "midi").rglob("*.mid"))}
    splits = _splits(out)
    return {"manifest": (out / "manifest.jsonl").read_bytes(), "splits": splits, "midi": midi,
            "summary": summary, "tables": tables}


def _forget_last_run(out: Path) -> None:
    """Nothing of the last run's rows to reuse: no manifest, no stored corpus-stage results, no
    stored verdict columns (every stored result is read)."""
    (out / "manifest.jsonl").unlink()
    db = sqlite3.connect(out / "state.sqlite")
    with db:
        db.execute("DELETE FROM results WHERE fingerprint LIKE '%:last-run'")
        db.execute("DELETE FROM run_columns")
    db.close()


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    """The demo corpus less three of its near duplicates and one kept file, run once."""
    tmp = tmp_path_factory.mktemp("kinds")
    corpus, hold, held, kept = demo_less_some_drops(tmp, kept_held=1)
    out = tmp / "out"
    _run(corpus, out)
    return corpus, out, hold, held, kept[:-1]


def _added(corpus: Path, hold: Path, held: list[str], kept: list[str]) -> None:
    for rel in held:  # near duplicates of kept files come back (their clusters change)
        shutil.copy(hold / rel, corpus / rel)


def _removed(corpus: Path, hold: Path, held: list[str], kept: list[str]) -> None:
    (corpus / kept[3]).unlink()
    (corpus / kept[7]).unlink()


def _replaced(corpus: Path, hold: Path, held: list[str], kept: list[str]) -> None:
    new = next(p for p in hold.rglob("*") if p.is_file() and p.relative_to(hold).as_posix() not in held)
    shutil.copy(new, corpus / kept[4])  # a kept file's path now holds another piece


def _byte_copy(corpus: Path, hold: Path, held: list[str], kept: list[str]) -> None:
    shutil.copy(corpus / kept[5], corpus / "0000_first_copy.mid")  # sorts first: the representative


def _nothing(corpus: Path, hold: Path, held: list[str], kept: list[str]) -> None:
    pass


def _filter_option(cfg) -> None:
    cfg.stages[-2].options["min_seconds"] = 9  # filter


def _rerun_and_rebuild(base, tmp_path: Path, change: Callable, options: Callable | None = None,
                       prepare: Callable | None = None) -> tuple[RunReport, Path, dict, dict]:
    """The rerun after ``change`` over a copy of the base output (``prepare``d first), and the
    same rerun with nothing to reuse: its report, its folder and what each wrote."""
    corpus0, out, hold, held, kept = base
    corpus = tmp_path / "corpus"
    shutil.copytree(corpus0, corpus)
    change(corpus, hold, held, kept)
    rerun, rebuilt = tmp_path / "rerun", tmp_path / "rebuilt"
    shutil.copytree(out, rerun)
    shutil.copytree(out, rebuilt)
    if prepare is not None:
        prepare(rerun)
    _forget_last_run(rebuilt)
    report = _run(corpus, rerun, options)
    _run(corpus, rebuilt, options)
    return report, rerun, _written(rerun), _written(rebuilt)


@pytest.mark.parametrize("change, options", [
    (_added, None), (_nothing, None), (_removed, None), (_replaced, None), (_byte_copy, None),
    (_added, _filter_option)], ids=["added", "nothing", "removed", "replaced", "byte_copy", "option"])
def test_a_rerun_writes_what_rebuilding_it_writes(base, tmp_path, change, options):
    _, _, a, b = _rerun_and_rebuild(base, tmp_path, change, options)
    if change is _nothing and options is None:  # up to date: the last run's summary, as it was
        assert a["summary"].pop("unchanged_since_last_run") is True
        a["summary"].pop("notes"), b["summary"].pop("notes")
    assert a["midi"] and a["splits"]
    for key in a:
        assert a[key] == b[key], key


def test_a_rerun_takes_its_known_contents_verdicts_from_the_last_runs_columns(base, tmp_path, monkeypatch):
    # the rerun reads each per-file stage's verdicts of the files it knew from the columns the
    # last run stored (the rebuild, without them, reads every stored result): the same outputs
    from pipeline.store.records import Verdicts
    taken = []
    real = Verdicts.take_columns
    monkeypatch.setattr(Verdicts, "take_columns", lambda self, *a: taken.append(self.source.key[0]) or real(self, *a))
    _, _, a, b = _rerun_and_rebuild(base, tmp_path, _added)
    assert sorted(taken) == ["filter", "key_meter", "transpose", "validate"]
    for key in a:
        assert a[key] == b[key], key


def test_a_rerun_over_a_version_2_ledger_migrates_it_and_reuses_its_artifacts(base, tmp_path):
    # version 3 keeps the shingle sets' bytes in their own table; the last version's ledger is
    # migrated when opened: only the new files are decoded, and the outputs are the rebuild's
    report, rerun, a, b = _rerun_and_rebuild(base, tmp_path, _added,
                                             prepare=lambda out: as_version_2(out / "state.sqlite"))
    assert report.computed == len(base[3])
    db = sqlite3.connect(rerun / "state.sqlite")
    assert db.execute("SELECT value FROM meta WHERE key='schema'").fetchone() == (str(SCHEMA_VERSION),)
    assert db.execute("SELECT count(*) FROM artifact_data").fetchone()[0] > 0
    db.close()
    for key in a:
        assert a[key] == b[key], key


def test_a_kept_file_edited_in_place_keeps_its_part(tmp_path):
    """Found by an audit: a kept file edited in place (here its tempo, so its bytes and its
    member id change) was placed as a new piece, into the part furthest below its share, and
    the run reported no move. Its path's part now carries over (``split._prior_parts``); the
    same edit under a new name is a new piece (what the check guards: the fill would move it)."""
    import mido

    corpus, out = tmp_path / "corpus", tmp_path / "out"
    shutil.copytree(DEMO, corpus)
    _run(corpus, out)
    rows = [json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines()]
    pointed = {r["duplicate_of"] for r in rows} | {r["cluster"] for r in rows if r["status"] != "kept"}
    lone = [r for r in rows if r["status"] == "kept" and r["group_size"] == 1 and r["id"] not in pointed]
    edited = next(r for r in lone if r["split"] != "train")
    for r in [r for r in lone if r["split"] == "train"][:12]:  # train falls furthest below its share
        (corpus / r["source"]).unlink()
    mf = mido.MidiFile(corpus / edited["source"])
    for track in mf.tracks:
        for msg in track:
            if msg.type == "set_tempo":
                msg.tempo = int(msg.tempo * 0.8)
    renamed = tmp_path / "renamed"
    shutil.copytree(corpus, renamed)
    mf.save(corpus / edited["source"])
    mf.save(renamed / edited["source"].replace(".mid", " (edited).mid"))
    (renamed / edited["source"]).unlink()
    again = tmp_path / "again"
    shutil.copytree(out, again)
    _run(corpus, out)
    row = next(json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines()
               if json.loads(line)["source"] == edited["source"])
    assert row["sha256"] != edited["sha256"] and row["status"] == "kept"
    assert row["split"] == edited["split"] and "moved_from" not in row
    _run(renamed, again)
    new = next(json.loads(line) for line in (again / "manifest.jsonl").read_text().splitlines()
               if json.loads(line)["source"].endswith(" (edited).mid"))
    assert new["status"] == "kept" and new["split"] == "train"
