"""Issue 20 item 5 end to end: with a dedup stage at other shingle settings than the split's
grouping is calibrated on, the split signs the files itself (its own ``prepare`` runs beside
dedup's in one run) and groups on those signatures: every planted variant that dedup keeps
shares its original's part, and summary.json names whose signatures were compared."""
from __future__ import annotations

import json

import yaml

from pipeline.config import load_config
from pipeline.engine.runner import Runner

from test_split import _compose_and_variants, _midi_bytes


def test_dedup_at_other_shingle_settings_leaves_the_split_its_own_signatures(tmp_path):
    corpus = tmp_path / "corpus"
    piece_of = {}
    for name, rows, kw, k in _compose_and_variants():  # pieces and variants built in code
        path = corpus / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(_midi_bytes(rows, **kw))  # written by mido (the outside writer)
        piece_of[name] = k

    def run_with(split_opts: dict, out: str):
        cfg_path = tmp_path / f"{out}.yaml"
        # ngram 3 (not the default 4): dedup's arrays are not those the split needs; threshold
        # 0.95 keeps each piece's edited copy, so the split has near-duplicates left to group
        cfg_path.write_text(yaml.safe_dump({
            "input": str(corpus), "output": str(tmp_path / out), "workers": 1,
            "stages": [{"validate": {}}, {"dedup": {"ngram": 3, "threshold": 0.95}},
                       {"split": {"ratios": {"a": 0.5, "b": 0.5}, **split_opts}}]}))
        Runner(load_config(cfg_path), quiet=True).run()
        rows = [json.loads(line) for line in (tmp_path / out / "manifest.jsonl").read_text().splitlines()]
        return ({r["source"]: r["split"] for r in rows if r.get("split")},
                json.loads((tmp_path / out / "summary.json").read_text())["split"]["stage"])

    got, summary = run_with({}, "grouped")
    assert summary["near_duplicate_grouping"] is True and summary["near_duplicate_signatures"] == "split"
    assert sorted(n for n in got if "original" not in n) == [f"p{k}/edited.mid" for k in range(6)]
    for k in range(8):
        assert len({got[n] for n in got if piece_of[n] == k}) == 1, k
    assert len(set(got.values())) == 2
    # without grouping the same kept files are split as single files: some copy leaves its original
    off, summary = run_with({"group_threshold": None}, "ungrouped")
    assert summary["near_duplicate_grouping"] is False
    assert any(off[f"p{k}/edited.mid"] != off[f"p{k}/original.mid"] for k in range(6))
