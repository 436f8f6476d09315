"""Tests of pipeline.audit.leakage: the audit finds planted cross-part duplicates in a user-provided
split of the demo corpus (pipeline.tools.synth, whose truth file names every planted variant) and
finds none in a split made by our split stage."""
from __future__ import annotations

import argparse
import io
import json
import random
import shutil
from pathlib import Path

import numpy as np
import pytest

from pipeline.tools import synth
from pipeline.errors import DecodeError, UsageError
from pipeline.audit.leakage import add_arguments, audit, audit_output, format_report, main_leakage
from pipeline.similarity.minhash import signature_of
from pipeline.midi.decode import decode_file
from pipeline.stages.base import CorpusState, Member
from pipeline.stages.split import Split


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    root = tmp_path_factory.mktemp("demo")
    truth = synth.generate(root, 80, seed=3)["files"]
    return root, truth


def parse(argv):
    p = argparse.ArgumentParser()
    add_arguments(p)
    return p.parse_args(argv)


def test_user_split_with_planted_leaks(corpus, tmp_path):
    root, truth = corpus
    rng = random.Random(0)
    train, test, planted = [], [], set()
    seen_clusters = set()
    for rel, t in truth.items():
        c = t["cluster"]
        if t["duplicate_of"] and c not in seen_clusters:
            # Plant: this variant in test, the member it duplicates in train.
            seen_clusters.add(c)
            planted.add(frozenset((rel, t["duplicate_of"])))
    in_test = {rel for pair in planted for rel in pair if truth[rel]["duplicate_of"]}
    in_train = {rel for pair in planted for rel in pair} - in_test
    for rel, t in truth.items():
        if rel in in_test:
            test.append(rel)
        elif rel in in_train or t["cluster"] in seen_clusters:
            train.append(rel)          # other copies of planted clusters stay on the train side
        else:
            (test if rng.random() < 0.2 else train).append(rel)
    lists = tmp_path / "lists"
    lists.mkdir()
    # Relative paths in a list resolve against the list file's folder.
    for name, rels in (("train", train), ("test", test)):
        (lists / f"{name}.txt").write_text(
            "# my split\n" + "\n".join(f"../demo/{r}" for r in rels) + "\n", encoding="utf-8")
    shutil.copytree(root, tmp_path / "demo")
    out = io.StringIO()
    report_path = tmp_path / "report.json"
    code = main_leakage(parse(["--part", f"train={lists / 'train.txt'}",
                               "--part", f"test={lists / 'test.txt'}",
                               "--json", str(report_path)]), out=out)
    assert code == 1
    data = json.loads(report_path.read_text())
    found = {frozenset((_rel(lk["path_a"]), _rel(lk["path_b"]))) for lk in data["leaks"]}
    assert planted <= found, planted - found
    # Every reported pair is a true duplicate (same piece in the truth), across parts.
    for lk in data["leaks"]:
        assert truth[_rel(lk["path_a"])]["cluster"] == truth[_rel(lk["path_b"])]["cluster"] is not None
        assert {lk["part_a"], lk["part_b"]} == {"train", "test"} and lk["similarity"] >= 0.5
    # Unreadable (planted corrupt) files are listed, not fatal.
    corrupt = {rel for rel, t in truth.items() if t["defect"] is not None}
    assert {_rel(f["path"]) for f in data["failed"]} == corrupt
    text = out.getvalue()
    for lk in data["leaks"]:
        assert f"{lk['similarity']:.3f}" in text and lk["path_a"] in text and lk["path_b"] in text


def _rel(path: str) -> str:
    return path.split("/demo/", 1)[1]


def _our_output(root: Path, truth: dict, out_dir: Path, seed: int = 0) -> dict[str, str]:
    """A minimal output folder made with our split stage: every decodable file (duplicates
    included, i.e. dedup not even run), midi/<part>/<id>.mid, splits/<part>.txt, summary.json."""
    members = []
    for i, rel in enumerate(sorted(truth)):
        if truth[rel]["stage"] == "validate":
            continue
        sig, sh, _ = signature_of(decode_file(root / rel))
        members.append(Member(f"{i:016x}", "", rel, {}, {"dedup": {"signature": sig, "shingles": sh}},
                              [rel]))
    state = CorpusState()
    results = Split({"seed": seed}).run_corpus(members, state)
    lists: dict[str, list[str]] = {}
    for m in members:
        part = results[m.id].values["split"]
        rel_out = f"midi/{part}/{m.id}.mid"
        (out_dir / rel_out).parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(root / m.source, out_dir / rel_out)
        lists.setdefault(part, []).append(rel_out)
    (out_dir / "splits").mkdir(parents=True, exist_ok=True)
    for part, rels in lists.items():
        (out_dir / "splits" / f"{part}.txt").write_text("\n".join(sorted(rels)) + "\n")
    (out_dir / "summary.json").write_text(json.dumps({"split": state.current["summary"]}))
    return {m.source: results[m.id].values["split"] for m in members}


def test_our_split_has_no_leaks(corpus, tmp_path):
    root, truth = corpus
    assignment = _our_output(root, truth, tmp_path)
    report = audit_output(tmp_path)
    assert report.threshold == 0.2            # read back from summary.json (the split default)
    assert report.leaks == [] and report.failed == [] and report.exit_code == 0
    assert sum(report.parts.values()) == len(assignment)
    assert "no cross-part near-duplicates" in format_report(report)
    assert main_leakage(parse(["--output", str(tmp_path)]), out=io.StringIO()) == 0
    # A plain random split of the same files (same part sizes) does leak.
    rng = random.Random(1)
    files = sorted(assignment)
    shuffled = list(assignment.values())
    rng.shuffle(shuffled)
    parts: dict[str, list[Path]] = {}
    for f, p in zip(files, shuffled):
        parts.setdefault(p, []).append(root / f)
    assert audit(parts, 0.5).leaks


class FakePiece:
    def __init__(self, tokens, chash):
        self.tokens, self.chash = tokens, chash


def test_injected_functions_same_file_in_two_parts_and_failures():
    """The audit logic alone, with injected decode/sign/link: a file listed in two parts leaks at
    1.0 through its content hash even with an empty signature; decode errors are listed."""
    pieces = {"a.mid": FakePiece([], "h1"), "b.mid": FakePiece([1, 2], "h2"),
              "c.mid": FakePiece([1, 2], "h3")}

    def decode(path: Path):
        if path.name == "bad.mid":
            raise DecodeError("not_midi", "no MThd header", file=str(path), offset=0)
        return pieces[path.name]

    def sign(piece):
        return np.array(piece.tokens), np.array(piece.tokens), piece.chash

    def link(sigs, threshold, shingles):
        keys = sorted(k for k in sigs if len(sigs[k]))
        return [(x, y, 0.9) for i, x in enumerate(keys) for y in keys[i + 1:]]

    rep = audit({"train": [Path("a.mid"), Path("b.mid"), Path("bad.mid")],
                 "test": [Path("a.mid"), Path("c.mid")]}, 0.5,
                decode=decode, sign=sign, link=link)
    got = sorted((lk.path_a, lk.path_b, lk.similarity) for lk in rep.leaks)
    assert got == [("a.mid", "a.mid", 1.0), ("c.mid", "b.mid", 0.9)] or \
        got == [("a.mid", "a.mid", 1.0), ("b.mid", "c.mid", 0.9)]
    assert rep.failed == [("train", "bad.mid", "no MThd header")]
    assert rep.to_json()["leak_count"] == 2 and rep.exit_code == 1


def test_usage_errors(tmp_path):
    with pytest.raises(UsageError, match=r"either an output folder of ours \('midisift leakage OUTPUT'"):
        main_leakage(parse([]))
    with pytest.raises(UsageError, match="NAME=LISTFILE"):
        main_leakage(parse(["--part", "train"]))
    (tmp_path / "a.txt").write_text("")
    with pytest.raises(UsageError, match="at least two parts"):
        main_leakage(parse(["--part", f"train={tmp_path / 'a.txt'}"]))
    with pytest.raises(UsageError, match="cannot read the part list"):
        main_leakage(parse(["--part", f"a={tmp_path / 'no.txt'}", "--part", f"b={tmp_path / 'a.txt'}"]))
    with pytest.raises(UsageError, match="no split lists"):
        audit_output(tmp_path)


def test_an_audit_that_could_not_read_a_listed_file_does_not_pass(tmp_path):
    """README, Commands: a CI gate reads the exit status. Part lists naming files that have
    since moved (here one file listed in both parts) printed 'no cross-part near-duplicates;
    2 file(s) could not be read' and exited 0, passing a split that was never checked."""
    gone = tmp_path / "moved" / "piece.mid"
    for part in ("train", "test"):
        (tmp_path / f"{part}.txt").write_text(f"{gone}\n", encoding="utf-8")
    out = io.StringIO()
    code = main_leakage(parse(["--part", f"train={tmp_path / 'train.txt'}",
                               "--part", f"test={tmp_path / 'test.txt'}"]), out=out)
    assert code == 3
    text = out.getvalue()
    assert f"unreadable (test): {gone}: " in text and f"unreadable (train): {gone}: " in text
    assert text.rstrip().endswith("2 file(s) could not be read (listed above), so the audit is "
                                  "incomplete (exit 3)")


def test_our_output_is_audited_with_the_splits_signatures_whatever_dedups_options(corpus, tmp_path, monkeypatch):
    # the split signs at dedup's default settings (split.signature_options), on which its
    # group_threshold is measured; an audit that signed with the run's dedup options (ngram 3)
    # reported pairs at 0.217-0.249 the split never measured (an option-change audit)
    import pipeline.audit.leakage as leakage
    from pipeline.stages.split import signature_options
    root, truth = corpus
    _our_output(root, truth, tmp_path)
    summary = json.loads((tmp_path / "summary.json").read_text())
    summary["options"] = {"dedup": {"ngram": 3, "num_perm": 64}}
    (tmp_path / "summary.json").write_text(json.dumps(summary))
    used = []
    real = leakage._default_signer
    monkeypatch.setattr(leakage, "_default_signer", lambda opts: used.append(opts) or real(opts))
    report = audit_output(tmp_path)
    assert used == [signature_options()] and signature_options()["ngram"] != 3
    assert report.leaks == [] and report.exit_code == 0


def test_part_lists_of_our_own_output_folder_are_read_relative_to_it(corpus, tmp_path):
    # our splits/<part>.txt name files relative to the output folder (a split audit: --part
    # resolved them against splits/ and reported every file unreadable, exit 3)
    root, truth = corpus
    _our_output(root, truth, tmp_path)
    (tmp_path / "manifest.jsonl").write_text("")
    argv = [arg for f in sorted((tmp_path / "splits").glob("*.txt")) for arg in ("--part", f"{f.stem}={f}")]
    out = io.StringIO()
    assert main_leakage(parse(argv), out=out) == 0
    assert "unreadable" not in out.getvalue()
