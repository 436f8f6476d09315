"""The nothing-changed shortcut of ``midisift run`` (pipeline.engine.uptodate).

An up-to-date rerun must be recognised without building the stages (no numpy import), leave
every output byte as it was, and never hide a change: a changed option, a new or removed file or
a missing output sends the run down the normal path. The corpus is the invented demo corpus:
these are checks of our own contract, not of outside references.
"""
from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from pipeline.cli import main
from pipeline.engine.sources import MIDI_SUFFIXES

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "sample_corpus"


def _summary(out: Path) -> dict:
    return json.loads((out / "summary.json").read_text(encoding="utf-8"))


def _runs(out: Path) -> int:
    with sqlite3.connect(out / "state.sqlite") as db:
        return db.execute("SELECT COUNT(*) FROM runs WHERE status='complete'").fetchone()[0]


def _cli(config: Path, inp: Path, out: Path, *extra: str) -> int:
    return main(["run", str(config), "--input", str(inp), "--output", str(out), "--quiet", *extra])


@pytest.fixture()
def corpus(tmp_path) -> Path:
    inp = tmp_path / "in"
    shutil.copytree(DEMO / "sessions", inp / "sessions")
    shutil.copytree(DEMO / "practice", inp / "practice")
    return inp


@pytest.fixture()
def config(tmp_path) -> Path:
    raw = yaml.safe_load((ROOT / "configs" / "default.yaml").read_text())
    p = tmp_path / "cfg.yaml"
    p.write_text(yaml.safe_dump(raw))
    return p


def _snapshot(out: Path) -> dict[str, bytes]:
    return {str(p.relative_to(out)): p.read_bytes() for p in sorted(out.rglob("*"))
            if p.is_file() and p.name not in ("summary.json",) and not p.name.startswith("state.sqlite")}


def test_up_to_date_rerun_imports_no_stage_and_changes_nothing(corpus, config, tmp_path):
    out = tmp_path / "out"
    assert _cli(config, corpus, out, "--workers", "2") == 0
    before = _snapshot(out)
    runs = _runs(out)
    # a fresh interpreter: the shortcut must not import numpy or any stage module
    code = ("import sys; from pipeline.cli import main; "
            f"rc = main(['run', {str(config)!r}, '--input', {str(corpus)!r}, '--output', {str(out)!r}, "
            "'--quiet', '--workers', '1']); "
            "print(rc, 'numpy' in sys.modules, any(m.startswith('pipeline.stages') for m in sys.modules))")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, check=True)
    assert proc.stdout.split() == ["0", "False", "False"], proc.stdout + proc.stderr
    page_before = before.pop("report.html")
    after = _snapshot(out)
    page = after.pop("report.html").decode()
    assert after == before
    summary = _summary(out)
    assert summary["unchanged_since_last_run"] is True
    assert summary["counts"]["computed"] == 0
    # report.html's numbers are summary.json's (found stale by an audit): its part on the run
    # itself is new, the rest of the page is the last run's
    keyed = dict(re.findall(r'data-key="([^"]+)" data-value="([^"]*)"', page))
    assert keyed["counts.computed"] == "0" and keyed["counts.reused"] == str(summary["counts"]["reused"])
    assert {k for k in keyed if k.startswith("timings_s.")} == {f"timings_s.{k}" for k in summary["timings_s"]}
    cut = page.index("<h2>Timings and reuse</h2>")
    assert page_before.decode().startswith(page[:cut])
    assert _runs(out) == runs + 1  # the rerun is logged like any run


def test_touched_file_with_the_same_bytes_stays_up_to_date(corpus, config, tmp_path):
    out = tmp_path / "out"
    assert _cli(config, corpus, out) == 0
    victim = next(p for p in sorted(corpus.rglob("*.mid")))
    st = victim.stat()
    os.utime(victim, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    assert _cli(config, corpus, out) == 0
    assert _summary(out).get("unchanged_since_last_run") is True
    rel = victim.relative_to(corpus).as_posix()
    with sqlite3.connect(out / "state.sqlite") as db:
        (mtime,) = db.execute("SELECT mtime_ns FROM sources WHERE path=?", (rel,)).fetchone()
    assert mtime == st.st_mtime_ns + 10**9  # the new mtime is recorded: no rehash next time


def _rows(out: Path) -> dict[str, dict]:
    rows = (json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines())
    # the output's part left out: a rerun keeps a file's part where a fresh run may place it
    # in another (README, Split leakage)
    return {r["source"]: {**{k: r[k] for k in ("id", "sha256", "status", "reason")},
                          "output": r["output"] and Path(r["output"]).name} for r in rows}


@pytest.mark.parametrize("how", ["swap", "copy_over"])
def test_contents_moved_between_known_files_are_seen(how, corpus, config, tmp_path):
    """Two files' bytes swapped, or one file copied over another, with no file added or removed:
    every content is one the ledger knows, and the manifest must follow the bytes at each path
    as a fresh run's does (an audit found the check recording the new hashes, after which the
    run saw no change and copied the old rows: a kept file's row naming a dropped content)."""
    out, fresh = tmp_path / "out", tmp_path / "fresh"
    assert _cli(config, corpus, out) == 0
    rows = _rows(out)
    kept = next(s for s, r in sorted(rows.items()) if r["status"] == "kept")
    other = next(s for s, r in sorted(rows.items()) if r["sha256"] != rows[kept]["sha256"])
    a, b = corpus / kept, corpus / other
    if how == "swap":
        data_a, data_b = a.read_bytes(), b.read_bytes()
        a.write_bytes(data_b)
        b.write_bytes(data_a)
    else:
        shutil.copyfile(b, a)
    assert _cli(config, corpus, out) == 0
    assert _cli(config, corpus, fresh) == 0
    assert _rows(out)[kept]["sha256"] == _rows(fresh)[kept]["sha256"] != rows[kept]["sha256"]
    assert _rows(out) == _rows(fresh)
    changes = _summary(out)["changes_since_last_run"]
    assert (changes["files_added"], changes["files_changed"], changes["files_removed"]) == \
        ((0, 2, 0) if how == "swap" else (0, 1, 0))


@pytest.mark.parametrize("change", ["option", "new_file", "removed_file", "missing_output", "fresh",
                                    "split_line_added", "manifest_row_added", "stray_output",
                                    "stray_split_list", "split_list_unsorted"])
def test_any_change_takes_the_normal_path(change, corpus, config, tmp_path):
    out = tmp_path / "out"
    assert _cli(config, corpus, out) == 0
    assert _cli(config, corpus, out) == 0
    assert _summary(out).get("unchanged_since_last_run") is True
    extra: tuple[str, ...] = ()
    if change == "option":
        raw = yaml.safe_load(config.read_text())
        for entry in raw["stages"]:
            if "filter" in entry:
                entry["filter"] = dict(entry["filter"] or {}, min_notes=40)
        config.write_text(yaml.safe_dump(raw))
    elif change == "new_file":
        src = next(p for p in sorted(corpus.rglob("*.mid")))
        shutil.copy2(src, corpus / "a_new_copy.mid")
    elif change == "removed_file":
        next(p for p in sorted(corpus.rglob("*.mid"))).unlink()
    elif change == "missing_output":
        next(p for p in sorted((out / "midi").rglob("*.mid"))).unlink()
    elif change in ("split_line_added", "manifest_row_added"):  # found kept by an audit
        listed = (out / "splits" / "train.txt") if change == "split_line_added" else out / "manifest.jsonl"
        before = listed.read_bytes()
        line = b"midi/train/0000000000000000.mid\n" if change == "split_line_added" else \
            before.splitlines(keepends=True)[0].replace(b'"source": "', b'"source": "ghost/')
        listed.write_bytes(before + line)
    elif change == "stray_output":  # the next three found kept by a second audit
        (out / "midi" / "train" / "0000000000000000.mid").write_bytes(b"MThd")
    elif change == "stray_split_list":
        (out / "splits" / "extra.txt").write_text("midi/extra/0000000000000000.mid\n")
    elif change == "split_list_unsorted":
        train = out / "splits" / "train.txt"
        lines = train.read_text().splitlines(keepends=True)
        assert len(lines) > 1
        train.write_text("".join(reversed(lines)))
    else:
        extra = ("--fresh",)
    assert _cli(config, corpus, out, *extra) == 0
    summary = _summary(out)
    assert not summary.get("unchanged_since_last_run")
    rows = [json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines()]
    assert sorted(r["source"] for r in rows) == sorted(
        p.relative_to(corpus).as_posix() for p in corpus.rglob("*") if p.suffix.lower() in MIDI_SUFFIXES)
    if change == "missing_output":  # the normal run puts the file back
        kept = [r for r in rows if r["status"] == "kept"]
        assert all((out / r["output"]).is_file() for r in kept)
    if change == "option":
        assert summary["options"]["filter"]["min_notes"] == 40
    if change == "split_line_added":  # the normal run writes the list again
        assert "0000000000000000" not in (out / "splits" / "train.txt").read_text()
    if change == "manifest_row_added":
        assert not any(r["source"].startswith("ghost/") for r in rows)
    if change == "stray_output":  # the normal run removes what it did not write
        assert not (out / "midi" / "train" / "0000000000000000.mid").exists()
    if change == "stray_split_list":
        assert not (out / "splits" / "extra.txt").exists()
    if change == "split_list_unsorted":
        lines = (out / "splits" / "train.txt").read_text().splitlines()
        assert lines == sorted(lines)


def test_the_run_after_the_check_reuses_its_listing(corpus, config, tmp_path, monkeypatch):
    """When the up-to-date check finds work to do, the run that follows uses the check's
    listing of the input folder instead of walking it a second time."""
    from pipeline.engine import runner, sources
    out = tmp_path / "out"
    assert _cli(config, corpus, out) == 0
    shutil.copy2(next(p for p in sorted(corpus.rglob("*.mid"))), corpus / "a_new_copy.mid")
    calls = []
    real = sources.discover

    def counting(*a, **k):
        calls.append(a[0])
        return real(*a, **k)
    monkeypatch.setattr(sources, "discover", counting)
    monkeypatch.setattr(runner, "discover", counting)
    assert _cli(config, corpus, out) == 0
    assert len(calls) == 1
    rows = [json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines()]
    assert "a_new_copy.mid" in {r["source"] for r in rows}


def test_a_run_records_each_file_as_the_file_system_gives_it(corpus, config, tmp_path):
    # the run holds the sizes and mtimes as columns (memory, sources.SourceTable): what it
    # recorded for the next run's check must still be each file's own (os.stat is the
    # reference), on the first run and on a run after a change
    out = tmp_path / "out"
    for round_ in range(2):
        assert _cli(config, corpus, out) == 0
        with sqlite3.connect(out / "state.sqlite") as db:
            rows = {p: (s, m) for p, s, m in db.execute("SELECT path, size, mtime_ns FROM sources")}
        want = {}
        for p in corpus.rglob("*"):
            if p.is_file() and p.suffix.lower() in MIDI_SUFFIXES:
                st = p.stat()
                want[p.relative_to(corpus).as_posix()] = (st.st_size, st.st_mtime_ns)
        assert rows == want and want
        victim = sorted(corpus.rglob("*.mid"))[0]
        st = victim.stat()
        os.utime(victim, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))


@pytest.mark.parametrize("where, key, value, message", [
    ("config", "workers", "two", "workers must be 'auto' or a whole number >= 1, got 'two'"),
    ("cli", "--workers", "abc", "workers must be 'auto' or a whole number >= 1, got 'abc'"),
    ("cli", "--workers", "0", "workers must be 'auto' or a whole number >= 1, got 0"),
    ("cli", "--executor", "bogus", "executor must be 'local' or a Dask scheduler's address"),
    ("config", "executor", "bogus", "executor must be 'local' or a Dask scheduler's address")])
def test_a_bad_workers_or_executor_exits_2_on_an_up_to_date_folder(where, key, value, message, corpus,
                                                                    config, tmp_path, capsys):
    """README, Commands: bad usage or bad config exits 2 and writes nothing. ``workers`` and
    ``executor`` are left out of ``quick_key``, so before this check they passed as up to date
    (exit 0) on a folder whose last run was complete, and exited 2 only on a new folder."""
    out = tmp_path / "out"
    assert _cli(config, corpus, out) == 0
    before, runs = _snapshot(out), _runs(out)
    extra: tuple[str, ...] = ()
    if where == "config":
        raw = yaml.safe_load(config.read_text())
        raw[key] = value
        config.write_text(yaml.safe_dump(raw))
    else:
        extra = (key, value)
    capsys.readouterr()
    assert _cli(config, corpus, out, *extra) == 2
    assert message in capsys.readouterr().err
    assert _snapshot(out) == before and _runs(out) == runs


@pytest.mark.parametrize("text, message", [
    (b"workers: 1\nworkers: 2\n", "workers: key 'workers' is given twice (line "),
    (b"# \xfcber\n", ": 0xfc); save the file as UTF-8")])
def test_a_config_the_loader_refuses_exits_2_on_an_up_to_date_folder(text, message, corpus, config,
                                                                     tmp_path, capsys):
    """The nothing-changed check reads the config through the same loader as the normal run, so
    a key given twice (YAML 1.2, 3.2.1.1: keys are unique) or a byte that is not UTF-8 exits 2
    with the file and line named, never a traceback, and writes nothing."""
    out = tmp_path / "out"
    assert _cli(config, corpus, out) == 0
    before, runs = _snapshot(out), _runs(out)
    config.write_bytes(config.read_bytes() + text)
    capsys.readouterr()
    assert _cli(config, corpus, out) == 2
    err = capsys.readouterr().err
    assert f"{config}: " in err and message in err
    assert _snapshot(out) == before and _runs(out) == runs


def _edit_keeping_stat(path: Path) -> None:
    """One byte of ``path`` changed, its size and modification time as they were (as `touch
    -r`, or `cp -p` of another file of the same size, leave a file)."""
    st = path.stat()
    data = bytearray(path.read_bytes())
    at = data.index(b"MTrk") + 8 + 1  # inside the first track's first event
    data[at] ^= 0x01
    path.write_bytes(bytes(data))
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))


def test_fresh_hashes_every_file_again(corpus, config, tmp_path):
    """``--fresh`` trusts no recorded hash: a file whose bytes changed under a kept size and
    modification time is read as it is (an audit: it was dropped as changed_during_run on
    this and every later run)."""
    out = tmp_path / "out"
    assert _cli(config, corpus, out) == 0
    victim = corpus / next(s for s, r in sorted(_rows(out).items()) if r["status"] == "kept")
    _edit_keeping_stat(victim)
    assert _cli(config, corpus, out, "--fresh") == 0
    rel = victim.relative_to(corpus).as_posix()
    row = _rows(out)[rel]
    assert row["sha256"] == hashlib.sha256(victim.read_bytes()).hexdigest()
    assert row["reason"] != "changed_during_run"


def test_a_file_read_as_changed_is_hashed_again_next_run(corpus, config, tmp_path):
    """A content found changed when a worker read it (``changed_during_run``) is not passed as
    known by its stat on the next run, which hashes the file again and judges it."""
    out = tmp_path / "out"
    assert _cli(config, corpus, out) == 0
    victim = corpus / next(s for s, r in sorted(_rows(out).items()) if r["status"] == "kept")
    rel = victim.relative_to(corpus).as_posix()
    _edit_keeping_stat(victim)
    raw = yaml.safe_load(config.read_text())  # another validate option: every file read again
    raw["stages"][0] = {"validate": {**(raw["stages"][0]["validate"] or {}), "max_events": 1999999}}
    config.write_text(yaml.safe_dump(raw))
    assert _cli(config, corpus, out) == 0
    assert _rows(out)[rel]["reason"] == "changed_during_run"  # the recorded hash, then other bytes
    assert _cli(config, corpus, out) == 0
    row = _rows(out)[rel]
    assert row["sha256"] == hashlib.sha256(victim.read_bytes()).hexdigest()
    assert row["reason"] != "changed_during_run"
