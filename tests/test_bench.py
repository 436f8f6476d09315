"""Smoke test of pipeline/tools/bench.py on a tiny scale: the sections run, bench.json holds what the
table reports, and the runs it times did the work they claim (no timing is asserted).

Checks against something outside the bench: the synth truth file (which files a decoder must
reject), the runner's own summary (a rerun with nothing changed computes nothing) and the
determinism contract of DESIGN.md (1 worker and N workers write the same manifest).
"""
from __future__ import annotations

import json
from pathlib import Path

import pytest

from pipeline.tools import bench

TINY = bench.Scale(small=12, large=0, peer_small=2, peer_large=0, mem=(10, 20, 30), dedup_sizes=(),
                   dedup_settings=False)


@pytest.fixture(scope="module")
def doc(tmp_path_factory: pytest.TempPathFactory) -> dict:
    scratch = tmp_path_factory.mktemp("bench")
    out = scratch / "bench.json"
    result = bench.run_bench(["small", "peer", "rerun", "memory"], TINY, scratch, out, log=lambda s: None)
    result["scratch"] = scratch
    result["written"] = json.loads(out.read_text())
    return result


def test_json_matches_the_returned_results(doc: dict) -> None:
    written = doc["written"]
    assert written["table"] == doc["table"]
    assert set(written["results"]) == {"small", "peer", "rerun", "memory"}
    assert written["info"]["machine"]["cores"] >= 1
    for row in written["targets"]:
        assert isinstance(row["met"], bool)
        assert row["gap"] == "" if row["met"] else row["gap"].startswith("missed")


def test_small_section_times_complete_runs(doc: dict) -> None:
    small = doc["results"]["small"]
    files = small["corpus"]["files"]
    assert files == TINY.small
    for key in ("pipeline_1", "pipeline_all"):
        run = small[key]
        assert run["files"] == files and run["counts"]["computed"] > 0
        assert run["wall_s"] > 0 and run["peak_rss_main_mb"] > 0
    # the issue: a default run does not pay music21's import time
    assert small["run_imports_music21"] is False
    # DESIGN.md: byte-identical manifest for 1 worker and N workers
    runs = doc["scratch"] / "runs" / "small"
    assert (runs / "w1" / "manifest.jsonl").read_bytes() == (runs / "wall" / "manifest.jsonl").read_bytes()


def test_decode_only_rejects_exactly_what_the_truth_says(doc: dict) -> None:
    folder = doc["scratch"] / "corpora" / f"small_{TINY.small}"
    truth = json.loads((folder / "truth.json").read_text())["files"]
    # files the validate stage drops for a decoding reason (no_notes files decode fine)
    undecodable = sum(1 for t in truth.values() if t["stage"] == "validate" and t["expect"] != "no_notes")
    for key in ("decode_1", "decode_all"):
        assert doc["results"]["small"][key]["decoded"] == len(truth) - undecodable


def test_reruns_reuse_the_ledger(doc: dict) -> None:
    r = doc["results"]["rerun"]
    assert r["full"]["files"] == TINY.mem[0]
    assert r["new_1pct"]["files"] == TINY.mem[0] + r["new_files"]
    assert 0 < r["new_1pct"]["counts"]["computed"] <= r["new_files"]
    assert r["unchanged"]["counts"]["computed"] == 0
    assert r["unchanged"]["counts"]["reused"] == r["unchanged"]["counts"]["contents"]
    # the new files removed again: the corpus of the full run, nothing to compute
    assert r["removed_1pct"]["files"] == TINY.mem[0] and r["removed_1pct"]["counts"]["computed"] == 0
    assert "new files removed again" in doc["table"]


def test_memory_section_reruns_its_larger_run(doc: dict) -> None:
    m = doc["results"]["memory"]
    small_n, large_n, extra_n = TINY.mem
    assert [m["runs"][str(n)]["files"] for n in TINY.mem] == list(TINY.mem)
    r = m["rerun_large"]
    assert r["new_1pct"]["files"] == large_n + r["new_files"]
    assert 0 < r["new_1pct"]["counts"]["computed"] <= r["new_files"]
    assert r["unchanged"]["counts"]["computed"] == 0
    assert r["new_1pct_fraction"] == round(r["new_1pct"]["wall_s"] / m["runs"][str(large_n)]["wall_s"], 4)
    assert f"reruns on {large_n} files" in doc["table"]
    # the corpus the memory runs read was not touched by the files the rerun added
    assert len(bench.midi_files(doc["scratch"] / "corpora" / "mem")) == extra_n


def test_memory_growth_is_reported_between_sizes(doc: dict) -> None:
    m = doc["results"]["memory"]
    runs = m["runs"]
    pairs = [(10, 20), (20, 30), (10, 30)]
    assert [(g["from"], g["to"]) for g in m["growth"]] == pairs
    for g, (a, b) in zip(m["growth"], pairs):
        # the definition: MB of peak growth over the files added, in KB
        want = (runs[str(b)]["peak_mb"] - runs[str(a)]["peak_mb"]) * 1024 / (b - a)
        assert g["kb_per_file"] == pytest.approx(want, abs=0.01)
        assert f"growth per file, {a:,} -> {b:,} files (KB)" in doc["table"]
    assert m["kb_per_file"] == m["growth"][0]["kb_per_file"]


def test_command_line_sets_the_scale() -> None:
    from argparse import Namespace
    scale = bench.scale_for(Namespace(quick=False, mem_sizes="10000,100000,300000", run_timeout=2400.0))
    assert scale.mem == (10_000, 100_000, 300_000) and scale.run_timeout_s == 2400.0
    assert scale.small == bench.SCALES["full"].small
    assert bench.scale_for(Namespace(quick=True, mem_sizes=None, run_timeout=None)) == bench.SCALES["quick"]
    with pytest.raises(bench.UsageError, match="--run-timeout"):
        bench.scale_for(Namespace(quick=False, mem_sizes=None, run_timeout=0.0))


def test_mem_sizes_are_parsed_and_checked() -> None:
    assert bench.parse_mem_sizes("10000,100000,300_000") == (10_000, 100_000, 300_000)
    for bad in ("10000", "10000,15000", "100000,10000", "a,b", "10000,10000"):
        with pytest.raises(bench.UsageError, match="--mem-sizes"):
            bench.parse_mem_sizes(bad)


def test_peer_accounts_for_every_file(doc: dict) -> None:
    peer = doc["results"]["peer"]["small"]["peer"]
    assert peer["files"] == TINY.peer_small
    assert peer["invalid"] + peer["duplicates"] + sum(peer["parts"].values()) == peer["files"]
    assert doc["results"]["peer"]["small"]["ours_same_files_all"]["files"] == TINY.peer_small


def test_targets_are_judged_in_the_right_direction() -> None:
    rows = bench.check_targets({"small": {"files_per_s_all": 500.0}, "rerun": {"unchanged_fraction": 0.01}})
    by = {r["key"]: r for r in rows}
    assert not by["small.files_per_s_all"]["met"] and "2.0x short" in by["small.files_per_s_all"]["gap"]
    assert by["rerun.unchanged_fraction"]["met"]


def test_unknown_section_is_a_usage_error(tmp_path: Path) -> None:
    from pipeline.errors import UsageError
    with pytest.raises(UsageError, match="unknown bench section"):
        bench.run_bench(["smal"], TINY, tmp_path, None)


def test_missing_peer_library_names_the_extra(monkeypatch: pytest.MonkeyPatch, tmp_path: Path,
                                              capsys: pytest.CaptureFixture) -> None:
    """After a plain `pip install .` the peer's libraries (the test extra) may be missing: the
    command says which extra to install and exits 2 before any work."""
    import importlib.util

    from pipeline.cli import main
    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec",
                        lambda name, *a: None if name == "pretty_midi" else real(name, *a))
    assert main(["bench", "--quick", "--out", str(tmp_path / "b")]) == 2
    err = capsys.readouterr().err
    assert "pretty_midi" in err and "'.[test]'" in err
    assert not (tmp_path / "b").exists()
