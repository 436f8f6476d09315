"""End-to-end runs of the pipeline on the demo corpus and on small generated corpora.

The demo corpus is invented (sample_corpus/README.md); these tests check the pipeline against the
corpus's own truth file, not against outside references. Outside references are in the stage and
decoder tests.
"""
from __future__ import annotations

import json
import re
import shutil
import sqlite3
from pathlib import Path

import pytest
from types import MappingProxyType
import yaml

from pipeline.cli import main
from pipeline.config import load_config
from pipeline.engine.runner import Runner

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "sample_corpus"


def _manifest(out: Path) -> list[dict]:
    return [json.loads(line) for line in (out / "manifest.jsonl").read_text(encoding="utf-8").splitlines()]


def _run(out: Path, input_dir: Path = DEMO, workers: int = 1, config: Path | None = None, **flags):
    cfg = load_config(config or ROOT / "configs" / "default.yaml", input=str(input_dir), output=str(out),
                      workers=workers)
    return Runner(cfg, quiet=True, **flags).run()


@pytest.fixture(scope="module")
def demo_out(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("demo") / "out"
    _run(out)
    return out


def test_one_manifest_line_per_input_file(demo_out):
    truth = json.loads((DEMO / "truth.json").read_text())["files"]
    rows = _manifest(demo_out)
    assert sorted(r["source"] for r in rows) == sorted(truth)
    assert [r["source"] for r in rows] == sorted(r["source"] for r in rows)
    assert all(r["status"] in ("kept", "dropped") for r in rows)


def test_every_planted_case_gets_the_expected_verdict(demo_out):
    truth = json.loads((DEMO / "truth.json").read_text())["files"]
    got = {r["source"]: r for r in _manifest(demo_out)}
    wrong = []
    for src, t in truth.items():
        r = got[src]
        verdict = "kept" if r["status"] == "kept" else r["reason"]
        if verdict != t["expect"]:
            wrong.append((src, t["expect"], verdict, r["detail"]))
    assert not wrong, "\n".join(map(str, wrong))


def test_tolerated_quirks_are_kept(demo_out):
    truth = json.loads((DEMO / "truth.json").read_text())["files"]
    got = {r["source"]: r for r in _manifest(demo_out)}
    rmid = [s for s in truth if s.lower().endswith(".rmi")]
    assert rmid, "the demo corpus should hold a RIFF-wrapped file"
    for s in rmid:
        assert got[s]["status"] == "kept" or got[s]["reason"] in ("exact_duplicate", "near_duplicate")


def test_outputs_match_manifest(demo_out):
    rows = _manifest(demo_out)
    kept = [r for r in rows if r["status"] == "kept"]
    listed = set()
    for p in (demo_out / "splits").glob("*.txt"):
        lines = p.read_text().splitlines()
        assert lines == sorted(lines)
        for line in lines:
            assert line.startswith(f"midi/{p.stem}/")
            assert (demo_out / line).is_file()
        listed.update(lines)
    assert {r["output"] for r in kept} <= listed
    on_disk = {p.relative_to(demo_out).as_posix() for p in (demo_out / "midi").rglob("*.mid")}
    assert on_disk == listed
    summary = json.loads((demo_out / "summary.json").read_text())
    assert summary["counts"]["files"] == len(rows)
    assert summary["counts"]["kept"] == len(kept)


def test_outputs_decode_with_reference_decoder(demo_out):
    mido = pytest.importorskip("mido")  # mido: reference decoder
    for p in sorted((demo_out / "midi").rglob("*.mid"))[:20]:
        mf = mido.MidiFile(p)
        assert any(m.type == "note_on" and m.velocity > 0 for t in mf.tracks for m in t)


def test_rerun_with_nothing_changed_recomputes_nothing(tmp_path):
    out = tmp_path / "out"
    first = _run(out)
    before = (out / "manifest.jsonl").read_bytes()
    splits = {p.name: p.read_bytes() for p in (out / "splits").glob("*.txt")}
    again = _run(out)
    assert first.computed > 0
    assert again.computed == 0
    assert (out / "manifest.jsonl").read_bytes() == before
    assert {p.name: p.read_bytes() for p in (out / "splits").glob("*.txt")} == splits


def test_changing_one_stage_recomputes_only_that_stage(tmp_path):
    out = tmp_path / "out"
    _run(out)
    db = sqlite3.connect(out / "state.sqlite")
    count = lambda stage: db.execute("SELECT COUNT(*) FROM results WHERE stage=?", (stage,)).fetchone()[0]
    before = {s: count(s) for s in ("validate", "transpose", "key_meter", "filter")}
    raw = yaml.safe_load((ROOT / "configs" / "default.yaml").read_text())
    for entry in raw["stages"]:
        if "filter" in entry:
            entry["filter"]["min_seconds"] = 20
    cfg_path = tmp_path / "c.yaml"
    cfg_path.write_text(yaml.safe_dump(raw))
    _run(out, config=cfg_path)
    after = {s: count(s) for s in ("validate", "transpose", "key_meter", "filter")}
    db.close()
    assert {s: after[s] for s in ("validate", "transpose", "key_meter")} == \
        {s: before[s] for s in ("validate", "transpose", "key_meter")}
    assert after["filter"] > before["filter"]  # new rows under the new options fingerprint


def test_one_and_two_workers_give_byte_identical_outputs(tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    _run(a, workers=1)
    _run(b, workers=2)
    assert (a / "manifest.jsonl").read_bytes() == (b / "manifest.jsonl").read_bytes()
    for p in (a / "splits").glob("*.txt"):
        assert p.read_bytes() == (b / "splits" / p.name).read_bytes()
    for p in (a / "midi").rglob("*.mid"):
        assert p.read_bytes() == (b / p.relative_to(a)).read_bytes()


def test_adding_files_computes_only_the_new_ones(tmp_path):
    corpus = tmp_path / "corpus"
    shutil.copytree(DEMO, corpus)
    extra = sorted(p for p in corpus.rglob("*.mid"))[:3]
    holding = tmp_path / "later"
    holding.mkdir()
    for i, p in enumerate(extra):
        shutil.move(p, holding / f"{i}_{p.name}")
    out = tmp_path / "out"
    _run(out, input_dir=corpus)
    old = {r["source"]: r for r in _manifest(out)}
    new_dir = corpus / "added"
    new_dir.mkdir()
    for p in holding.iterdir():
        shutil.copy(p, new_dir / p.name)
    report = _run(out, input_dir=corpus)
    assert report.computed <= 3
    rows = {r["source"]: r for r in _manifest(out)}
    assert len(rows) == len(old) + 3
    moved = [s for s, r in old.items() if r["status"] == "kept" and rows[s]["split"] not in (r["split"], None)]
    summary = json.loads((out / "summary.json").read_text())
    for s in moved:  # a move is allowed only when it is reported
        assert any(rows[s]["id"] in note for note in summary["notes"]), s


def test_explain_a_dropped_demo_file(demo_out, capsys):
    rows = _manifest(demo_out)
    dropped = next(r for r in rows if r["status"] == "dropped" and r["stage"] == "dedup")
    assert main(["explain", dropped["source"], "--output", str(demo_out)]) == 0
    text = capsys.readouterr().out
    assert f"dropped by dedup: {dropped['reason']}" in text
    assert dropped["duplicate_of"] in text
    for stage in ("validate", "transpose", "key_meter", "dedup"):
        assert f"[{stage}]" in text
    assert "[filter]" not in text  # a dropped file never reaches a later stage


def test_explain_by_id_and_unknown_file(demo_out, capsys):
    row = next(r for r in _manifest(demo_out) if r["status"] == "dropped" and r["stage"] == "validate")
    assert main(["explain", row["id"], "--output", str(demo_out)]) == 0
    text = capsys.readouterr().out
    assert row["reason"] in text and row["source"] in text
    # README, Commands: exit 2 is bad usage (a file the run never saw, a folder that is not an
    # output folder), 1 a runtime failure
    assert main(["explain", "no/such/file.mid", "--output", str(demo_out)]) == 2
    assert "no/such/file.mid: no such file in the last run" in capsys.readouterr().err
    assert main(["explain", row["id"], "--output", str(DEMO)]) == 2
    assert "no state.sqlite here" in capsys.readouterr().err


def test_explain_reads_a_folder_it_cannot_write(demo_out, tmp_path, capsys):
    """explain opens the ledger read-only: it works on a copy of the output folder whose files
    and folder are read-only, and a read-only ledger refuses writes (sqlite3 URI mode=ro)."""
    import stat

    from pipeline.store.ledger import Ledger
    frozen = tmp_path / "frozen"
    shutil.copytree(demo_out, frozen)
    before = sorted(p.name for p in frozen.iterdir())
    for p in [*frozen.rglob("*"), frozen]:
        p.chmod(p.stat().st_mode & ~(stat.S_IWUSR | stat.S_IWGRP | stat.S_IWOTH))
    try:
        row = next(r for r in _manifest(frozen) if r["status"] == "dropped")
        assert main(["explain", row["source"], "--output", str(frozen)]) == 0
        assert row["reason"] in capsys.readouterr().out
        assert sorted(p.name for p in frozen.iterdir()) == before  # no WAL or lock file left
        with Ledger(frozen / "state.sqlite", read_only=True) as ledger:
            with pytest.raises(sqlite3.OperationalError, match="readonly"):
                ledger.db.execute("DELETE FROM meta")
    finally:
        for p in [frozen, *frozen.rglob("*")]:
            p.chmod(p.stat().st_mode | stat.S_IWUSR)


def test_output_files_follow_the_umask(demo_out):
    """Written files get 0o666 less the umask, as a plain open() gives them (POSIX open(2),
    mode argument and umask), not mkstemp's private 0o600."""
    import os
    mask = os.umask(0o022)
    os.umask(mask)
    files = [demo_out / "manifest.jsonl", demo_out / "summary.json",
             *(demo_out / "splits").glob("*.txt"), *(demo_out / "midi").rglob("*.mid")]
    assert len(files) > 5
    for p in files:
        assert p.stat().st_mode & 0o777 == 0o666 & ~mask, p


def test_byte_identical_copies_share_id_and_one_is_kept(demo_out):
    rows = _manifest(demo_out)
    by_sha: dict[str, list[dict]] = {}
    for r in rows:
        by_sha.setdefault(r["sha256"], []).append(r)
    groups = [g for g in by_sha.values() if len(g) > 1]
    assert groups, "the demo corpus has byte-identical copies"
    for g in groups:
        assert len({r["id"] for r in g}) == 1
        copies = [r for r in g if r["reason"] == "exact_duplicate"]
        assert len(copies) >= len(g) - 1


def test_readme_and_ci_run_the_same_two_commands():
    readme = (ROOT / "README.md").read_text()
    ci = (ROOT / ".ci" / "run").read_text()
    quick = readme.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    commands = re.findall(r"```\n(.+?)\n```", quick)
    assert commands[:2] == ["pip install . && midisift run configs/default.yaml",
                            "pip install '.[test]' && pytest"]
    ci_lines = [line.strip() for line in ci.splitlines() if line.strip() and not line.strip().startswith("#")]
    for c in commands[:2]:
        assert c in ci_lines


def test_missing_input_folder_is_a_clear_error(tmp_path, capsys):
    # README, Commands: bad usage or config exits 2 and writes nothing (the config's input,
    # --input naming no folder, --input naming a file)
    cfg = tmp_path / "c.yaml"
    cfg.write_text(yaml.safe_dump({"input": str(tmp_path / "nope"), "output": str(tmp_path / "o"),
                                   "stages": ["validate"]}))
    (tmp_path / "a_file.mid").write_bytes(b"MThd")
    for extra in ((), ("--input", str(tmp_path / "also_nope")), ("--input", str(tmp_path / "a_file.mid"))):
        assert main(["run", str(cfg), "--quiet", *extra]) == 2
        err = capsys.readouterr().err
        assert "the input folder does not exist or is not a folder" in err
        assert (extra[-1] if extra else str(tmp_path / "nope")) in err
        assert not (tmp_path / "o").exists()


def test_generated_corpus_verdicts_match_its_truth(tmp_path):
    # The generator's planted cases (pipeline/tools/synth.py, truth.json) through the default config:
    # every verdict and every duplicate_of must match what was planted.
    from pipeline.tools.synth import generate
    corpus = tmp_path / "corpus"
    truth = generate(corpus, 300, seed=11)["files"]
    out = tmp_path / "out"
    _run(out, input_dir=corpus, workers=2)
    rows = {r["source"]: r for r in _manifest(out)}
    ids = {src: r["id"] for src, r in rows.items()}
    wrong = []
    for src, t in truth.items():
        r = rows[src]
        verdict = r["reason"] or "kept"
        if verdict != t["expect"]:
            wrong.append((src, t["expect"], verdict))
        elif verdict == "near_duplicate" and r["duplicate_of"] != ids[t["duplicate_of"]]:
            wrong.append((src, "duplicate_of", t["duplicate_of"], r["duplicate_of"]))
    assert not wrong, wrong[:10]


def test_split_links_are_incremental_and_equal_a_full_search(tmp_path):
    # A rerun searches only pairs with a new file; the links it ends with must equal a search
    # over everything from scratch (pipeline.similarity.grouping.near_links over all kept files).
    import numpy as np
    from pipeline.similarity.grouping import near_links
    from pipeline.store.ledger import Ledger
    corpus = tmp_path / "corpus"
    shutil.copytree(DEMO, corpus)
    later = sorted(corpus.rglob("*.mid"))[::7]
    held = tmp_path / "held"
    held.mkdir()
    for i, p in enumerate(later):
        shutil.move(p, held / f"{i}_{p.name}")
    raw = yaml.safe_load((ROOT / "configs" / "default.yaml").read_text())
    for entry in raw["stages"]:
        if "dedup" in entry:
            entry["dedup"] = {"threshold": 0.95}  # let near-duplicates survive so the split links them
    cfg_path = tmp_path / "c.yaml"
    cfg_path.write_text(yaml.safe_dump(raw))
    out = tmp_path / "out"
    _run(out, input_dir=corpus, config=cfg_path)
    (corpus / "added").mkdir()
    for p in held.iterdir():
        shutil.copy(p, corpus / "added" / p.name)
    _run(out, input_dir=corpus, config=cfg_path)
    cfg = load_config(cfg_path)
    dedup = next(s.build() for s in cfg.stages if s.name == "dedup")
    split = next(s.build() for s in cfg.stages if s.name == "split")
    kept = {r["sha256"] for r in _manifest(out) if r["status"] == "kept"}
    with Ledger(out / "state.sqlite") as ledger:
        saved = ledger.state_for("split")["links"]
        arts = ledger.artifacts_for("dedup", dedup.artifact_fingerprint, kept)
    sigs = {sha[:16]: np.asarray(a["signature"], dtype=np.uint32) for sha, a in arts.items()}
    shingles = {sha[:16]: np.asarray(a["shingles"], dtype=np.uint64) for sha, a in arts.items()}
    full = sorted((a, b) for a, b, _ in near_links(sigs, split.opts["group_threshold"], shingles))
    assert len(full) >= 2
    assert sorted(map(tuple, saved["links"])) == full


def test_tasks_travel_to_workers_unchanged():
    """A task survives pickling field for field, whether its plans carry cached verdicts or
    not (the plan objects shared by many tasks)."""
    import pickle
    from multiprocessing.reduction import ForkingPickler

    from pipeline.store.records import Compactor
    from pipeline.engine.worker import FileTask, StagePlan

    cfg = load_config(ROOT / "configs" / "default.yaml", input=str(DEMO), output="/tmp/x", workers=1)
    runner = Runner(cfg, quiet=True)
    shared = [StagePlan(s.name, s.opts, s.kind, True, fingerprint=s.fingerprint) for s in runner.stages]
    cached = Compactor().make(True, None, "ok", {"tonic": "C", "augment": []}, {"min": 1})
    mixed = [shared[0], StagePlan("transpose", {}, "file", False, cached, "fp")] + shared[2:]

    def fields(task):
        return [task.sha256, task.path, task.source, task.render, task.output_fp,
                [(p.name, p.options, p.kind, p.compute, p.cached, p.fingerprint) for p in task.stages]]

    for plans in (shared, mixed, shared):
        for n in range(2):
            task = FileTask("ab" * 32, f"/in/{n}.mid", f"{n}.mid", list(plans), "/out/.staging", "fp16")
            back = pickle.loads(ForkingPickler.dumps(task))
            assert fields(back) == fields(task)


@pytest.mark.skipif(not Path("/proc/self/fd").is_dir(), reason="needs /proc (Linux)")
def test_pipeline_workers_hold_no_handle_on_the_state_database(tmp_path, monkeypatch):
    # the executor contract of the throughput issue: no open database handle in a worker
    import os
    from pipeline.stages.key_meter import KeyMeter
    real = KeyMeter.process
    seen = tmp_path / "seen.txt"

    def looking(self, piece, ctx):  # inherited by the forked workers
        with open(seen, "a", encoding="utf-8") as fh:
            fh.write(f"probe {os.getpid()}\n")
            for name in os.listdir("/proc/self/fd"):
                try:
                    fh.write(os.readlink(f"/proc/self/fd/{name}") + "\n")
                except OSError:
                    pass
        return real(self, piece, ctx)
    monkeypatch.setattr(KeyMeter, "process", looking)
    out = tmp_path / "out"
    _run(out, workers=2)
    opened = seen.read_text(encoding="utf-8").splitlines()
    probes = {p for p in opened if p.startswith("probe ")}
    assert probes and f"probe {os.getpid()}" not in probes  # it ran, in the workers
    assert not [p for p in opened if "state.sqlite" in p or ".midisift.lock" in p]


def test_a_run_leaves_the_cyclic_collector_as_it_found_it(tmp_path, monkeypatch):
    # A run holds its records out of the collector's passes (gc.freeze, speed) and must give
    # them back: a program that runs the pipeline, then goes on, keeps a normal collector.
    import gc
    assert gc.isenabled()
    _run(tmp_path / "a")
    assert gc.isenabled() and gc.get_freeze_count() == 0
    gc.disable()
    try:
        _run(tmp_path / "b")
        assert not gc.isenabled() and gc.get_freeze_count() == 0  # a caller's choice is kept
    finally:
        gc.enable()
    from pipeline.stages.split import Split

    def failing(self, members, state):
        raise RuntimeError("planted failure inside the stage walk")
    monkeypatch.setattr(Split, "run_corpus", failing)
    with pytest.raises(RuntimeError, match="planted failure"):
        _run(tmp_path / "c")
    assert gc.isenabled() and gc.get_freeze_count() == 0


def test_a_rerun_reads_the_shingle_sets_of_compared_files_only(tmp_path, monkeypatch):
    # Shingle sets (dedup's largest artifact) stay in the ledger until a pair or a cluster of
    # several needs them; a rerun adding files must not read every file's set, and its outputs
    # must be those of a run that read them all (the pre-deferral behaviour, forced here).
    from pipeline.store.ledger import _ArrayRows
    from pipeline.stages.dedup import Dedup
    corpus = tmp_path / "corpus"
    shutil.copytree(DEMO, corpus)
    held = tmp_path / "held"
    held.mkdir()
    for i, p in enumerate(sorted(corpus.rglob("*.mid"))[:2]):
        shutil.move(p, held / f"{i}_{p.name}")
    out, eager_out = tmp_path / "out", tmp_path / "eager"
    _run(out, input_dir=corpus)
    shutil.copytree(out, eager_out)
    (corpus / "added").mkdir()
    for p in held.iterdir():
        shutil.copy(p, corpus / "added" / p.name)
    fetched: list[str] = []
    real_fetch = _ArrayRows.fetch
    monkeypatch.setattr(_ArrayRows, "fetch", lambda self, shas: fetched.extend(shas) or real_fetch(self, shas))
    _run(out, input_dir=corpus)
    reached = {r["sha256"] for r in _manifest(out) if r.get("cluster") is not None}  # dedup's members
    assert fetched, "no shingle set was read from the ledger (deferral off, or nothing compared)"
    assert set(fetched) <= reached and len(set(fetched)) <= len(reached) // 4, (len(set(fetched)), len(reached))
    monkeypatch.setattr(Dedup, "deferred_artifacts", ())
    _run(eager_out, input_dir=corpus)
    for name in ("manifest.jsonl", "splits/train.txt", "splits/valid.txt", "splits/test.txt"):
        assert (out / name).read_bytes() == (eager_out / name).read_bytes(), name


def test_byte_identical_copies_tell_one_story(tmp_path, capsys):
    """A byte-identical copy is dropped by dedup as exact_duplicate of its twin even when a
    later stage drops the twin; manifest, explain and summary agree; a copy's detail never
    names its twin's path (the verdict of a content is shared by every path holding it)."""
    from fixtures_midi import random_midi
    corpus = tmp_path / "in"
    corpus.mkdir()
    short = random_midi(3, n_notes=40)  # a few seconds: filter drops it as too_short
    for name in ("twin_a.mid", "twin_b.mid"):
        (corpus / name).write_bytes(short)
    for name in ("text_a.mid", "text_b.mid"):
        (corpus / name).write_text("not a midi file at all")
    out = tmp_path / "out"
    _run(out, input_dir=corpus)
    rows = {r["source"]: r for r in _manifest(out)}
    assert (rows["twin_a.mid"]["stage"], rows["twin_a.mid"]["reason"]) == ("filter", "too_short")
    copy = rows["twin_b.mid"]
    assert (copy["stage"], copy["reason"]) == ("dedup", "exact_duplicate")
    assert copy["detail"].startswith("byte-identical copy of")
    stages = json.loads((out / "summary.json").read_text())["stages"]
    assert stages["dedup"]["dropped"] == {"exact_duplicate": 1}
    assert stages["filter"] == {"dropped": {"too_short": 1}, "reached": 1}
    assert main(["explain", "twin_b.mid", "--output", str(out)]) == 0
    assert "dropped by dedup: exact_duplicate" in capsys.readouterr().out
    for name in ("text_a.mid", "text_b.mid"):
        assert rows[name]["reason"] == "not_midi"
        assert "text_a" not in rows[name]["detail"] and "text_b" not in rows[name]["detail"]


def test_empty_input_and_empty_parts_are_warned_about(tmp_path, capsys):
    """Exit 0, but the table and summary.json say what a user must not miss; every
    configured part gets its (possibly empty) list; leakage says there is nothing to audit."""
    empty = tmp_path / "empty"
    empty.mkdir()
    out = tmp_path / "out"
    args = ["run", str(ROOT / "configs" / "default.yaml"), "--input", str(empty), "--output", str(out),
            "--workers", "1"]
    assert main(args) == 0
    assert "warning: the input folder holds no" in capsys.readouterr().out
    assert sorted(p.name for p in (out / "splits").iterdir()) == ["test.txt", "train.txt", "valid.txt"]
    assert main(["leakage", str(out)]) == 0
    assert "nothing to audit" in capsys.readouterr().out

    from fixtures_midi import random_midi
    one = tmp_path / "one"
    one.mkdir()
    (one / "a.mid").write_bytes(random_midi(5, n_notes=400))
    out1 = tmp_path / "out1"
    assert main(["run", str(ROOT / "configs" / "default.yaml"), "--input", str(one), "--output", str(out1),
                 "--workers", "1"]) == 0
    text = capsys.readouterr().out
    summary = json.loads((out1 / "summary.json").read_text())
    assert summary["counts"]["kept"] == 1  # one file fills one part; the two others are empty
    empty_parts = [p for p, n in summary["split"]["files"].items() if n == 0]
    assert len(empty_parts) == 2
    assert all(f"warning: part '{p}' is empty" in text for p in empty_parts)
    assert all((out1 / "splits" / f"{p}.txt").read_text() == "" for p in empty_parts)
    assert summary["warnings"] and summary["warnings"] == [
        line[len("warning: "):] for line in text.splitlines() if line.startswith("warning: ")]


def test_progress_bars_end_full_and_count_what_the_table_counts(tmp_path, monkeypatch):
    """Each per-file bar ends at its total although files drop at earlier stages; the first
    bar's total is the table's "contents decoded"."""
    made = []

    class Bar:
        def __init__(self, desc, total, position=0):
            self.desc, self.total, self.n = desc, total, 0
            made.append(self)

        def update(self, n=1):
            self.n += n

        def refresh(self):
            pass

        def close(self):
            pass

    monkeypatch.setattr(Runner, "_bar", lambda self, desc, total, position=0: Bar(desc, total, position))
    report = _run(tmp_path / "out")
    # in config order while workers run (dedup's per-file signatures in its place), then the
    # corpus steps of the corpus stages
    assert [b.desc for b in made] == ["validate", "transpose", "key_meter", "dedup", "filter",
                                      "dedup (corpus)", "split (corpus)"]
    assert made[0].total == report.computed
    assert all(b.n == b.total for b in made[:5]), [(b.desc, b.n, b.total) for b in made]
    assert made[4].total < made[0].total  # files dropped by validate never reach filter


def test_changing_a_corpus_step_option_decodes_nothing(tmp_path):
    """A per-file result is a pure function of the source and its stage's options; dedup's
    per-file artifacts depend only on the options its prepare step reads, so a new threshold
    re-runs the corpus step alone (and still changes its verdicts)."""
    raw = yaml.safe_load((ROOT / "configs" / "default.yaml").read_text())
    out = tmp_path / "out"
    counts = []
    for threshold in (0.3, 0.9):
        for entry in raw["stages"]:
            if "dedup" in entry:
                entry["dedup"] = {**(entry["dedup"] or {}), "threshold": threshold}
        cfg_path = tmp_path / f"cfg{threshold}.yaml"
        cfg_path.write_text(yaml.safe_dump(raw))
        report = _run(out, config=cfg_path)
        counts.append((report.computed, report.dropped.get(("dedup", "near_duplicate"), 0)))
    (first_computed, near_low), (second_computed, near_high) = counts
    assert first_computed > 0 and second_computed == 0
    assert near_high < near_low


def test_changing_the_split_seed_without_dedup_decodes_nothing(tmp_path):
    """Without dedup the split signs files itself; its signatures depend on what it signs
    with, not on its ratios or seed, so a new seed only re-runs the corpus step."""
    raw = yaml.safe_load((ROOT / "configs" / "default.yaml").read_text())
    raw["stages"] = [e for e in raw["stages"] if "dedup" not in e]
    out = tmp_path / "out"
    computed = []
    for seed in (0, 5):
        for entry in raw["stages"]:
            if "split" in entry:
                entry["split"] = {**(entry["split"] or {}), "seed": seed}
        cfg_path = tmp_path / f"cfg{seed}.yaml"
        cfg_path.write_text(yaml.safe_dump(raw))
        computed.append(_run(out, config=cfg_path).computed)
    assert computed[0] > 0 and computed[1] == 0


def test_a_new_dedup_corpus_step_decodes_nothing_and_equals_a_fresh_run(tmp_path, monkeypatch):
    """Dedup's stored per-file artifacts, and the split's signatures, are keyed by dedup's
    ``signature_version`` (what ``prepare`` computes), not its ``version``: a new corpus step
    re-runs over the stored signatures (links compared all against all again), decodes no file,
    and writes what a fresh run writes; a new signature version re-signs the files."""
    from pipeline.stages.dedup import Dedup
    out, fresh = tmp_path / "out", tmp_path / "fresh"
    _run(out)
    monkeypatch.setattr(Dedup, "version", Dedup.version + 1)
    again = _run(out)
    assert again.computed == 0
    assert any("dedup:" in n and "all against all" in n for n in again.notes), again.notes
    _run(fresh)
    assert _manifest(out) == _manifest(fresh)
    assert [(out / "splits" / p).read_text() == (fresh / "splits" / p).read_text()
            for p in ("train.txt", "valid.txt", "test.txt")] == [True] * 3
    monkeypatch.setattr(Dedup, "signature_version", Dedup.signature_version + 1)
    assert _run(out).computed > 0


def test_a_new_split_corpus_step_without_dedup_re_signs_no_file(tmp_path, monkeypatch):
    """Without dedup the split signs files itself; those signatures are keyed by the split's
    ``signature_version``, not its ``version``: a new corpus step decodes nothing and writes
    what a fresh run writes; a new signature version re-signs the files."""
    from pipeline.stages.split import Split
    raw = yaml.safe_load((ROOT / "configs" / "default.yaml").read_text())
    raw["stages"] = [e for e in raw["stages"] if "dedup" not in e]
    cfg_path = tmp_path / "cfg.yaml"
    cfg_path.write_text(yaml.safe_dump(raw))
    out, fresh = tmp_path / "out", tmp_path / "fresh"
    assert _run(out, config=cfg_path).computed > 0
    monkeypatch.setattr(Split, "version", Split.version + 1)
    assert _run(out, config=cfg_path).computed == 0
    _run(fresh, config=cfg_path)
    assert _manifest(out) == _manifest(fresh)
    monkeypatch.setattr(Split, "signature_version", Split.signature_version + 1)
    assert _run(out, config=cfg_path).computed > 0


def test_explain_json_is_the_same_trail_as_data(demo_out, capsys):
    row = next(r for r in _manifest(demo_out) if r["status"] == "dropped" and r["stage"] == "dedup")
    assert main(["explain", row["source"], "--output", str(demo_out), "--json"]) == 0
    (data,) = json.loads(capsys.readouterr().out)
    assert (data["source"], data["id"], data["status"], data["stage"], data["reason"]) == \
        (row["source"], row["id"], "dropped", "dedup", row["reason"])
    assert [s["stage"] for s in data["trail"]] == ["validate", "transpose", "key_meter", "dedup"]
    assert data["trail"][-1]["values"]["duplicate_of"] == row["duplicate_of"]


def test_run_help_lists_every_reason_retry_failed_covers(capsys):
    from pipeline.reasons import RETRYABLE
    with pytest.raises(SystemExit):
        main(["run", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert all(code in text for code in (*RETRYABLE, "too_large"))


def test_member_artifacts_read_and_write_like_the_dict_they_replace():
    # the walk's members hold their artifacts in a MemberArtifacts (memory); every operation a
    # stage or the walk makes on it gives what a plain dict gives (the dict is the reference)
    from pipeline.engine.walk import MemberArtifacts
    got, want = MemberArtifacts("split", None), {"split": None}
    steps = [("set", "dedup", 1), ("set", "split", 2), ("set", "filter", 3), ("del", "dedup", None),
             ("set", "dedup", 4), ("del", "filter", None)]
    for op, name, value in steps:
        if op == "set":
            got[name], want[name] = value, value
        else:
            del got[name], want[name]
        assert dict(got) == want and list(got) == list(want) and len(got) == len(want)
        for k in ("dedup", "split", "filter", "other"):
            assert (k in got) == (k in want) and got.get(k, "none") == want.get(k, "none")
    with pytest.raises(KeyError):
        got["other"]
    with pytest.raises(KeyError):
        del got["other"]
    # emptied and filled again (the first row is held apart from the others)
    for name in list(want):
        del got[name], want[name]
    assert dict(got) == want == {} and len(got) == 0
    got["split"], want["split"] = 5, 5
    got["dedup"], want["dedup"] = 6, 6
    assert dict(got) == want and list(got) == list(want)
    # members that went through the same stages share one tuple of names
    a, b = MemberArtifacts("dedup", 1), MemberArtifacts("dedup", 2)
    a["split"], b["split"] = 3, 4
    assert a._names is b._names


def test_walk_member_reads_like_the_member_it_replaces():
    # a corpus step's members are made when read, each making its values (the content's
    # trail), source (the content's first source), artifacts (the stage's own row, then those
    # of the stages it reads) and source fields when read (memory); a Member holding the same
    # things is the reference, field by field
    from pipeline.engine.walk import ContentValues, MemberArtifacts, StepMembers, Walk, WalkMember
    from pipeline.metadata import Metadata
    from pipeline.stages import Member
    from pipeline.stages.split import Split
    from pipeline.store.records import Compactor
    sha, other = "ab" * 32, "cd" * 32
    walk = Walk(stage_names=["dedup", "split"], index={sha: 0, other: 1}, stages_done=1,
                rep={sha: "a/x.mid", other: "b/y.mid"},
                corpus={"dedup": {s: Compactor().make(True, None, "", {"cluster": s[:16], "cluster_size": 2}, {})
                                  for s in (sha, other)}},
                artifacts={"dedup": {sha: {"signature": 1}}})
    split = Split({"group_fields": ["composer"]})
    split.borrows = "dedup"
    meta = Metadata(columns=("composer",), rows={"a/x.mid": {"composer": "Ann"}})
    members = StepMembers(walk, split, [sha, other], meta)
    assert len(members) == 2 and [m.id for m in members] == members.ids == [sha[:16], other[:16]]
    got = members[0]
    assert isinstance(got, WalkMember) and isinstance(got, Member) and members[-1].sha256 == other
    arts = MemberArtifacts("split", MappingProxyType({}))
    arts["dedup"] = {"signature": 1}
    want = Member(sha[:16], sha, "a/x.mid", ContentValues(walk, sha), arts, outputs=(),
                  meta={"composer": "Ann", "title": "x"})  # the title from the file name's stem
    for f in ("id", "sha256", "source", "artifacts", "outputs", "meta"):
        assert getattr(got, f) == getattr(want, f)
    assert dict(members[1].artifacts) == {"split": {}}  # no dedup row for that content
    assert members[1].meta == {"title": "y"}  # no table row for that source
    assert dict(got.values) == dict(want.values) == {"cluster": sha[:16], "cluster_size": 2}
    assert got.values.get("augment") is None and got.values["cluster_size"] == 2
    with pytest.raises(IndexError):
        members[2]
    assert [m.sha256 for m in members[::-1]] == [other, sha] and members[5:] == []  # as a list slices
    with pytest.raises(AttributeError):
        got.other = 1  # slots: no per-member dict


def test_content_rows_read_like_the_dict_they_replace():
    # a corpus stage's rows by content are a row number per content (memory); the dict
    # {sha: row} they replace is the reference, through reads and contents leaving the walk
    from pipeline.engine.walk import ContentRows

    class Cols:  # the columns' rows: row k of the stage's contents
        def row(self, k):
            return ("row", k)

    order = ["%064x" % k for k in range(8)]
    index = {sha: i for i, sha in enumerate(order)}
    alive = order[1::2] + [order[6]]
    got, want = ContentRows(Cols(), alive, index), {sha: ("row", k) for k, sha in enumerate(alive)}
    for gone in ([], [order[3]], [order[1], order[6]]):
        got.discard(gone)
        for sha in gone:
            del want[sha]
        for sha in order + ["f" * 64]:
            assert got.get(sha) == want.get(sha) and got.get(sha, "none") == want.get(sha, "none")


def test_later_steps_take_the_ids_of_their_survivors():
    # a later corpus step's members share the id texts an earlier step made (memory); the ids
    # looked up by position in the earlier list are the reference, the very same objects
    from pipeline.engine.walk import _ids_of
    alive = ["%064x" % k for k in range(9)]
    ids = [sha[:16] for sha in alive]
    for survivors in ([], alive[:], alive[1::3], [alive[0], alive[8]]):
        got = _ids_of(survivors, alive, ids)
        want = [ids[alive.index(s)] for s in survivors]
        assert got == want and all(g is w for g, w in zip(got, want))
    assert _ids_of(alive[2:], alive, None) is None  # no corpus step yet: none made


def test_content_marks_answer_membership_like_a_set():
    # the contents a run computed are kept as a byte per content index (memory); a set of the
    # marked hashes is the reference, for run contents and for hashes the run does not have
    from pipeline.engine.runner import ContentMarks
    order = ["%064x" % k for k in range(50)]
    marks, want = ContentMarks(dict(zip(order, range(len(order)))), len(order)), set()
    for i in (0, 7, 7, 49, 23):
        marks.mark(i)
        want.add(order[i])
    for sha in order + ["%064x" % 99, ""]:
        assert (sha in marks) == (sha in want)


def test_a_run_without_the_compiled_decoder_says_so(tmp_path, monkeypatch):
    """Without a C compiler the package installs with the pure-Python decoder, and pip shows
    its build warning only with -v (an audit): the run's table says it, every run."""
    import pipeline.engine.runner as runner_module
    inp = tmp_path / "in"
    shutil.copytree(DEMO / "practice", inp)
    monkeypatch.setattr(runner_module, "HAVE_ACCEL", False)
    report = _run(tmp_path / "out", inp)
    assert any("compiled decoder is not installed" in n for n in report.notes)
    monkeypatch.setattr(runner_module, "HAVE_ACCEL", True)
    report = _run(tmp_path / "out2", inp)
    assert not any("compiled decoder" in n for n in report.notes)


def test_progress_bars_on_a_terminal_that_reports_no_width(monkeypatch, tmp_path):
    """A pty without a window size reports 0 columns; tqdm's dynamic width then drew empty
    bars for a whole run (an audit): such a terminal gets 80 columns, a sized one its own."""
    import io
    import os
    import sys
    cfg = load_config(ROOT / "configs" / "default.yaml", input=str(DEMO), output=str(tmp_path / "out"))
    runner = Runner(cfg, quiet=False)
    fake = io.StringIO()
    fake.isatty = lambda: True  # type: ignore[method-assign]
    fake.fileno = lambda: 2  # type: ignore[method-assign]
    monkeypatch.setattr(sys, "stderr", fake)
    for cols, expect in ((0, 80), (132, "its own")):
        monkeypatch.setattr(os, "get_terminal_size", lambda fd=2, c=cols: os.terminal_size((c, 24)))
        bar = runner._bar("decode", 10)
        try:
            assert bar.ncols == 80 if expect == 80 else 80 < bar.ncols <= cols
            bar.update(5)
            bar.refresh()
            if expect == 80:  # a bar drawn, 80 columns wide
                line = fake.getvalue().rsplit("\r", 1)[-1]
                assert "5/10" in line and "#" in line and len(line) <= 80
        finally:
            bar.close()
