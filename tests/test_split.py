"""Tests of the split stage's ``run_corpus`` with simulated runs (``CorpusState(previous=...)``
carrying what the previous run saved). Near-duplicates are planted as shingle sets with a known
overlap, signed with pipeline.similarity.minhash as the dedup stage would store them; every
"zero cross-part near-duplicates" check is a brute-force exact comparison of all pairs."""
from __future__ import annotations

import random

import numpy as np
import pytest

from pipeline.errors import ConfigError
from pipeline.similarity import minhash, set_similarity
from pipeline.stages.base import CorpusState, Member, StageResult
from pipeline.stages.split import Split, check_ratios, normalize_text, output_count

RATIOS = {"train": 0.8, "valid": 0.1, "test": 0.1}
SIZE = 300


class Corpus:
    """Members with random shingle sets; ``near(of, share)`` plants a near-duplicate."""

    def __init__(self, seed: int = 0):
        self.rng = np.random.default_rng(seed)
        self.sets: dict[str, np.ndarray] = {}
        self.count = 0

    def _id(self) -> str:
        self.count += 1
        return f"{self.count:016x}"

    def fresh(self) -> str:
        mid = self._id()
        self.sets[mid] = np.unique(self.rng.integers(0, 2**62, SIZE, dtype=np.uint64))
        return mid

    def near(self, of: str, share: float) -> str:
        """A member keeping ``share`` of ``of``'s shingles (Jaccard share/(2-share))."""
        src = self.sets[of]
        k = int(len(src) * share)
        mid = self._id()
        extra = self.rng.integers(0, 2**62, len(src) - k, dtype=np.uint64)
        self.sets[mid] = np.unique(np.concatenate([src[:k], extra]))
        return mid

    def bridge(self, a: str, b: str, each: int = 200) -> str:
        """A member holding ``each`` shingles of ``a`` and of ``b``: containment each/300 in both."""
        mid = self._id()
        self.sets[mid] = np.unique(np.concatenate([self.sets[a][:each], self.sets[b][:each]]))
        return mid

    def member(self, mid: str, source: str | None = None, values: dict | None = None,
               outputs: int = 1) -> Member:
        sh = self.sets[mid]
        return Member(mid, mid * 4, source or f"{mid}.mid", dict(values or {}),
                      {"dedup": {"signature": minhash(sh), "shingles": sh}},
                      [f"midi/x/{mid}_{k}.mid" for k in range(outputs)])


def run(members, previous=None, flags=None, upstream=None, **opts):
    state = CorpusState(previous=previous, flags=flags, upstream=upstream)
    results = Split(opts).run_corpus(list(members), state)
    return results, state


def parts(results):
    return {m: r.values["split"] for m, r in results.items()}


def cross_part_pairs(corpus: Corpus, assignment: dict[str, str], threshold: float = 0.5):
    ids = sorted(assignment)
    out = []
    for i, a in enumerate(ids):
        for b in ids[i + 1:]:
            if assignment[a] != assignment[b]:
                sim, _ = set_similarity(corpus.sets[a], corpus.sets[b])
                if sim >= threshold:
                    out.append((a, b, sim))
    return out


def test_ratio_and_freeze_checks():
    assert "sum to 0.9" in check_ratios({"train": 0.8, "test": 0.1})
    assert check_ratios({"train": 0.8, "test": 0.2}) is None
    assert "plain file name" in check_ratios({"tr/ain": 0.5, "test": 0.5})
    assert check_ratios({"train": 1.0, "test": 0}) is not None
    with pytest.raises(ConfigError, match="freeze names part 'holdout'"):
        Split({"freeze": "holdout"})
    # Default freeze 'test' with renamed parts: no freeze rather than an error.
    assert Split({"ratios": {"train": 0.9, "dev": 0.1}, "freeze": "test"})._freeze() is None
    assert Split.check_options({"ratios": {"train": 0.9, "dev": 0.1}, "freeze": "dev"}) is None


def test_near_duplicates_travel_together_and_ratios():
    c = Corpus(1)
    base = [c.fresh() for _ in range(150)]
    nears = [c.near(base[i], 0.7) for i in range(20)]      # Jaccard 0.54, containment 0.7
    far = [c.near(base[i], 0.2) for i in range(20, 30)]      # similarity 0.2: independent
    members = [c.member(m) for m in base + nears + far]
    results, state = run(members)
    got = parts(results)
    assert cross_part_pairs(c, got) == []
    for i, n in enumerate(nears):
        assert got[n] == got[base[i]]
        assert results[n].values["group_size"] == 2 and results[n].values["group"] == min(n, base[i])
    summary = state.current["summary"]
    assert sum(summary["members"].values()) == 180
    assert all(abs(summary["achieved"][p] - RATIOS[p]) <= 0.02 for p in RATIOS)
    # Deterministic whatever the member order.
    shuffled = list(members)
    random.Random(3).shuffle(shuffled)
    assert parts(run(shuffled)[0]) == got


def test_folder_title_and_field_grouping():
    c = Corpus(2)
    ids = [c.fresh() for _ in range(60)]
    members = [c.member(m, source=f"album{i % 6}/{m}.mid" if i < 30 else f"{m}.mid",
                        values={"title": ["Greensleeves", "GREENSLEEVES!", "Grünsleeves"][i % 3]
                                if i >= 54 else f"tune {i}", "composer": "Anon" if i in (40, 41) else None})
               for i, m in enumerate(ids)]
    got = parts(run(members, group_by_folder=True, group_by_title=True,
                    group_fields=["composer"])[0])
    for k in range(6):
        assert len({got[ids[i]] for i in range(30) if i % 6 == k}) == 1
    assert got[ids[54]] == got[ids[57]]                 # same normalized title
    assert got[ids[40]] == got[ids[41]]                 # same composer
    assert normalize_text("  Grünsleeves ") == "grunsleeves"
    assert normalize_text("Greensleeves!") == normalize_text("GREENSLEEVES")
    assert normalize_text("...") is None


def test_augmentation_copies_weigh_their_outputs():
    c = Corpus(3)
    ids = [c.fresh() for _ in range(40)]
    members = [c.member(m, outputs=4) for m in ids[:10]] + [c.member(m) for m in ids[10:]]
    results, state = run(members)
    s = state.current["summary"]
    assert sum(s["files"].values()) == 70
    assert s["files"]["train"] == pytest.approx(56, abs=4)
    # Known from the transpose stage's values only (the runner fills outputs later).
    m = c.member(ids[0], values={"augment": [-1, 1, 2]})
    m.outputs = []
    assert output_count(m) == 4.0


def _first_run_and_changes(n_new: int):
    """200 pieces and 10 near-duplicates, run once; then the changed corpus: a near-duplicate
    of a test file, a file linking a train file with that test file, ``n_new`` new files.
    Returns (corpus, first results, first state, changed members, test file, train file,
    near-duplicate, link)."""
    c = Corpus(4)
    base = [c.fresh() for _ in range(200)]
    pairs = [c.near(base[i], 0.7) for i in range(10)]
    first_members = [c.member(m) for m in base + pairs]
    r1, s1 = run(first_members)
    first = parts(r1)
    test_file = next(m for m in base if first[m] == "test")
    train_file = next(m for m in base if first[m] == "train" and m not in base[:10])
    near_test = c.near(test_file, 0.7)
    link = c.bridge(train_file, test_file)
    new = [c.fresh() for _ in range(n_new)]
    members = first_members + [c.member(m) for m in [near_test, link] + new]
    return c, r1, s1, members, test_file, train_file, near_test, link


def test_incremental_rerun():
    """Run, add files (one near-duplicate of a test file, one that links a train group with a
    test group, and 60 ordinary new files), rerun: earlier assignments unchanged except the
    reported moves, zero cross-part near-duplicates, ratios within 0.02 of the targets."""
    c, r1, s1, members, test_file, train_file, near_test, link = _first_run_and_changes(60)
    first = parts(r1)
    r2, s2 = run(members, previous=s1.current)
    second = parts(r2)
    assert second[near_test] == "test"
    assert second[link] == "test" and second[train_file] == "test"
    moved = {m for m, r in r2.items() if "moved_from" in r.values}
    assert moved == {train_file}
    assert r2[train_file].values["moved_from"] == "train"
    assert "frozen part 'test'" in r2[train_file].detail
    assert any(train_file in line and "moved from train to test" in line for line in s2.notes)
    assert s2.current["summary"]["moved"] == 1
    for m, p in first.items():
        if m not in moved:
            assert second[m] == p
    assert cross_part_pairs(c, second) == []
    achieved = s2.current["summary"]["achieved"]
    assert all(abs(achieved[p] - RATIOS[p]) <= 0.02 for p in RATIOS), achieved
    # --reassign: from scratch, equal to a run without history, nothing reported as moved.
    r3, s3 = run(members, previous=s2.current, flags={"reassign": True})
    assert parts(r3) == parts(run(members)[0])
    assert not any("moved_from" in r.values for r in r3.values())


def test_freeze_null_joins_majority_part():
    c = Corpus(5)
    base = [c.fresh() for _ in range(100)]
    r1, s1 = run([c.member(m) for m in base], freeze=None)
    first = parts(r1)
    a = next(m for m in base if first[m] == "train")
    b = next(m for m in base if first[m] == "test")
    link = c.bridge(a, b)
    r2, _ = run([c.member(m) for m in base + [link]], previous=s1.current, freeze=None)
    # Tie (one member each): the first part in ratios order, train, takes the merged group.
    assert parts(r2)[b] == "train" and r2[b].values["moved_from"] == "test"


def test_dedup_replacement_inherits_the_part():
    """A new file that dedup keeps in place of an earlier test file joins test (the dropped file
    passes its part on through the dedup cluster)."""
    c = Corpus(6)
    base = [c.fresh() for _ in range(50)]
    r1, s1 = run([c.member(m) for m in base])
    old = next(m for m in base if parts(r1)[m] == "test")
    rep = c.near(old, 0.9)
    kept = [m for m in base if m != old] + [rep]
    upstream = {"dedup": {m: StageResult.keep(values={"cluster": m, "duplicate_of": None})
                          for m in kept}}
    upstream["dedup"][old] = StageResult.drop("near_duplicate", "", values={
        "cluster": rep, "duplicate_of": rep})
    upstream["dedup"][rep] = StageResult.keep(values={"cluster": rep, "duplicate_of": None})
    r2, s2 = run([c.member(m) for m in kept], previous=s1.current, upstream=upstream)
    assert parts(r2)[rep] == "test" and old not in r2
    assert s2.current["assignments"][old] == "test"   # kept in the state for later reruns


def test_last_run_results_are_returned_for_members_whose_split_did_not_change():
    """With the last run's results at hand (as the runner hands them over), a member whose
    part, group and group size are unchanged gets that result object back; every result and
    the saved state must equal what the computation without them gives (the oracle). The
    rerun of ``test_incremental_rerun``: a new near-duplicate grows a group, a bridge moves
    a train file into test, and the file moved last run is not reused (its detail changes)."""
    c, r1, s1, members, _, train_file, _, _ = _first_run_and_changes(30)
    r2, s2 = run(members, previous=s1.current)
    for last, previous in ((r1, s1.current), (r2, s2.current)):
        again = members + [c.member(c.fresh())]
        full, st_full = run(again, previous=previous)
        inc, st_inc = run(again, previous=previous, flags={"previous_results": last})
        assert {k: v.to_json() for k, v in inc.items()} == {k: v.to_json() for k, v in full.items()}
        assert st_inc.current == st_full.current and st_inc.notes == st_full.notes
        reused = {k for k in inc if inc[k] is last.get(k)}
        assert reused and all(full[k].to_json() == last[k].to_json() for k in reused)
        assert {k for k in last if full.get(k) is not None
                and full[k].to_json() == last[k].to_json()} == reused
    assert train_file not in reused  # moved in the second run: its result then said so


def test_a_stored_split_result_is_recognised_without_parsing():
    """The split compares a stored record's JSON text with the text it expects; that text must
    be what the ledger writes for those values (canonical JSON: the json module, sorted keys),
    or no stored result would ever be reused."""
    from pipeline.ledger import stored_result
    from pipeline.records import Compactor
    from pipeline.stages.split import _same_split
    values = {"split": "train", "group": "00000000000000ab", "group_size": 3}
    stored = Compactor().from_stored(stored_result(StageResult.keep(values=values).to_json()))
    assert _same_split(stored, "train", "00000000000000ab", 3)
    assert not _same_split(stored, "test", "00000000000000ab", 3)
    assert not _same_split(stored, "train", "00000000000000ab", 4)
