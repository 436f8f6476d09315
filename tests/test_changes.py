"""A rerun says what changed since the last run: files added, changed and removed, verdicts
that turned and kept files that moved part (``pipeline.outputs.changes``). The real-data check
runs on twelve POP909 files (tests/data/pop909, MIT licence, Music X Lab 2020): when a song's
kept file is removed, the copy dedup dropped in its favour is kept now, in the song's part."""
from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import pytest
import yaml

from pipeline.config import load_config
from pipeline.engine.runner import Runner
from pipeline.outputs.changes import Changes, change_lines, file_changes, last_parts

POP = Path(__file__).parent / "data" / "pop909"


def test_changes_against_the_last_runs_verdicts_and_parts():
    """Each file's row against its verdict in the last run (``before``: (sha256, status)) and
    the part its content's outputs lay in."""
    recorded = {"midi/train/a.mid": ("a", "fp"), "midi/test/c.mid": ("c", "fp"), "midi/test/c.t+1.mid": ("c", "fp"),
                "midi/valid/d.mid": ("d", "fp"), "midi/valid/e.mid": ("e", "fp")}
    got = file_changes(["new.mid"], [], ["x.mid", "w.mid"])
    for source, before, part in (
            ("a.mid", ("a", "kept"), None),  # dropped now
            ("b.mid", ("b", "dropped"), "valid"),  # kept now
            ("c.mid", ("c", "kept"), "train"),  # moved
            ("d.mid", ("d", "kept"), "valid"),  # stayed
            ("e.mid", ("e", "kept"), "train"),  # edited in place, kept in another part: moved
            ("f.mid", ("f", "kept"), None),  # edited in place into a file a stage drops
            ("new.mid", None, "train")):  # only added
        got.verdict(source, before, part, last_parts(recorded))
    c = got.as_dict()
    assert (c["now_kept"], c["now_dropped"], c["moved"]) == (1, 2, 2)
    assert c["examples"]["now_dropped"] == ["a.mid", "f.mid"]
    assert c["examples"]["now_kept"] == [{"source": "b.mid", "split": "valid"}]
    assert c["examples"]["moved"] == [{"source": "c.mid", "from": "test", "to": "train"},
                                      {"source": "e.mid", "from": "valid", "to": "train"}]
    assert c["examples"]["files_removed"] == ["w.mid", "x.mid"]  # the first by source
    assert change_lines(got) == ["since the last run: files 1 added, 0 changed, 2 removed; 1 now kept "
                                 "(e.g. b.mid), 2 now dropped (e.g. a.mid), 2 moved to another part (e.g. c.mid)"]
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
    assert "removed: <code>051/051.mid</code>" in page and changes["examples"]["files_removed"] == ["051/051.mid"]


def test_kept_files_edited_into_ones_a_stage_drops_are_named_now_dropped(tmp_path):
    """Found by an audit: a rerun after kept files were edited in place (one emptied, one made
    drums-only) said "0 now dropped", as verdicts were compared by content and an edited file
    is a new content. They are compared file by file: both are named, in the table, summary.json
    and the page. The drum-only file is written with mido (the reference writer)."""
    mido = pytest.importorskip("mido")
    corpus = tmp_path / "in"
    shutil.copytree(POP, corpus, ignore=shutil.ignore_patterns("LICENSE", "README.md"))
    cfg = tmp_path / "c.yaml"
    stages = [{"validate": {}}, {"key_meter": {}}, {"dedup": {}}, {"filter": {}},
              {"split": {"ratios": {"train": 0.5, "valid": 0.25, "test": 0.25}}}]
    cfg.write_text(yaml.safe_dump({"input": str(corpus), "output": str(tmp_path / "out"), "workers": 1,
                                   "stages": stages}))
    Runner(load_config(cfg), quiet=True).run()
    rows = {r["source"]: r for r in map(json.loads, (tmp_path / "out" / "manifest.jsonl").read_text().splitlines())}
    emptied, drums = "089/versions/089-v1.mid", "145/145.mid"
    assert rows[emptied]["status"] == rows[drums]["status"] == "kept"
    (corpus / emptied).write_bytes(b"")
    song = mido.MidiFile(corpus / drums)
    for track in song.tracks:
        for msg in track:
            if msg.type in ("note_on", "note_off"):
                msg.channel = 9
    song.save(corpus / drums)
    report = Runner(load_config(cfg), quiet=True).run()
    rows = {r["source"]: r for r in map(json.loads, (tmp_path / "out" / "manifest.jsonl").read_text().splitlines())}
    assert rows[emptied]["reason"] == "not_midi" and rows[drums]["reason"] == "drums_only"
    changes = json.loads((tmp_path / "out" / "summary.json").read_text())["changes_since_last_run"]
    assert changes["now_dropped"] == 2 and changes["examples"]["now_dropped"] == [emptied, drums]
    assert changes["files_changed"] == 2 and changes["examples"]["files_changed"] == [emptied, drums]
    assert "2 now dropped (e.g. 089/versions/089-v1.mid)" in report.table()
    page = (tmp_path / "out" / "report.html").read_text()
    assert f"dropped now: <code>{emptied}</code>" in page and f"dropped now: <code>{drums}</code>" in page


def test_a_changed_option_names_every_file_it_drops(tmp_path):
    """A rerun with another filter limit writes every row and trail again (the decisions are
    replaced whole): the verdicts it turns are still compared file by file, with the last run's
    read before they are replaced (``Ledger.set_verdicts_aside``)."""
    corpus = tmp_path / "in"
    shutil.copytree(POP, corpus, ignore=shutil.ignore_patterns("LICENSE", "README.md"))
    cfg = tmp_path / "c.yaml"
    stages = [{"validate": {}}, {"dedup": {}}, {"filter": {"min_seconds": 1}}, {"split": {}}]

    def run() -> dict[str, dict]:
        cfg.write_text(yaml.safe_dump({"input": str(corpus), "output": str(tmp_path / "out"), "workers": 1,
                                       "stages": stages}))
        Runner(load_config(cfg), quiet=True).run()
        return {r["source"]: r for r in map(json.loads, (tmp_path / "out" / "manifest.jsonl").read_text().splitlines())}

    before = run()
    kept = sorted(s for s, r in before.items() if r["status"] == "kept")
    stages[2] = {"filter": {"min_seconds": sorted(before[s]["duration_s"] for s in kept)[len(kept) // 2]}}
    after = run()
    turned = sorted(s for s in kept if after[s]["status"] == "dropped")
    back = sorted((s, after[s]["split"]) for s in after if after[s]["status"] == "kept" and before[s]["status"] != "kept")
    assert turned
    changes = json.loads((tmp_path / "out" / "summary.json").read_text())["changes_since_last_run"]
    assert changes["now_dropped"] == len(turned) and changes["examples"]["now_dropped"] == turned
    assert changes["examples"]["now_kept"] == [{"source": s, "split": p} for s, p in back]


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
    c["examples"]["files_removed"] = [f"r{i}.mid" for i in range(EXAMPLES)]
    html = _changes_section({"changes_since_last_run": c})
    assert html.count("removed: <code>") == EXAMPLES and f"{49 + 60 - 2 * EXAMPLES:,} more" in html
    c["now_kept"], c["files_removed"] = EXAMPLES, EXAMPLES
    assert "more are not" not in _changes_section({"changes_since_last_run": c})
