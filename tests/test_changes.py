"""A rerun says what changed since the last run: files added, changed and removed, verdicts
that turned and kept files that moved part (``pipeline.outputs.changes``). The real-data check
runs on twelve POP909 files (tests/data/pop909, MIT licence, Music X Lab 2020): when a song's
kept file is removed, the copy dedup dropped in its favour is kept now, in the song's part."""
from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import yaml

from pipeline.config import load_config
from pipeline.engine.runner import Runner
from pipeline.outputs.changes import Changes, change_lines, changes_since, last_parts

POP = Path(__file__).parent / "data" / "pop909"


def test_changes_against_the_last_runs_verdicts_and_parts():
    last_status = {"a": "kept", "b": "dropped", "c": "kept", "d": "kept"}
    recorded = {"midi/train/a.mid": ("a", "fp"), "midi/test/c.mid": ("c", "fp"), "midi/test/c.t+1.mid": ("c", "fp"),
                "midi/valid/d.mid": ("d", "fp")}
    rep = {"a": "a.mid", "b": "b.mid", "c": "c.mid", "d": "d.mid", "n": "new.mid"}
    status = {"a": ("filter", "too_short"), "b": None, "c": None, "d": None, "n": None}
    part_of = {"b": "valid", "c": "train", "d": "valid", "n": "train"}
    got = changes_since(last_status, last_parts(recorded), rep, status, part_of, 1, 0, 2)
    assert got.now_dropped == ["a.mid"] and got.now_kept == [("b.mid", "valid")]
    assert got.moved == [("c.mid", "test", "train")]  # d stayed in valid; the new file is only added
    assert change_lines(got) == ["since the last run: files 1 added, 0 changed, 2 removed; 1 now kept "
                                 "(e.g. b.mid), 1 now dropped (e.g. a.mid), 1 moved to another part (e.g. c.mid)"]
    assert change_lines(Changes()) == [] and change_lines(None) == []


def _run(corpus: Path, out: Path) -> tuple[dict[str, dict], dict, str]:
    cfg = out.parent / "c.yaml"
    cfg.write_text(yaml.safe_dump({"input": str(corpus), "output": str(out), "workers": 1, "stages": [
        {"validate": {}}, {"key_meter": {}}, {"dedup": {}},
        {"split": {"ratios": {"train": 0.5, "valid": 0.25, "test": 0.25}}}]}))
    report = Runner(load_config(cfg), quiet=True).run()
    rows = {r["source"]: r for r in map(json.loads, (out / "manifest.jsonl").read_text().splitlines())}
    return rows, json.loads((out / "summary.json").read_text()), report.table()


def test_a_rerun_names_the_copy_kept_now_in_its_songs_part(tmp_path):
    corpus = tmp_path / "in"
    shutil.copytree(POP, corpus, ignore=shutil.ignore_patterns("LICENSE", "README.md"))
    rows, summary, _ = _run(corpus, tmp_path / "out")
    assert "changes_since_last_run" not in summary  # a first run
    kept = rows["051/051.mid"]
    copy = rows["051/versions/051-v1.mid"]
    assert kept["status"] == "kept" and copy["duplicate_of"] == kept["id"]
    (corpus / "051" / "051.mid").unlink()
    rows, summary, table = _run(corpus, tmp_path / "out")
    assert rows["051/versions/051-v1.mid"]["split"] == kept["split"]  # the song stays in its part
    changes = summary["changes_since_last_run"]
    assert (changes["files_added"], changes["files_changed"], changes["files_removed"]) == (0, 0, 1)
    assert (changes["now_kept"], changes["now_dropped"], changes["moved"]) == (1, 0, 0)
    assert changes["examples"]["now_kept"] == [{"source": "051/versions/051-v1.mid", "split": kept["split"]}]
    assert "since the last run: files 0 added, 0 changed, 1 removed; 1 now kept (e.g. 051/versions/051-v1.mid)" in table
    # report.html says it too, its numbers summary.json's
    page = (tmp_path / "out" / "report.html").read_text()
    keyed = dict(re.findall(r'data-key="changes_since_last_run\.([a-z_]+)" data-value="(\d+)"', page))
    assert keyed == {k: str(v) for k, v in changes.items() if k != "examples"}
    assert f"kept now: <code>051/versions/051-v1.mid</code> ({kept['split']})" in page


def test_the_page_lists_what_the_listing_left_out(tmp_path):
    import os

    corpus = tmp_path / "in"
    shutil.copytree(POP, corpus, ignore=shutil.ignore_patterns("LICENSE", "README.md"))
    os.mkfifo(corpus / "pipe.mid")
    _, summary, _ = _run(corpus, tmp_path / "out")
    assert summary["skipped"]["count"] == 1
    page = (tmp_path / "out" / "report.html").read_text()
    assert 'data-key="skipped.count" data-value="1"' in page
    assert "<code>pipe.mid</code>: not a regular file (a FIFO)" in page


def test_after_a_run_that_stopped_the_changes_are_the_last_completed_runs(tmp_path, monkeypatch):
    """Found by a second audit: a run that stopped early had already recorded the new list of
    files, and the next run reported 0 files added and removed."""
    from pipeline.engine import walk as walk_module

    corpus = tmp_path / "in"
    shutil.copytree(POP, corpus, ignore=shutil.ignore_patterns("LICENSE", "README.md"))
    _run(corpus, tmp_path / "out")
    shutil.copy(corpus / "089" / "089.mid", corpus / "copy_of_089.mid")
    (corpus / "703" / "versions" / "703-v5.mid").unlink()

    def stop(*args, **kwargs):
        raise KeyboardInterrupt

    with monkeypatch.context() as m:
        m.setattr(walk_module.StageWalk, "run", stop)
        try:
            _run(corpus, tmp_path / "out")
        except KeyboardInterrupt:
            pass
    _, summary, table = _run(corpus, tmp_path / "out")
    changes = summary["changes_since_last_run"]
    assert (changes["files_added"], changes["files_changed"], changes["files_removed"]) == (1, 0, 1)
    assert "since the last run: files 1 added, 0 changed, 1 removed" in table


def test_the_page_says_how_many_changes_it_does_not_list():
    """report.html lists the first EXAMPLES of each kind and says how many more there are (an
    audit found 20 of 49 newly kept files listed as if they were all). Our own contract."""
    from pipeline.outputs.changes import EXAMPLES
    from pipeline.outputs.page import _changes_section
    c = {"files_added": 0, "files_changed": 0, "files_removed": 60, "now_kept": 49, "now_dropped": 0,
         "moved": 0, "examples": {"now_kept": [{"source": f"s{i}.mid", "split": "train"} for i in range(EXAMPLES)],
                                  "now_dropped": [], "moved": []}}
    html = _changes_section({"changes_since_last_run": c})
    assert html.count("kept now:") == EXAMPLES and f"{49 - EXAMPLES:,} more" in html
    c["now_kept"] = EXAMPLES
    assert "more are in" not in _changes_section({"changes_since_last_run": c})
