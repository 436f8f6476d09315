"""A rerun reuses the manifest lines and decision trails of files whose rows did not change
(``pipeline.outputs.rowreuse``), and the corpus stages' results of clusters that did not change; what
it writes must equal what rebuilding everything writes.

The oracle is the same rerun with nothing to reuse (its old manifest and the stored corpus-stage
results removed): manifest bytes, split lists, the ``explain`` trails and the row digests must
be equal.
The corpus is the invented demo corpus (sample_corpus/README.md), changed the ways a user
changes a corpus: duplicates of kept files added (their clusters' rows change), a byte-identical
copy added under a name sorting first (it becomes the representative), a file removed.
"""
from __future__ import annotations

import json
import os
import shutil
import sqlite3
from pathlib import Path

import pytest

from pipeline.outputs import manifest as outputs
from pipeline.config import load_config
from pipeline.engine.runner import Runner

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "sample_corpus"


def _run(inp: Path, out: Path):
    cfg = load_config(ROOT / "configs" / "default.yaml", input=str(inp), output=str(out), workers=1)
    return Runner(cfg, quiet=True).run()


def _tables(out: Path) -> tuple[list, list]:
    db = sqlite3.connect(out / "state.sqlite")
    try:
        return (db.execute("SELECT source, sha256, status, trail FROM decisions ORDER BY source").fetchall(),
                db.execute("SELECT source, digest FROM row_digests ORDER BY source").fetchall())
    finally:
        db.close()


def _splits(out: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted((out / "splits").glob("*.txt"))}


def demo_less_some_drops(tmp: Path, kept_held: int = 0) -> tuple[Path, Path, list[str], list[str]]:
    """The demo corpus copied to ``tmp/corpus`` less three of its near duplicates and its last
    ``kept_held`` kept files, which are moved to ``tmp/hold``; and the sources held and kept
    (by a run of the whole demo corpus)."""
    probe = tmp / "probe"
    _run(DEMO, probe)
    rows = [json.loads(line) for line in (probe / "manifest.jsonl").read_text().splitlines()]
    held = [r["source"] for r in rows if r["stage"] == "dedup" and r["reason"] == "near_duplicate"][:3]
    kept = [r["source"] for r in rows if r["status"] == "kept"]
    assert len(held) == 3 and len(kept) > 10
    corpus = tmp / "corpus"
    shutil.copytree(DEMO, corpus, ignore=shutil.ignore_patterns("*.json", "*.md"))
    hold = tmp / "hold"
    for rel in held + kept[len(kept) - kept_held:]:
        (hold / rel).parent.mkdir(parents=True, exist_ok=True)
        shutil.move(corpus / rel, hold / rel)
    return corpus, hold, held, kept


@pytest.fixture(scope="module")
def first(tmp_path_factory):
    """The demo corpus without some of its dedup drops, run once; and the changed corpus."""
    tmp = tmp_path_factory.mktemp("reuse")
    corpus, hold, held, kept = demo_less_some_drops(tmp)
    base = tmp / "base"
    _run(corpus, base)
    # the changes of the rerun
    for rel in held:
        shutil.move(hold / rel, corpus / rel)
    shutil.copy(corpus / kept[5], corpus / "0000_first_copy.mid")
    (corpus / kept[-1]).unlink()
    return corpus, base


def _saved_facts_are_the_manifests(out: Path) -> None:
    """The page facts a run saved (a rerun: the last run's, the unused old lines taken back,
    the built rows added) equal those read from its whole manifest (``page.read_manifest``)."""
    from pipeline.outputs.page import DEFAULT_ORDER, read_manifest
    db = sqlite3.connect(out / "state.sqlite")
    try:
        saved = json.loads(db.execute("SELECT value FROM state WHERE stage='_rows' AND key='facts'").fetchone()[0])
    finally:
        db.close()
    want = json.loads(json.dumps(read_manifest(out / "manifest.jsonl", stages=DEFAULT_ORDER).to_state()))
    for facts in (saved, want):
        facts["values"] = {f: sorted(v) for f, v in facts["values"].items()}  # a multiset per field
        facts["dropped_by"] = sorted(facts["dropped_by"])
    assert saved == want
    assert want["clusters"] and want["group_sizes"]
    # the summary's figures are those of the manifest's rows
    summary = json.loads((out / "summary.json").read_text())
    assert summary["counts"]["files"] == want["files"] and summary["counts"]["kept"] == want["kept"]
    assert {s: v["reached"] for s, v in summary["stages"].items()} == want["reached"]
    assert sorted([s, r, n] for s, v in summary["stages"].items() for r, n in v["dropped"].items()) == want["dropped_by"]
    assert {p: n for p, n in summary["split"]["files"].items() if n} == want["parts"]


def _forget_last_run(out: Path) -> None:
    """Leave nothing of the last run's rows to reuse: no manifest, no stored corpus-stage results."""
    (out / "manifest.jsonl").unlink()
    db = sqlite3.connect(out / "state.sqlite")
    with db:
        n = db.execute("DELETE FROM results WHERE fingerprint LIKE '%:last-run'").rowcount
    db.close()
    assert n > 0


def _rerun(corpus: Path, base: Path, dest: Path, prepare=None, monkeypatch=None) -> int:
    shutil.copytree(base, dest)
    if prepare is not None:
        prepare(dest)
    built = []
    real = outputs.manifest_row
    if monkeypatch is not None:
        monkeypatch.setattr(outputs, "manifest_row", lambda f, *a: built.append(f.rel) or real(f, *a))
    _run(corpus, dest)
    if monkeypatch is not None:
        monkeypatch.setattr(outputs, "manifest_row", real)
    return len(built)


def test_reused_rows_equal_rebuilt_rows(first, tmp_path, monkeypatch):
    corpus, base = first
    from pipeline.outputs.page import RowFacts
    counted, real_facts = [], RowFacts.facts
    monkeypatch.setattr(RowFacts, "facts", lambda self: counted.append(
        (self.from_last, self.old_seen, real_facts(self) is not None)) or real_facts(self))
    built = _rerun(corpus, base, tmp_path / "reuse", monkeypatch=monkeypatch)
    # the last run's facts were updated, not read again from every line
    assert counted[0][0] and counted[0][1] > 10 and counted[0][2]
    rebuilt = _rerun(corpus, base, tmp_path / "rebuild", prepare=_forget_last_run, monkeypatch=monkeypatch)
    files = len((tmp_path / "rebuild" / "manifest.jsonl").read_text().splitlines())
    assert rebuilt == files  # the oracle rebuilt every row
    assert 3 < built < files // 2  # the rerun rebuilt the changed rows only
    a, b = tmp_path / "reuse", tmp_path / "rebuild"
    assert (a / "manifest.jsonl").read_bytes() == (b / "manifest.jsonl").read_bytes()
    assert _splits(a) == _splits(b)
    assert _tables(a) == _tables(b)
    for d in (base, a, b):
        _saved_facts_are_the_manifests(d)


def test_manifest_changed_behind_the_ledger_is_rebuilt(first, tmp_path, monkeypatch):
    """Lines out of place (two swapped, size and mtime restored) are rebuilt, not reused; a
    manifest whose stat differs from the recorded one is not trusted at all."""
    corpus, base = first

    def swap(d: Path) -> None:
        path = d / "manifest.jsonl"
        st = path.stat()
        lines = path.read_text(encoding="utf-8").splitlines(keepends=True)
        lines[1], lines[2] = lines[2], lines[1]
        path.write_text("".join(lines), encoding="utf-8")
        os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))

    def touch(d: Path) -> None:
        path = d / "manifest.jsonl"
        st = path.stat()
        os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000))

    swapped = _rerun(corpus, base, tmp_path / "swapped", prepare=swap, monkeypatch=monkeypatch)
    plain = _rerun(corpus, base, tmp_path / "plain", monkeypatch=monkeypatch)
    touched = _rerun(corpus, base, tmp_path / "touched", prepare=touch, monkeypatch=monkeypatch)
    files = len((tmp_path / "plain" / "manifest.jsonl").read_text().splitlines())
    assert plain < swapped < files
    assert touched == files
    for d in ("swapped", "touched"):
        assert (tmp_path / d / "manifest.jsonl").read_bytes() == (tmp_path / "plain" / "manifest.jsonl").read_bytes()
        assert _tables(tmp_path / d) == _tables(tmp_path / "plain")
        _saved_facts_are_the_manifests(tmp_path / d)


def test_changed_options_rebuild_every_row(first, tmp_path, monkeypatch):
    """Another stage fingerprint changes the base key: no old row is trusted."""
    corpus, base = first
    dest = tmp_path / "opts"
    shutil.copytree(base, dest)
    built = []
    real = outputs.manifest_row
    monkeypatch.setattr(outputs, "manifest_row", lambda f, *a: built.append(f.rel) or real(f, *a))
    cfg = load_config(ROOT / "configs" / "default.yaml", input=str(corpus), output=str(dest), workers=1)
    cfg.stages[-2].options["min_seconds"] = 9  # filter
    Runner(cfg, quiet=True).run()
    assert len(built) == len((dest / "manifest.jsonl").read_text().splitlines())


@pytest.mark.parametrize("rel", ["a/b.mid", "é/ü.mid", 'a"b.mid', "a\\b.mid", "tab\t.mid",
                                 "\u2028x.mid", "日本/曲.mid", "\x7f.mid", "sp ace.mid"])
def test_line_prefix_is_what_json_writes(rel):
    # the reference is Python's json module, as the manifest writer calls it
    from types import SimpleNamespace
    from pipeline.outputs.rowreuse import line_prefix
    f = SimpleNamespace(rel=rel, sha256="0123456789abcdef" * 4)
    row = {"id": f.sha256[:16], "source": rel, "sha256": f.sha256}
    assert json.dumps(row, ensure_ascii=False, separators=(", ", ": ")).startswith(line_prefix(f))


def test_trail_text_is_what_the_json_module_writes(first, tmp_path, monkeypatch):
    """The decision trail assembled from the records' stored texts equals the json module's
    serialisation of the trail (the reference), for every source of a rerun (reused and new
    records, byte-identical copies included)."""
    import json

    from pipeline.engine import runner
    from pipeline.engine.walk import ContentValues, StageWalk
    corpus, base = first
    dest = tmp_path / "trail"
    shutil.copytree(base, dest)
    walks, checked = [], []
    real = StageWalk.run
    monkeypatch.setattr(StageWalk, "run", lambda self, *a: walks.append(real(self, *a)) or walks[-1])
    real_write = runner.manifest.write_all

    def write_all(*a, **k):  # checked while the run's ledger is open (per-file values stay in it)
        summary = real_write(*a, **k)
        walk = walks[0]
        rows = [json.loads(line) for line in (dest / "manifest.jsonl").read_text().splitlines()]
        assert any(r["reason"] == "exact_duplicate" for r in rows)
        for r in rows:
            want = json.dumps(walk.trail_of(r["source"], r["sha256"]), sort_keys=True, separators=(",", ":"))
            assert walk.trail_json(r["source"], r["sha256"]) == want, r["source"]
            # the walk's records made from the verdict columns read like the trail's steps:
            # one value each, later stages winning, as the manifest row merges them
            merged = {}
            for step in walk.trail_of(walk.rep[r["sha256"]], r["sha256"]):  # the content's own
                merged.update(step["values"])
            values = ContentValues(walk, r["sha256"])
            assert {k: values[k] for k in values} == merged and len(values) == len(merged)
            # one value read from the walk directly (placing outputs reads the split's part)
            assert all(walk.value_of(r["sha256"], k) == v for k, v in merged.items())
            assert walk.value_of(r["sha256"], "no such value", 7) == 7
            assert walk.reached(r["sha256"]) == len(walk.trail(r["sha256"]))
        checked.append(len(rows))
        return summary

    monkeypatch.setattr(runner.manifest, "write_all", write_all)
    _run(corpus, dest)
    assert checked and checked[0] > 0


def _checked_digests(monkeypatch) -> list[bool]:
    """Wrap ``RowReuse.digest`` so every digest it returns is checked against the one
    ``row_digest`` makes from the walk (the reference); returns, per row, whether it was taken
    as settled (the last run's digest, not made)."""
    from pipeline.outputs import rowreuse
    settled: list[bool] = []
    real = rowreuse.RowReuse.digest

    def digest(self, f, walk, placed, positions):
        got = real(self, f, walk, placed, positions)
        settled.append(self._unsettled is not None and f.sha256 not in self._unsettled)
        assert got == rowreuse.row_digest(f, walk, placed, positions), f.rel
        return got
    monkeypatch.setattr(rowreuse.RowReuse, "digest", digest)
    return settled


def test_settled_rows_keep_the_digest_a_rebuild_makes(first, tmp_path, monkeypatch):
    """A rerun takes the last run's digest of a settled row (its content, sources, corpus-stage
    records and placed outputs unchanged) without making it: every such digest equals the one
    made from the walk, through the fixture's changes (near duplicates added, so clusters and
    their rows change; a byte-identical copy under a name sorting first, which becomes its
    content's representative; a file removed), and the outputs equal the rebuild's."""
    corpus, base = first
    settled = _checked_digests(monkeypatch)
    _rerun(corpus, base, tmp_path / "reuse")
    files = len((tmp_path / "reuse" / "manifest.jsonl").read_text().splitlines())
    assert len(settled) == files
    # a removed file makes dedup compute every cluster again (its records are new): only the
    # rows of contents that stop at a per-file stage settle here
    assert 0 < sum(settled) < files
    _rerun(corpus, base, tmp_path / "rebuild", prepare=_forget_last_run)
    a, b = tmp_path / "reuse", tmp_path / "rebuild"
    assert (a / "manifest.jsonl").read_bytes() == (b / "manifest.jsonl").read_bytes()
    assert _tables(a) == _tables(b)
    # the next rerun adds one byte copy (its name sorts last): every other row settles
    settled.clear()
    shutil.copy(corpus / sorted(p.name for p in corpus.glob("*.mid"))[-1], corpus / "zzzz_late_copy.mid")
    try:
        _run(corpus, a)
    finally:
        (corpus / "zzzz_late_copy.mid").unlink()
    # made: the rows of the copied content's sources (which of them represents it may change)
    sha = json.loads([line for line in (a / "manifest.jsonl").read_text().splitlines()
                      if '"zzzz_late_copy.mid"' in line][0])["sha256"]
    shared = sum(f'"sha256": "{sha}"' in line for line in (a / "manifest.jsonl").read_text().splitlines())
    assert shared >= 2 and len(settled) - sum(settled) == shared


def test_rows_are_not_settled_after_a_stopped_run_or_over_an_older_output(first, tmp_path, monkeypatch):
    """The sources and outputs tables may have been written by a run that stopped after the
    last completed one (its row digests are older): no row settles then, and an output whose
    saved rows' state has no version (written before it was kept) settles none either; both
    reruns write what the rebuild writes."""
    corpus, base = first
    settled = _checked_digests(monkeypatch)
    rebuild = tmp_path / "rebuild"
    _rerun(corpus, base, rebuild, prepare=_forget_last_run)

    def stopped(d: Path) -> None:  # a run started and never finished
        db = sqlite3.connect(d / "state.sqlite")
        with db:
            db.execute("INSERT INTO runs (started, status, config) VALUES (0, 'running', '{}')")
        db.close()

    def older(d: Path) -> None:  # the rows' state as written before it had a version
        db = sqlite3.connect(d / "state.sqlite")
        with db:
            n = db.execute("DELETE FROM state WHERE stage='_rows' AND key IN ('version', 'run')").rowcount
        db.close()
        assert n == 2

    for name, prepare in (("stopped", stopped), ("older", older)):
        settled.clear()
        built = []
        real = outputs.manifest_row
        monkeypatch.setattr(outputs, "manifest_row", lambda f, *a: built.append(f.rel) or real(f, *a))
        _rerun(corpus, base, tmp_path / name, prepare=prepare)
        monkeypatch.setattr(outputs, "manifest_row", real)
        files = len((rebuild / "manifest.jsonl").read_text().splitlines())
        assert settled and not any(settled), name
        assert 3 < len(built) < files // 2, name  # old lines are still reused
        assert (tmp_path / name / "manifest.jsonl").read_bytes() == (rebuild / "manifest.jsonl").read_bytes()
        assert _tables(tmp_path / name) == _tables(rebuild)
        _saved_facts_are_the_manifests(tmp_path / name)


def test_facts_saved_without_the_summary_counts_are_counted_from_the_rows(first, tmp_path):
    # facts saved before they held the summary's counts (files, kept, drops, reached, parts):
    # the rerun counts every row, reused lines read back, and writes what the rebuild writes
    corpus, base = first

    def old_facts(out: Path) -> None:
        db = sqlite3.connect(out / "state.sqlite")
        with db:
            (text,) = db.execute("SELECT value FROM state WHERE stage='_rows' AND key='facts'").fetchone()
            facts = json.loads(text)
            for key in ("files", "kept", "dropped_by", "reached", "parts"):
                del facts[key]
            db.execute("UPDATE state SET value=? WHERE stage='_rows' AND key='facts'", (json.dumps(facts),))
        db.close()

    _rerun(corpus, base, tmp_path / "old", prepare=old_facts)
    _rerun(corpus, base, tmp_path / "rebuild", prepare=_forget_last_run)
    a, b = tmp_path / "old", tmp_path / "rebuild"
    assert (a / "manifest.jsonl").read_bytes() == (b / "manifest.jsonl").read_bytes()
    summaries = [json.loads((d / "summary.json").read_text()) for d in (a, b)]
    for s in summaries:
        s.pop("timings_s"), s.pop("output")
        for key in ("reused", "computed", "quick_key"):  # the config names each run's own folder
            s["counts"].pop(key)
    assert summaries[0] == summaries[1]
    _saved_facts_are_the_manifests(a)
