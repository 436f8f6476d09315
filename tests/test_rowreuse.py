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
    monkeypatch.setattr(StageWalk, "run", lambda self, *a, **k: walks.append(real(self, *a, **k)) or walks[-1])
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
    as settled (the last run's digest, not made; a line copied in a stretch of the old manifest,
    ``OldManifest.stretch``, is a settled row whose digest is not even looked up)."""
    from pipeline.outputs import rowreuse
    settled: list[bool] = []
    real, real_copied = rowreuse.RowReuse.digest, rowreuse.OldManifest.stretch

    def digest(self, f, walk, placed, positions):
        got = real(self, f, walk, placed, positions)
        settled.append(self._unsettled is not None and f.sha256 not in self._unsettled)
        assert got == rowreuse.row_digest(f, walk, placed, positions), f.rel
        return got

    def copied(self, a, b):
        settled.extend([True] * (b - a))
        return real_copied(self, a, b)
    monkeypatch.setattr(rowreuse.RowReuse, "digest", digest)
    monkeypatch.setattr(rowreuse.OldManifest, "stretch", copied)
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
    # the changes touch some clusters (near duplicates added, a copy that becomes its content's
    # representative, a file removed): their rows are made, the others settle
    assert 0 < sum(settled) < files
    _rerun(corpus, base, tmp_path / "rebuild", prepare=_forget_last_run)
    a, b = tmp_path / "reuse", tmp_path / "rebuild"
    assert (a / "manifest.jsonl").read_bytes() == (b / "manifest.jsonl").read_bytes()
    assert _tables(a) == _tables(b)
    # the next rerun adds one byte copy (its name sorts last): every other row settles, and
    # their lines are copied in stretches of the old manifest (RowReuse.stretches); it writes
    # what the rebuild writes
    from pipeline.outputs.rowreuse import RowReuse
    planned, real_plan = [], RowReuse.stretches
    monkeypatch.setattr(RowReuse, "stretches", lambda self, files: planned.append(real_plan(self, files)) or planned[-1])
    settled.clear()
    shutil.copytree(a, tmp_path / "late-rebuild")
    late = corpus / "zzzz_late_copy.mid"
    shutil.copy(corpus / sorted(p.name for p in corpus.glob("*.mid"))[-1], late)
    try:
        _run(corpus, a)
        # made: the rows of the copied content's sources (which of them represents it may change)
        sha = json.loads([line for line in (a / "manifest.jsonl").read_text().splitlines()
                          if '"zzzz_late_copy.mid"' in line][0])["sha256"]
        shared = sum(f'"sha256": "{sha}"' in line for line in (a / "manifest.jsonl").read_text().splitlines())
        assert shared >= 2 and len(settled) - sum(settled) == shared
        assert planned[0] is not None and [kind for kind, _, _ in planned[0]].count("copy") >= 2
        _forget_last_run(tmp_path / "late-rebuild")
        _run(corpus, tmp_path / "late-rebuild")
    finally:
        late.unlink()
    b = tmp_path / "late-rebuild"
    assert (a / "manifest.jsonl").read_bytes() == (b / "manifest.jsonl").read_bytes()
    assert _splits(a) == _splits(b) and _tables(a) == _tables(b)
    _saved_facts_are_the_manifests(a)


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


class _Ledger:
    """What ``RowReuse`` reads of the ledger: the rows' state and the row digests."""

    def __init__(self, state: dict, digests: dict[str, str]):
        self.state, self.digests = state, digests

    def state_for(self, name: str) -> dict:
        return self.state

    def row_digests(self) -> dict[str, str]:
        return dict(self.digests)

    def runs_unfinished(self, last: int, run: int) -> int:
        return 0


def _planned_reuse(tmp: Path, old: list[str], new: list[str], sha_of: dict[str, str], unsettled: set[str],
                   edit=None):
    """A ``RowReuse`` over an old manifest of the sources ``old`` (one line each, as the writer
    starts them; then changed by ``edit(path)``), settled but for ``unsettled``, and the
    ``SourceTable`` of ``new``."""
    import zlib
    from types import SimpleNamespace
    from pipeline.engine.sources import SourceTable
    from pipeline.outputs.rowreuse import STATE_VERSION, RowReuse, file_stat, line_prefix
    path = tmp / "manifest.jsonl"
    text = "".join(line_prefix(SimpleNamespace(rel=r, sha256=sha_of[r])) + '"n": %d}\n' % k for k, r in enumerate(old))
    path.write_bytes(text.encode("utf-8"))
    state = {"base": "b", "rows": len(old), "manifest": file_stat(path), "facts": None,
             "version": STATE_VERSION, "run": 1, "crc32": zlib.crc32(text.encode("utf-8"))}
    if edit is not None:
        edit(path)
    reuse = RowReuse(_Ledger(state, {r: "d" for r in old}), tmp, "b", set(), run=2)
    reuse.settle(unsettled)
    files = SourceTable("/in", [(r, 1, 1) for r in new])
    for i, r in enumerate(new):
        files.set_sha256(i, sha_of[r])
    return reuse, files


def test_stretches_map_every_file_to_its_old_line(tmp_path, monkeypatch):
    """``RowReuse.stretches`` against the plain reference (each file's old line found by its
    source; a file is looked at when its content is unsettled; an old line whose source is gone
    is reported): random old and new source lists, sources added and removed at the start, in
    the middle and at the end. A new source whose content is settled breaks the rule the plan
    relies on (the runner lists a new source's content as unsettled): no plan then. (Planned
    whatever the share of files looked at; above ``LOOKED_AT_MOST`` of them the runner walks.)"""
    import random
    from pipeline.outputs import rowreuse
    monkeypatch.setattr(rowreuse, "LOOKED_AT_MOST", 1.0)
    rng = random.Random(7)
    for case in range(60):
        universe = sorted(f"{rng.choice('abcxyz')}/{k:03d}.mid" for k in range(rng.randint(1, 40)))
        old = sorted(r for r in universe if rng.random() < 0.8)
        new = sorted(r for r in universe if (r in old and rng.random() < 0.85) or (r not in old and rng.random() < 0.7))
        if not old or not new:
            continue
        sha_of = {r: "%064x" % rng.randrange(1 << 30) for r in universe}
        added = [r for r in new if r not in old]
        unsettled = {sha_of[r] for r in added} | {sha_of[r] for r in new if rng.random() < 0.1}
        d = tmp_path / str(case)
        d.mkdir()
        reuse, files = _planned_reuse(d, old, new, sha_of, unsettled)
        steps = reuse.stretches(files)
        assert steps is not None, case
        got, gone = [], []
        for kind, a, b in steps:
            if kind == "copy":
                got += [("line", k) for k in range(a, b)]
            elif kind == "gone":
                gone.append(a)
            else:
                got.append(("file", a, b))
        want = [("file", i, old.index(r) if r in old else -1) if sha_of[r] in unsettled else ("line", old.index(r))
                for i, r in enumerate(new)]
        assert got == want, case
        assert gone == [k for k, r in enumerate(old) if r not in new], case
        # each stretch's bytes are its old lines
        lines = (d / "manifest.jsonl").read_text().splitlines(keepends=True)
        with reuse.opened() as manifest:
            for kind, a, b in steps:
                if kind == "copy":
                    assert b"".join(manifest.stretch(a, b).chunks()).decode() == "".join(lines[a:b])
                    assert list(manifest.stretch(a, b).lines()) == lines[a:b]
                elif kind == "gone":
                    assert manifest.line(a) == lines[a]
                elif b >= 0:  # a file known to the last run
                    assert manifest.line(b) == lines[b]
        if added:
            reuse, files = _planned_reuse(d, old, new, sha_of, unsettled - {sha_of[added[0]]}
                                          - {sha_of[r] for r in new if r in old})
            assert reuse.stretches(files) is None, case


def test_stretches_need_the_manifest_the_last_run_wrote(tmp_path):
    """Two lines swapped behind the ledger (size and mtime restored): the CRC-32 differs, and
    the rows are walked one by one (each line's prefix checked) instead; so they are when more
    than half the rows may change."""
    old = [f"{k:03d}.mid" for k in range(10)]
    sha_of = {r: "%064x" % k for k, r in enumerate(old)}
    reuse, files = _planned_reuse(tmp_path, old, old, sha_of, set())
    assert reuse.stretches(files) == [("copy", 0, 10)]
    # most rows may change: walked one by one (each looked-at row would be a read of its own)
    reuse, files = _planned_reuse(tmp_path, old, old, sha_of, {sha_of[r] for r in old[:6]})
    assert reuse.stretches(files) is None
    reuse, files = _planned_reuse(tmp_path, old, old, sha_of, {sha_of[r] for r in old[:5]})
    assert reuse.stretches(files) == [("file", k, k) for k in range(5)] + [("copy", 5, 10)]

    def swap(path: Path) -> None:
        st = path.stat()
        lines = path.read_text().splitlines(keepends=True)
        lines[3], lines[4] = lines[4], lines[3]
        path.write_text("".join(lines))
        os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    reuse, files = _planned_reuse(tmp_path, old, old, sha_of, set(), edit=swap)
    assert reuse.usable and reuse.stretches(files) is None
