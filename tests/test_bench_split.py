"""python -m pipeline.tools.bench_split on a small generated corpus: the figures it reports are
recounted here from the outputs it leaves (manifest lines, truth.json)."""
from __future__ import annotations

import json
from itertools import combinations

from pipeline.tools.bench_split import format_table, run


def test_bench_split_counts_what_the_outputs_show(tmp_path):
    res = run(150, seed=3, work=tmp_path, out=tmp_path / "r.json")
    assert json.loads((tmp_path / "r.json").read_text()) == json.loads(json.dumps(res))
    truth = json.loads((tmp_path / "corpus_150_seed3" / "truth.json").read_text())["files"]
    rows = {}
    for line in (tmp_path / "corpus_150_seed3").parent.joinpath("out_150_seed3_no_dedup__group_threshold_null",
                                                                  "manifest.jsonl").read_text().splitlines():
        r = json.loads(line)
        rows[r["source"]] = r
    # recount the ungrouped run's pairs by brute force over truth clusters
    by = {}
    for src, t in truth.items():
        r = rows[src]
        if t["cluster"] and r["status"] == "kept":
            by.setdefault(t["cluster"], {})[r["id"]] = r["split"]
    pairs = [(a, b) for parts in by.values() for a, b in combinations(sorted(parts.values()), 2)]
    off = res["configs"]["no dedup, group_threshold null"]
    assert off["planted_pairs_kept"] == len(pairs) > 0
    assert off["planted_pairs_across"] == sum(a != b for a, b in pairs)
    assert off["grouping"] is False and off["table_says_off"]
    assert 0 < off["groups_across"] <= off["groups_keeping_several"] == sum(len(p) > 1 for p in by.values())
    for name, r in res["configs"].items():
        if name != "no dedup, group_threshold null":
            assert r["grouping"] is True and r["planted_pairs_across"] == 0, name
        if "near_drops" in r:
            assert r["drops_below_threshold"] == 0 and r["near_drops"] > 0, name
    assert res["configs"]["no dedup"]["signatures"] == "split"
    assert res["configs"]["dedup + split"]["signatures"] == "dedup"
    assert set(res["prepare_ms_per_file"]) == {"dedup.prepare", "split.prepare"}
    assert "no dedup" in format_table(res) and "split.prepare" in format_table(res)
