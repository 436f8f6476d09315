"""A changed filter limit is judged from stored measures, not by decoding every file again.

The oracle is the pipeline's own full computation: the same rerun with judging again switched
off (every file whose filter verdict is missing decoded in a worker, as before this existed)
must write the same manifest, split lists, normalized MIDI and summary. The corpus is the
invented demo corpus (sample_corpus/README.md); the pieces of the unit checks are built in
code (tests/test_filter.py's hand-computed lines).
"""
from __future__ import annotations

import json
import shutil
import sqlite3
from pathlib import Path

import pytest

from test_filter import T120, line
from test_rerun_kinds import _written
from test_stats import make_piece

import pipeline.engine.runner as runner_module
from pipeline.config import load_config
from pipeline.engine.rejudge import earlier_fingerprints
from pipeline.engine.runner import Runner
from pipeline.stages.base import FileContext
from pipeline.stages.filter import Filter
from pipeline.store.ledger import Ledger

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "sample_corpus"

#: Limits that drop some of the demo's kept files (its kept pieces last 20-73 s and hold 388-646
#: notes) and limits that keep the files the defaults drop as too_short, too_few_notes, too_long.
STRICT = {"min_seconds": 30.0, "min_notes": 500, "max_seconds": 60.0}
LOOSE = {"min_seconds": 2.0, "min_notes": 8, "max_seconds": 2000.0}


def _run(out: Path, filter_opts: dict | None = None):
    cfg = load_config(ROOT / "configs" / "default.yaml", input=str(DEMO), output=str(out), workers=1)
    if filter_opts:
        cfg.stages[[s.name for s in cfg.stages].index("filter")].options.update(filter_opts)
    return Runner(cfg, quiet=True).run()


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("rejudge") / "out"
    _run(out)
    return out


@pytest.mark.parametrize("opts", [STRICT, LOOSE], ids=["strict", "loose"])
def test_a_changed_limit_decodes_no_file_and_writes_what_decoding_writes(base, tmp_path, monkeypatch, opts):
    judged, decoded = tmp_path / "judged", tmp_path / "decoded"
    shutil.copytree(base, judged)
    shutil.copytree(base, decoded)
    report = _run(judged, opts)
    assert report.computed == 0  # no content went to a worker
    note = next(n for n in report.notes if n.startswith("filter: "))
    assert "verdicts judged again" in note
    monkeypatch.setattr(runner_module, "judge_stages_again", lambda *a, **k: {})
    report_decoded = _run(decoded, opts)
    assert report_decoded.computed > 0  # the same rerun decoding every file the filter judges
    a, b = _written(judged), _written(decoded)
    a["summary"].pop("notes"), b["summary"].pop("notes")
    for counts in (a["summary"]["counts"], b["summary"]["counts"]):  # what was decoded differs
        counts.pop("computed"), counts.pop("reused")
    for key in a:
        assert a[key] == b[key], key
    # the limits changed verdicts against the default run: kept files dropped (strict) or
    # dropped ones kept (loose), each then rendered or removed from midi/
    before = {r["source"]: r["status"] for r in map(json.loads, (base / "manifest.jsonl").open())}
    after = {r["source"]: r["status"] for r in map(json.loads, (judged / "manifest.jsonl").open())}
    changed = {(before[s], after[s]) for s in before if before[s] != after[s]}
    assert changed == ({("kept", "dropped")} if opts is STRICT else {("dropped", "kept")})


def test_judging_back_and_forth_returns_the_first_runs_outputs(base, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(base, out)
    first = _written(out)
    _run(out, STRICT)
    report = _run(out)  # the default limits again: their results are stored, nothing judged
    assert report.computed == 0
    again = _written(out)
    assert again["manifest"] == first["manifest"] and again["splits"] == first["splits"]
    assert again["midi"] == first["midi"]


def test_results_of_another_version_are_not_judged_again(base, tmp_path):
    # a stored result counts only under a fingerprint this code computes from an earlier run's
    # options: a filter of another version (its results under another fingerprint) is decoded
    out = tmp_path / "out"
    shutil.copytree(base, out)
    db = sqlite3.connect(out / "state.sqlite")
    with db:
        db.execute("UPDATE results SET fingerprint='0123456789abcdef' WHERE stage='filter' "
                   "AND fingerprint NOT LIKE '%:last-run'")
    db.close()
    report = _run(out, STRICT)
    assert report.computed > 0
    assert not any(n.startswith("filter: ") for n in report.notes)


def test_earlier_fingerprints_come_from_earlier_runs_options(base, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(base, out)
    _run(out, STRICT)
    cfg = load_config(ROOT / "configs" / "default.yaml")
    default = Filter(next(s.options for s in cfg.stages if s.name == "filter"))
    strict = Filter({**default.opts, **STRICT})
    with Ledger(out / "state.sqlite") as ledger:
        assert earlier_fingerprints(ledger, strict) == [default.fingerprint]
        loose = Filter({**default.opts, **LOOSE})
        assert earlier_fingerprints(ledger, loose) == [strict.fingerprint, default.fingerprint]


@pytest.mark.parametrize("rows, opts", [
    (line(64, 240), {}),                                          # kept, every measure
    (line(20, 240), {}),                                          # too_short and too_few_notes
    (line(64, 240) + line(64, 240, channel=9, base=36), {"max_drum_fraction": 0.4}),  # drums
    (line(64, 240, program=40), {"programs_deny": ["strings"]}),  # program_excluded
    (line(64, 240, program=40), {"programs_allow": [40, "drums"]}),
])
def test_judging_stored_values_gives_the_verdict_of_the_piece(rows, opts):
    # the verdict from the recorded values (as the ledger stores them: JSON) is the one the
    # piece itself gets, under the default limits and under others
    piece = make_piece(rows, T120)
    first = Filter({}).process(piece, FileContext(piece))
    values = json.loads(json.dumps(first.to_json()["values"]))
    for judge_opts in ({}, opts, {"min_seconds": 40.0}):
        stage = Filter(judge_opts)
        assert stage.judge_values(values).to_json() == stage.process(piece, FileContext(piece)).to_json()


def test_a_fault_without_measures_is_not_judged():
    assert Filter({}).judge_values({}) is None
    assert Filter({}).judge_values({"programs": []}) is None
