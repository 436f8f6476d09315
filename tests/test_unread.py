"""A file a worker cannot read as the content it was hashed as: gone for a moment, a disk
dropped, rewritten after it was hashed. Such a verdict belongs to the moment, not to the bytes:
it is never cached, never called a crash, and the next run reads the file again.

The race is opened by wrapping the runner's fingerprint step (the files are listed and hashed,
then changed before the workers read them)."""
from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import pytest

from pipeline.config import load_config
from pipeline.engine import runner
from pipeline.engine.runner import Runner
from pipeline.tools.synth import main_synth

CONFIG = "stages: [validate, key_meter, dedup, split]\n"


@pytest.fixture(scope="module")
def pieces(tmp_path_factory) -> list[Path]:
    d = tmp_path_factory.mktemp("synth")
    main_synth(d, 8, seed=4, planted=0.0)
    return sorted(d.rglob("*.mid"))


def run(tmp_path: Path, inp: Path, out: Path):
    cfg = tmp_path / "cfg.yaml"
    cfg.write_text(f"input: {inp}\noutput: {out}\nworkers: 1\n" + CONFIG)
    return Runner(load_config(cfg), quiet=True).run()


def rows(out: Path) -> dict[str, dict]:
    return {r["source"]: r for r in map(json.loads, (out / "manifest.jsonl").read_text().splitlines())}


def judged(rows: dict[str, dict]) -> dict[str, dict]:
    """The rows without the part a kept file was placed in."""
    return {src: {k: v for k, v in r.items() if k not in ("split", "output", "detail") or r["status"] != "kept"}
            for src, r in rows.items()}


def after_hashing(monkeypatch, action) -> None:
    """Run ``action`` once the run has listed and hashed its files (the race window)."""
    orig = runner.fingerprint

    def fingerprint(*a, **k):
        res = orig(*a, **k)
        action()
        return res
    monkeypatch.setattr(runner, "fingerprint", fingerprint)


@pytest.mark.parametrize("what", ["file", "folder"])
def test_a_file_missing_while_read_is_unreadable_not_cached_and_read_again(pieces, tmp_path,
                                                                          monkeypatch, what):
    inp = tmp_path / "in"
    inp.mkdir()
    for i, p in enumerate(pieces[:5]):
        shutil.copy(p, inp / f"f{i}.mid")
    victim = inp / "f0.mid"
    saved = victim.read_bytes()
    away = tmp_path / "away"
    after_hashing(monkeypatch, (lambda: victim.unlink()) if what == "file" else (lambda: inp.rename(away)))
    out = tmp_path / "out"
    run(tmp_path, inp, out)
    first = rows(out)
    lost = ["f0.mid"] if what == "file" else sorted(first)
    for src in lost:
        r = first[src]
        assert (r["status"], r["stage"], r["reason"]) == ("dropped", "validate", "unreadable"), r
        assert "No such file or directory" in r["detail"] and "ENOENT" in r["detail"]
        assert "bug" not in r["detail"]
    summary = json.loads((out / "summary.json").read_text())
    assert summary["stages"]["validate"]["dropped"]["unreadable"] == len(lost)
    assert any("unreadable" in w for w in summary["warnings"])
    assert summary["counts"]["state_key"] is None and summary["counts"]["quick_key"] is None

    monkeypatch.undo()  # everything back, the same bytes
    if what == "folder":
        away.rename(inp)
    else:
        victim.write_bytes(saved)
    run(tmp_path, inp, out)
    again = rows(out)
    clean = tmp_path / "clean"
    run(tmp_path, inp, clean)
    assert again == rows(clean)
    assert all(r["reason"] != "unreadable" for r in again.values())
    assert json.loads((out / "summary.json").read_text())["counts"]["state_key"] is not None


def test_a_file_rewritten_after_hashing_is_not_judged_under_its_old_hash(pieces, tmp_path, monkeypatch):
    inp = tmp_path / "in"
    inp.mkdir()
    shutil.copy(pieces[0], inp / "a_victim.mid")  # the content's first source: the one read
    shutil.copy(pieces[0], inp / "b_copy.mid")  # the same bytes, never touched
    for i, p in enumerate(pieces[2:5]):
        shutil.copy(p, inp / f"c{i}.mid")
    after_hashing(monkeypatch, lambda: shutil.copy(pieces[1], inp / "a_victim.mid"))
    out = tmp_path / "out"
    run(tmp_path, inp, out)
    first = rows(out)
    for src in ("a_victim.mid", "b_copy.mid"):
        assert first[src]["reason"] == "changed_during_run", first[src]
        assert "a_victim.mid" in first[src]["detail"]
    monkeypatch.undo()
    run(tmp_path, inp, out)  # the rerun: neither source carries the other content's results
    clean = tmp_path / "clean"
    run(tmp_path, inp, clean)
    # (the split keeps its parts across runs: where the first run put a file may differ)
    assert judged(rows(out)) == judged(rows(clean))
    assert rows(out)["b_copy.mid"]["status"] == rows(out)["a_victim.mid"]["status"] == "kept"


def test_read_source_checks_the_whole_file_and_names_the_os_error(tmp_path):
    import hashlib
    from pipeline.engine.worker import SourceUnread, read_source
    p = tmp_path / "x.mid"
    p.write_bytes(b"MThd" + bytes(100))
    sha = hashlib.sha256(p.read_bytes()).hexdigest()
    size = len(p.read_bytes())
    assert read_source(str(p), sha, 1000) == (p.read_bytes(), size)
    assert read_source(str(p), sha, 10) == (p.read_bytes()[:11], size)  # past the limit: hashed, not kept
    with pytest.raises(SourceUnread) as e:
        read_source(str(p), "0" * 64, 10)
    assert e.value.reason == "changed_during_run"
    p.chmod(0)
    if os.geteuid() != 0 or not os.access(p, os.R_OK):
        with pytest.raises(SourceUnread) as e:
            read_source(str(p), sha, 1000)
        assert e.value.reason == "unreadable" and "EACCES" in e.value.detail
    with pytest.raises(SourceUnread) as e:
        read_source(str(tmp_path / "gone.mid"), sha, 1000)
    assert e.value.reason == "unreadable" and "ENOENT" in e.value.detail
