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
from pipeline.engine.rejudge import earlier_options
from pipeline.engine.runner import Runner
from pipeline.stages.base import FileContext
from pipeline.stages.filter import Filter
from pipeline.stages.validate import Validate
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


def test_earlier_options_come_from_earlier_runs(base, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(base, out)
    _run(out, STRICT)
    cfg = load_config(ROOT / "configs" / "default.yaml")
    default = Filter(next(s.options for s in cfg.stages if s.name == "filter"))
    strict = Filter({**default.opts, **STRICT})
    with Ledger(out / "state.sqlite") as ledger:
        assert earlier_options(ledger, strict) == [(default.fingerprint, default.opts)]
        loose = Filter({**default.opts, **LOOSE})
        assert [fp for fp, _ in earlier_options(ledger, loose)] == [strict.fingerprint, default.fingerprint]


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
    stored = json.loads(json.dumps(first.to_json()))
    for judge_opts in ({}, opts, {"min_seconds": 40.0}):
        stage = Filter(judge_opts)
        judged = stage.judge_stored(stored, Filter({}).opts)
        assert judged.to_json() == stage.process(piece, FileContext(piece)).to_json()


def test_a_fault_without_measures_is_not_judged():
    fault = {"kept": False, "reason": "timeout", "detail": "", "values": {}, "thresholds": {}}
    assert Filter({}).judge_stored(fault, Filter({}).opts) is None
    assert Filter({}).judge_stored({**fault, "values": {"programs": []}}, Filter({}).opts) is None


# validate: worker limits and allow_repairs ------------------------------------------------

def _demo_files() -> list[tuple[str, bytes]]:
    return [(p.relative_to(DEMO).as_posix(), p.read_bytes()) for p in sorted(DEMO.rglob("*"))
            if p.is_file() and p.suffix.lower() in (".mid", ".midi", ".kar", ".rmi")]


@pytest.mark.parametrize("before, after", [
    ({}, {"allow_repairs": False}), ({"allow_repairs": False}, {}),
    ({}, {"timeout_s": 5.0}), ({}, {"max_memory_mb": 256}), ({"timeout_s": 300.0}, {}),
    ({"max_bytes": 3000}, {}), ({"max_events": 300, "max_tracks": 3}, {"allow_repairs": False}),
    ({}, {"max_bytes": 32_000_000, "max_events": 4_000_000})])
def test_validate_judges_every_demo_file_as_reading_it_does(before, after):
    # every demo file (damaged ones, repaired ones, one without notes, and under low reading
    # limits files over them): the verdict judged from the stored result under the earlier
    # options is the one reading the file gives; only a file refused for a limit since raised
    # is read again
    first, then = Validate(before), Validate(after)
    reasons, read_again = set(), 0
    for source, data in _demo_files():
        stored = json.loads(json.dumps(first.read(data, source)[0].to_json()))
        judged = then.judge_stored(stored, first.opts)
        expected = then.read(data, source)[0].to_json()
        reasons.add(expected["reason"])
        if judged is None:
            assert stored["reason"] == "too_large" and first.opts != then.opts, source
            read_again += 1
            continue
        assert judged.to_json() == expected, source
    assert {"not_midi", "truncated", "no_notes", None} <= reasons
    assert ("needs_repair" in reasons) == (after.get("allow_repairs") is False)
    assert (read_again > 0) == bool(set(before) & {"max_bytes", "max_events", "max_tracks"})


def test_validate_reads_again_under_other_reading_limits_or_after_a_fault():
    first = Validate({})
    source, data = _demo_files()[0]
    stored = json.loads(json.dumps(first.read(data, source)[0].to_json()))
    for opts in ({"max_bytes": 1000}, {"max_events": 50}, {"max_tracks": 2}):  # lowered
        assert Validate(opts).judge_stored(stored, first.opts) is None
    for reason, thresholds in (("timeout", {"timeout_s": 60.0}), ("decoder_crash", {}),
                               ("too_large", {"max_memory_mb": 2048}), ("stage_error", {})):
        fault = {"kept": False, "reason": reason, "detail": "x", "values": {}, "thresholds": thresholds}
        assert Validate({"timeout_s": 120.0}).judge_stored(fault, first.opts) is None


@pytest.mark.parametrize("opts", [{"allow_repairs": False}, {"timeout_s": 120.0}],
                         ids=["allow_repairs", "timeout"])
def test_a_changed_validate_option_decodes_no_file_and_writes_what_decoding_writes(base, tmp_path,
                                                                                    monkeypatch, opts):
    judged, decoded = tmp_path / "judged", tmp_path / "decoded"
    shutil.copytree(base, judged)
    shutil.copytree(base, decoded)
    report = _run_validate(judged, opts)
    assert report.computed == 0
    assert any(n.startswith("validate: ") and "judged again" in n for n in report.notes)
    monkeypatch.setattr(runner_module, "judge_stages_again", lambda *a, **k: {})
    assert _run_validate(decoded, opts).computed > 0
    a, b = _written(judged), _written(decoded)
    a["summary"].pop("notes"), b["summary"].pop("notes")
    for counts in (a["summary"]["counts"], b["summary"]["counts"]):
        counts.pop("computed"), counts.pop("reused")
    for key in a:
        assert a[key] == b[key], key
    if "allow_repairs" in opts:  # the three repaired demo files now drop
        rows = [json.loads(line) for line in a["manifest"].splitlines()]
        assert sorted(r["source"] for r in rows if r["reason"] == "needs_repair") == [
            "sessions/2017/late_avenue.mid", "sessions/2021/Midnight Sketch.mid",
            "sessions/2022/blue_lantern.rmi"]


def test_a_stored_timeout_is_read_again_when_the_limit_changes(base, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(base, out)
    db = sqlite3.connect(out / "state.sqlite")
    with db:  # one kept file's verdict as a timeout of the last run (its columns forgotten)
        sha = db.execute("SELECT sha256 FROM results WHERE stage='validate' AND kept=1 "
                         "ORDER BY sha256 LIMIT 1").fetchone()[0]
        db.execute("UPDATE results SET kept=0, reason='timeout', detail='took longer than 60 s', "
                   "vals='{}', thresholds='{\"timeout_s\": 60.0}' WHERE stage='validate' AND sha256=?", (sha,))
        db.execute("DELETE FROM run_columns")
    db.close()
    report = _run_validate(out, {"timeout_s": 120.0})
    assert report.computed == 1  # the timed-out file alone is read
    with Ledger(out / "state.sqlite") as ledger:
        fp = Validate({**Validate({}).opts, "max_bytes": 16000000, "max_events": 2000000,
                       "timeout_s": 120.0}).fingerprint
        (_, result), = ledger.results_of("validate", fp, [sha])
    assert result["kept"] is True


def _run_validate(out: Path, opts: dict):
    cfg = load_config(ROOT / "configs" / "default.yaml", input=str(DEMO), output=str(out), workers=1)
    cfg.stages[0].options.update(opts)
    return Runner(cfg, quiet=True).run()


def test_judged_results_stored_in_several_transactions_are_the_same(base, tmp_path, monkeypatch):
    import pipeline.engine.rejudge as rejudge
    one, several = tmp_path / "one", tmp_path / "several"
    shutil.copytree(base, one)
    shutil.copytree(base, several)
    _run(one, STRICT)
    monkeypatch.setattr(rejudge, "BATCH", 7)
    report = _run(several, STRICT)
    assert report.computed == 0
    a, b = _written(one), _written(several)
    for key in ("manifest", "splits", "midi", "tables"):
        assert a[key] == b[key], key


def test_dedup_stores_its_links_unrounded_so_a_rerun_prints_the_first_runs_similarity(base, tmp_path):
    # a rerun that rebuilds dedup's results from its stored links printed round(round(s, 6), 4)
    # (0.98895x -> 0.98895 -> 0.9889 where the first run printed 0.989): the links keep the value
    db = sqlite3.connect(base / "state.sqlite")
    links = json.loads(db.execute("SELECT value FROM state WHERE stage='dedup' AND key='links'").fetchone()[0])
    db.close()
    assert links and any(round(sim, 6) != sim for _, _, sim in links)
    rows = {r["id"]: r for r in map(json.loads, (base / "manifest.jsonl").open())}
    by_pair = {frozenset((a, b)): sim for a, b, sim in links}
    near = [r for r in rows.values() if r["reason"] == "near_duplicate"]
    assert near
    for r in near:
        assert r["similarity"] == round(by_pair[frozenset((r["id"], r["duplicate_of"]))], 4)
    out = tmp_path / "out"
    shutil.copytree(base, out)
    _run_validate(out, {"timeout_s": 30.0})  # dedup rebuilds its results from the stored links
    again = {r["id"]: r["similarity"] for r in map(json.loads, (out / "manifest.jsonl").open())}
    assert again == {i: r["similarity"] for i, r in rows.items()}


# options without effect under the others ------------------------------------------------

def test_options_without_effect_leave_the_fingerprint_as_it_is():
    from pipeline.stages.key_meter import KeyMeter
    from pipeline.stages.transpose import Transpose
    for cls in (KeyMeter, Transpose):  # the learned method reads neither profile weight
        assert cls({"bass_weight": 3.0, "final_weight": 0.0}).fingerprint == cls({}).fingerprint
        kk = {"profile": "krumhansl_kessler"}
        assert cls({**kk, "bass_weight": 3.0}).fingerprint != cls(kk).fingerprint
        assert cls({"trust_file_key": True}).fingerprint != cls({}).fingerprint
    # below_confidence acts only under a min_key_confidence above 0 (0 or 0.0)
    assert Transpose({"below_confidence": "drop"}).fingerprint == Transpose({}).fingerprint
    assert Transpose({"min_key_confidence": 0}).fingerprint == Transpose({}).fingerprint
    # a profile's alias is the profile (a regression audit: tkp decoded every file again)
    for cls in (KeyMeter, Transpose):
        assert cls({"profile": "tkp"}).fingerprint == cls({"profile": "temperley_kostka_payne"}).fingerprint
    guard = {"min_key_confidence": 0.5}
    assert Transpose({**guard, "below_confidence": "drop"}).fingerprint != Transpose(guard).fingerprint


def test_the_learned_key_estimate_reads_no_profile_weight():
    # the premise of the fingerprint above, on every decodable demo file
    from pipeline.analysis.key import estimate_key
    from pipeline.midi.decode import decode
    checked = 0
    for source, data in _demo_files():
        try:
            piece = decode(data)
        except Exception:
            continue
        if len(piece.notes) == 0:
            continue
        plain = estimate_key(piece, "learned")
        weighted = estimate_key(piece, "learned", bass_weight=5.0, final_weight=0.0)
        assert (plain.tonic_pc, plain.mode, plain.confidence) == \
            (weighted.tonic_pc, weighted.mode, weighted.confidence), source
        checked += 1
    assert checked > 60


def test_a_rerun_with_an_option_without_effect_reads_no_file_and_writes_the_same(base, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(base, out)
    first = _written(out)
    cfg = load_config(ROOT / "configs" / "default.yaml", input=str(DEMO), output=str(out), workers=1)
    names = [s.name for s in cfg.stages]
    cfg.stages[names.index("key_meter")].options["bass_weight"] = 4.0
    cfg.stages[names.index("transpose")].options["below_confidence"] = "drop"
    report = Runner(cfg, quiet=True).run()
    assert report.computed == 0
    again = _written(out)
    for key in ("manifest", "splits", "midi", "tables"):
        assert again[key] == first[key], key
    # summary.json gives the options as configured (a regression audit: the last run's)
    options = json.loads((out / "summary.json").read_text())["options"]
    assert options["key_meter"]["bass_weight"] == 4.0 and options["transpose"]["below_confidence"] == "drop"


def test_raising_a_reading_limit_reads_only_the_files_over_the_old_one(base, tmp_path, monkeypatch):
    judged, decoded = tmp_path / "judged", tmp_path / "decoded"
    shutil.copytree(base, judged)
    assert _run_validate(judged, {"max_bytes": 3000}).computed > 0  # lowered: every file read
    over = {json.loads(line)["sha256"] for line in (judged / "manifest.jsonl").open()
            if json.loads(line)["reason"] == "too_large"}
    assert over
    shutil.copytree(judged, decoded)
    raised = _run_validate(judged, {"max_bytes": 5000})
    assert raised.computed == len(over)  # the files refused under 3000 bytes, and no other
    monkeypatch.setattr(runner_module, "judge_stages_again", lambda *a, **k: {})
    assert _run_validate(decoded, {"max_bytes": 5000}).computed > len(over)
    a, b = _written(judged), _written(decoded)
    for key in ("manifest", "splits", "midi", "tables"):
        assert a[key] == b[key], key
