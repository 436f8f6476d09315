"""Tests of the split stage's ``run_corpus`` with simulated runs (``CorpusState(previous=...)``
carrying what the previous run saved). Near-duplicates are planted as shingle sets with a known
overlap, signed with pipeline.similarity.minhash.minhash as the dedup stage would store them; every
"zero cross-part near-duplicates" check is a brute-force exact comparison of all pairs."""
from __future__ import annotations

import hashlib
import random

import numpy as np
import pytest

from fixtures_midi import smf_bytes
from pipeline.errors import ConfigError
from pipeline.similarity.minhash import minhash
from pipeline.similarity.sets import set_similarity
from pipeline.stages.base import CorpusState, Member, StageResult
from pipeline.stages.split import (Split, check_ratios, folder_of, normalize_text, off_target_warnings,
                                   output_count)

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


def test_a_byte_identical_copy_ties_the_folders_and_fields_of_each_of_its_paths():
    # Without a dedup stage byte-identical copies are one member with several paths; each
    # path's folder and metadata row ties it (a split audit: a copy of one song filed under
    # another song's folder, or carrying another composer, left that piece's files in two parts)
    from dataclasses import replace
    c = Corpus(7)
    ids = [c.fresh() for _ in range(40)]
    for seed in range(8):
        members = [c.member(m, source=f"song{i % 10}/{m}.mid") for i, m in enumerate(ids)]
        members[0] = replace(members[0], copies=(("song1/versions/copy.mid", {}),))
        got = parts(run(members, group_by_folder=1, group_threshold=None, seed=seed,
                        ratios={"x": 0.5, "y": 0.5})[0])
        assert len({got[m] for i, m in enumerate(ids) if i % 10 in (0, 1)}) == 1, seed
        members = [replace(c.member(m, source=f"f{i}/{m}.mid"),
                           meta={"composer": "Bee" if 1 <= i <= 4 else f"c{i}"}) for i, m in enumerate(ids)]
        members[0] = replace(members[0], copies=(("g/copy.mid", {"composer": "Bee"}),))
        got = parts(run(members, group_fields=["composer"], group_threshold=None, seed=seed,
                        ratios={"x": 0.5, "y": 0.5})[0])
        assert len({got[m] for m in ids[:5]}) == 1, seed


def test_folder_depth_ties_a_piece_and_its_subfolders():
    # A collection laid out as one folder per piece with a subfolder of other versions (the
    # layout of the POP909 collection: NNN/NNN.mid and NNN/versions/NNN-vK.mid).
    c = Corpus(5)
    ids = [c.fresh() for _ in range(48)]
    source = {m: (f"song{i % 8}/{m}.mid" if i % 2 else f"song{i % 8}/versions/{m}.mid")
              for i, m in enumerate(ids)}
    members = [c.member(m, source=source[m]) for m in ids]
    by_top = parts(run(members, group_by_folder=1)[0])
    for k in range(8):
        assert len({by_top[m] for m in ids if source[m].startswith(f"song{k}/")}) == 1
    # true keeps the file's own folder: a piece's versions/ is a folder of its own.
    assert folder_of("song1/versions/a.mid") == "song1/versions"
    assert folder_of("song1/versions/a.mid", 1) == "song1"
    assert folder_of("song1/a.mid", 2) == "song1"
    assert folder_of("a.mid") is None and folder_of("a.mid", 1) is None


@pytest.mark.parametrize("value", [0, -1, 1.5, "yes"])
def test_bad_folder_depth_is_a_config_error(value):
    from pipeline.config import parse_config
    with pytest.raises(ConfigError, match="group_by_folder"):
        parse_config({"input": "in", "output": "out",
                      "stages": ["validate", {"split": {"group_by_folder": value}}]})


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
    # the reason names the files that tied it: the test file it joins and the new file linking
    # them (an audit: explain named no file), by their paths
    assert f"in 'test' it joins {test_file}.mid ({test_file})" in r2[train_file].detail
    assert "through files new to this run: " in r2[train_file].detail
    assert f"{link}.mid ({link})" in r2[train_file].detail
    assert any(train_file in line and "moved from train to test" in line for line in s2.notes)
    assert s2.current["summary"]["moved"] == 1
    for m, p in first.items():
        if m not in moved:
            assert second[m] == p
    assert cross_part_pairs(c, second) == []
    achieved = s2.current["summary"]["achieved"]
    assert all(abs(achieved[p] - RATIOS[p]) <= 0.02 for p in RATIOS), achieved
    # --reassign: from scratch, equal to a run without history; each file now in another
    # part is reported as moved, by the reassignment (a split audit: such moves showed in
    # the run's changes only, not in explain, the manifest or the counts)
    r3, s3 = run(members, previous=s2.current, flags={"reassign": True})
    assert parts(r3) == parts(run(members)[0])
    changed = {m for m in r3 if parts(r3)[m] != second[m]}
    assert changed
    assert {m for m, r in r3.items() if "moved_from" in r.values} == changed
    assert all("--reassign" in r3[m].detail for m in changed)
    assert s3.current["summary"]["moved"] == len(changed)


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



def _a_test_file_and_its_dropped_copy():
    """50 members run once; one in test (``old``) then run again with a near copy of it that
    dedup drops (``copy``, carrying the part): (corpus, members, first parts, old, copy, state)."""
    c = Corpus(6)
    base = [c.fresh() for _ in range(50)]
    first = parts(run([c.member(m) for m in base])[0])
    old = next(m for m in base if first[m] == "test")
    copy = c.near(old, 0.95)
    dedup1 = {m: StageResult.keep(values={"cluster": m}) for m in base}
    dedup1[copy] = StageResult.drop("near_duplicate", "", values={"cluster": old, "duplicate_of": old})
    r1, s1 = run([c.member(m) for m in base], upstream={"dedup": dedup1})
    assert parts(r1)[old] == "test" and s1.current["inherited"][copy] == "test"
    return c, base, first, old, copy, s1


def test_a_dropped_duplicate_that_becomes_kept_keeps_its_pieces_part():
    """Found by an audit on POP909 (README, Split): a song's main file, dropped by dedup as a
    copy of a version sitting in test, became kept in train when that version was removed
    together with some train songs (the new member went to the part furthest below its share).
    A file dedup dropped carries its cluster's part to the next run, so it stays in test."""
    c, base, first, old, copy, s1 = _a_test_file_and_its_dropped_copy()
    # the test file and ten train files removed: train is now the part furthest below its share
    gone = {old} | set([m for m in base if first[m] == "train"][:10])
    left = [m for m in base if m not in gone] + [copy]
    dedup2 = {m: StageResult.keep(values={"cluster": m}) for m in left}
    r2, s2 = run([c.member(m) for m in left], previous=s1.current, upstream={"dedup": dedup2})
    assert parts(r2)[copy] == "test"
    assert copy not in s2.current["inherited"] and s2.current["assignments"][copy] == "test"
    # without the part it carried the copy would have gone to train (what the test guards)
    r3, _ = run([c.member(m) for m in left], previous={**s1.current, "inherited": {}},
                upstream={"dedup": dedup2})
    assert parts(r3)[copy] == "train"

def test_a_new_representative_takes_the_part_its_dropped_cluster_mates_carry():
    """Found by an audit (a kept file edited in place): its unchanged copies, dropped by dedup
    in every run and so never assigned a part of their own, carried their cluster's part
    (``inherited``) but did not hold the cluster's new representative in it; it went to the
    part furthest below its share. They now tie it as ghosts, with the part they carry."""
    c, base, first, old, copy, s1 = _a_test_file_and_its_dropped_copy()
    # ``old`` replaced by ``new`` (its edited bytes), which dedup keeps over the copy; ten train
    # files removed, so train is the part furthest below its share
    new = c.near(old, 0.9)
    gone = {old} | set([m for m in base if first[m] == "train"][:10])
    left = [m for m in base if m not in gone] + [new]
    dedup2 = {m: StageResult.keep(values={"cluster": m}) for m in left}
    dedup2[new] = StageResult.keep(values={"cluster": new})
    dedup2[copy] = StageResult.drop("near_duplicate", "", values={"cluster": new, "duplicate_of": new})
    r2, s2 = run([c.member(m) for m in left], previous=s1.current, upstream={"dedup": dedup2})
    assert parts(r2)[new] == "test" and "moved_from" not in r2[new].values
    assert s2.current["inherited"][copy] == "test"
    # without the part the copy carries the new file would have gone to train
    r3, _ = run([c.member(m) for m in left], previous={**s1.current, "inherited": {}},
                upstream={"dedup": dedup2})
    assert parts(r3)[new] == "train"


def test_a_dropped_files_carried_part_never_moves_a_member_that_has_one():
    """The part a dropped file took from its cluster places a cluster's new kept file, but when
    dedup links that file to a member placed before (its old cluster's kept file removed), the
    member keeps its part and the dropped file's part follows it."""
    c, base, first, old, copy, s1 = _a_test_file_and_its_dropped_copy()
    member = next(m for m in base if first[m] == "train")
    left = [m for m in base if m != old]
    dedup2 = {m: StageResult.keep(values={"cluster": m}) for m in left}
    dedup2[copy] = StageResult.drop("near_duplicate", "", values={"cluster": member, "duplicate_of": member})
    r2, s2 = run([c.member(m) for m in left], previous=s1.current, upstream={"dedup": dedup2})
    assert parts(r2)[member] == "train" and "moved_from" not in r2[member].values
    assert s2.current["inherited"][copy] == "train"


def test_a_file_edited_in_place_keeps_its_part():
    """Found by an audit: the new content of a file edited in place (a tempo change, a fixed
    note) is a new member; without its path's history it was placed as a new piece, into the
    part furthest below its share, so fixing a test piece could move it into train unreported.
    The runner names the content each edited path held (``flags["edited"]``) and the new
    member starts from that content's part."""
    c = Corpus(7)
    base = [c.fresh() for _ in range(50)]
    r1, s1 = run([c.member(m) for m in base])
    first = parts(r1)
    old = next(m for m in base if first[m] == "test")
    new = c.fresh()  # unlike the old bytes in shingles: only the path ties them
    gone = {old} | set([m for m in base if first[m] == "train"][:10])
    left = [m for m in base if m not in gone] + [new]
    r2, _ = run([c.member(m) for m in left], previous=s1.current, flags={"edited": {new: old}})
    assert parts(r2)[new] == "test" and "moved_from" not in r2[new].values
    r3, _ = run([c.member(m) for m in left], previous=s1.current)
    assert parts(r3)[new] == "train"  # what the test guards: without the path, a new piece
    # --reassign places every group afresh, edits included
    r4, _ = run([c.member(m) for m in left], previous=s1.current,
                flags={"edited": {new: old}, "reassign": True})
    assert parts(r4) == parts(run([c.member(m) for m in left])[0])


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
    from pipeline.store.codec import stored_result
    from pipeline.store.records import Compactor
    from pipeline.stages.split import _same_split
    values = {"split": "train", "group": "00000000000000ab", "group_size": 3}
    stored = Compactor().from_stored(stored_result(StageResult.keep(values=values).to_json()))
    assert _same_split(stored, "train", "00000000000000ab", 3)
    assert not _same_split(stored, "test", "00000000000000ab", 3)
    assert not _same_split(stored, "train", "00000000000000ab", 4)


# --- The split groups near-duplicates on its own ----------------------------------------------------
def _compose_and_variants():
    """Pieces composed in code (tests/test_dedup.py: melody, block chords, bass, drums) and each
    piece's planted variants (transposed, re-tempoed, re-orchestrated, re-quantized, edited,
    excerpt): ``[(name, rows, piece keywords, piece number)]``."""
    from test_dedup import compose, family, variants
    out = []
    for k in range(8):
        rows = compose(family(k), seed=300 + k)
        out.append((f"p{k}/original.mid", rows, {}, k))
        if k < 6:
            for kind, (vrows, kw) in variants(rows, seed=k).items():
                if kind != "same_content":
                    out.append((f"p{k}/{kind}.mid", vrows, dict(kw), k))
    return out


def test_the_split_signs_files_unless_dedup_stores_what_it_needs():
    from pipeline.stages.base import bind_stages
    from pipeline.stages.dedup import Dedup
    alone = bind_stages([Split()])[0]
    assert alone.borrows is None and alone.has_prepare()
    after = bind_stages([Dedup(), Split()])[1]
    assert after.borrows == "dedup" and not after.has_prepare()
    # a removal setting of dedup does not change its signatures; a shingle setting does
    assert bind_stages([Dedup({"threshold": 0.95}), Split()])[1].borrows == "dedup"
    assert bind_stages([Dedup({"ngram": 3}), Split()])[1].has_prepare()
    assert bind_stages([Dedup({"num_perm": 64, "bands": 32}), Split()])[1].has_prepare()
    # grouping off: nothing to sign
    assert not bind_stages([Split({"group_threshold": None})])[0].has_prepare()


def test_split_without_dedup_groups_planted_near_duplicates():
    """Members carrying only the split's own arrays (``Split.prepare``, as the runner stores
    them when no dedup stage runs): every planted variant shares its original's part."""
    from pipeline.stages.base import FileContext
    from test_shingles import make_piece
    stage = Split({"ratios": {"a": 0.5, "b": 0.5}})
    members, piece_of = [], {}
    for name, rows, kw, k in _compose_and_variants():
        tpb = kw.pop("tpb", 480)
        piece = make_piece(rows, tpb=tpb, **kw)
        mid = hashlib.sha256(name.encode()).hexdigest()[:16]
        art = stage.prepare(piece, FileContext(piece, name, mid))
        assert set(art) == {"signature", "shingles", "content_hash"}
        members.append(Member(mid, mid * 4, name, {}, {"split": art}))
        piece_of[mid] = k
    state = CorpusState()
    got = parts(stage.run_corpus(members, state))
    for k in range(8):
        assert len({got[m] for m in got if piece_of[m] == k}) == 1, k
    assert len(set(got.values())) == 2     # the groups were spread over both parts
    summary = state.current["summary"]
    assert summary["near_duplicate_grouping"] is True and summary["near_duplicate_signatures"] == "split"
    # with grouping off, the same members are split as single files (and the summary says so)
    off_state = CorpusState()
    off = parts(Split({"ratios": {"a": 0.5, "b": 0.5}, "group_threshold": None}).run_corpus(members, off_state))
    assert any(len({off[m] for m in off if piece_of[m] == k}) > 1 for k in range(6))
    assert off_state.current["summary"]["near_duplicate_grouping"] is False


def _midi_bytes(rows, tpb=480, tempos=((0, 500_000),)) -> bytes:
    """A format-1 SMF written with mido (the outside writer): one track per row track index,
    notes as note_on / note_off pairs, a program change per channel, the tempo map."""
    import mido
    mid = mido.MidiFile(type=1, ticks_per_beat=tpb)
    cond = mido.MidiTrack()
    last = 0
    for tick, tempo in tempos:
        cond.append(mido.MetaMessage("set_tempo", tempo=tempo, time=tick - last))
        last = tick
    mid.tracks.append(cond)
    for tr in sorted({r[5] for r in rows}):
        events = []
        programs = {}
        for s, e, p, ch, prog, _, vel in (r for r in rows if r[5] == tr):
            programs.setdefault(ch, prog)
            events.append((s, 1, mido.Message("note_on", channel=ch, note=p, velocity=vel)))
            events.append((e, 0, mido.Message("note_off", channel=ch, note=p, velocity=0)))
        track = mido.MidiTrack([mido.Message("program_change", channel=ch, program=prog)
                                for ch, prog in sorted(programs.items())])
        now = 0
        for t, _, msg in sorted(events, key=lambda x: (x[0], x[1])):
            track.append(msg.copy(time=t - now))
            now = t
        mid.tracks.append(track)
    return smf_bytes(mid)


def test_a_run_without_dedup_keeps_planted_variants_in_one_part(tmp_path):
    """End to end (files written by mido, config without a dedup stage): the split signs the
    files itself, every planted variant shares its original's part; with group_threshold null
    the run's table and summary.json say grouping was off."""
    import json

    import yaml

    from pipeline.config import load_config
    from pipeline.engine.runner import Runner
    from pipeline.engine.uptodate import check_up_to_date
    corpus = tmp_path / "corpus"
    piece_of = {}
    for name, rows, kw, k in _compose_and_variants():
        path = corpus / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(_midi_bytes(rows, **kw))
        piece_of[name] = k

    def run_with(split_opts: dict, out: str):
        cfg_path = tmp_path / f"{out}.yaml"
        cfg_path.write_text(yaml.safe_dump({
            "input": str(corpus), "output": str(tmp_path / out), "workers": 1,
            "stages": [{"validate": {}}, {"split": {"ratios": {"a": 0.5, "b": 0.5}, **split_opts}}]}))
        report = Runner(load_config(cfg_path), quiet=True).run()
        rows = [json.loads(line) for line in (tmp_path / out / "manifest.jsonl").read_text().splitlines()]
        summary = json.loads((tmp_path / out / "summary.json").read_text())
        return cfg_path, report, {r["source"]: r["split"] for r in rows}, summary

    _, report, got, summary = run_with({}, "grouped")
    assert len(got) == len(piece_of) and all(got.values())
    for k in range(8):
        assert len({got[n] for n in got if piece_of[n] == k}) == 1, k
    assert len(set(got.values())) == 2
    assert summary["split"]["stage"]["near_duplicate_grouping"] is True
    assert summary["split"]["stage"]["near_duplicate_signatures"] == "split"
    assert "grouping OFF" not in report.table()

    cfg_path, report, off, summary = run_with({"group_threshold": None}, "ungrouped")
    assert summary["split"]["stage"]["near_duplicate_grouping"] is False
    assert "near-duplicate grouping OFF (group_threshold: null)" in report.table()
    # the nothing-changed rerun prints the same table line from summary.json
    again = check_up_to_date(cfg_path)
    assert again is not None and "near-duplicate grouping OFF" in again.table()


def test_a_rerun_without_dedup_ends_with_the_links_of_a_full_search(tmp_path):
    """Files arrive in two runs (config without dedup): the links the split keeps after the
    second run equal a full search over every file's stored arrays (pipeline.similarity.grouping.near_links)."""
    import yaml

    from pipeline.config import load_config
    from pipeline.similarity.grouping import near_links
    from pipeline.store.ledger import Ledger, load_arrays
    from pipeline.engine.runner import Runner
    corpus = tmp_path / "corpus"
    later = []
    for name, rows, kw, k in _compose_and_variants():
        path = corpus / name
        path.parent.mkdir(parents=True, exist_ok=True)
        data = _midi_bytes(rows, **kw)
        if k % 2 and "original" not in name:
            later.append((path, data))
        else:
            path.write_bytes(data)
    cfg_path = tmp_path / "c.yaml"
    cfg_path.write_text(yaml.safe_dump({"input": str(corpus), "output": str(tmp_path / "out"), "workers": 1,
                                        "stages": [{"validate": {}}, {"split": {}}]}))
    Runner(load_config(cfg_path), quiet=True).run()
    for path, data in later:
        path.write_bytes(data)
    Runner(load_config(cfg_path), quiet=True).run()
    split = bind_stages_of(cfg_path)[-1]
    with Ledger(tmp_path / "out" / "state.sqlite") as ledger:
        saved = ledger.state_for("split")["links"]
        arts = ledger.artifacts_for("split", split.artifact_fingerprint, set(ledger.artifact_keys("split", split.artifact_fingerprint)))
        sigs = {sha[:16]: np.asarray(a["signature"], dtype=np.uint32) for sha, a in arts.items()}
        keys = sorted(arts)
        sets = load_arrays([arts[sha]["shingles"] for sha in keys])
    shingles = {sha[:16]: np.asarray(s, dtype=np.uint64) for sha, s in zip(keys, sets)}
    full = sorted((a, b) for a, b, _ in near_links(sigs, split.opts["group_threshold"], shingles))
    assert len(full) >= 20 and len(sigs) == len(_compose_and_variants())
    assert sorted(map(tuple, saved["links"])) == full


def bind_stages_of(cfg_path):
    from pipeline.config import load_config
    from pipeline.stages.base import bind_stages
    return bind_stages([sc.build() for sc in load_config(cfg_path).stages])


def test_files_dedup_keeps_in_one_cluster_share_a_part():
    """Dedup keeps both ends of a chain A ~ B ~ C (A and C unlike, B dropped): they are one
    cluster (leakage is transitive), so the split keeps them in one part although A and C share
    no shingle."""
    c = Corpus(8)
    base = [c.fresh() for _ in range(40)]
    a, z = base[0], base[1]
    members = [c.member(m) for m in base]
    assert set_similarity(c.sets[a], c.sets[z])[0] == 0.0
    for seed in range(6):   # several placements: without the cluster link some would split them
        upstream = {"dedup": {m: StageResult.keep(values={"cluster": m}) for m in base}}
        upstream["dedup"][z] = StageResult.keep(values={"cluster": a})
        got = parts(run(members, upstream=upstream, seed=seed, ratios={"x": 0.5, "y": 0.5})[0])
        assert got[a] == got[z]


# --- title and the metadata table (group_by_title, group_fields) ------------------------------

def _titled_corpus(tmp_path):
    """Twelve distinct pieces (mido-written, seeds 20-31): the conductor track of each is named
    "Piece <seed>" by fixtures_midi.random_midi, so file titles are distinct."""
    from fixtures_midi import random_midi
    corpus = tmp_path / "in"
    corpus.mkdir()
    for i in range(12):
        (corpus / f"tune_{i:02d}.mid").write_bytes(random_midi(20 + i, n_notes=300))
    return corpus


def _run_cfg(tmp_path, corpus, split_opts, metadata=None, name="out"):
    import json
    import yaml

    from pipeline.cli import main
    raw = {"input": str(corpus), "output": str(tmp_path / name), "workers": 1,
           "stages": ["validate", {"split": {"ratios": {"a": 0.5, "b": 0.5}, **split_opts}}]}
    if metadata is not None:
        raw["metadata"] = str(metadata)
    cfg = tmp_path / f"{name}.yaml"
    cfg.write_text(yaml.safe_dump(raw))
    rc = main(["run", str(cfg), "--quiet"])
    rows = [json.loads(line) for line in (tmp_path / name / "manifest.jsonl").read_text().splitlines()]
    return rc, {r["source"]: r for r in rows}


def test_title_is_the_files_track_name_or_its_stem(tmp_path):
    import mido
    corpus = _titled_corpus(tmp_path)
    mid = mido.MidiFile(type=0, ticks_per_beat=96)  # no track name, no text event
    track = mido.MidiTrack()
    for i in range(40):
        track += [mido.Message("note_on", note=60 + i % 12, velocity=80, time=0 if i == 0 else 48),
                  mido.Message("note_off", note=60 + i % 12, velocity=0, time=48)]
    mid.tracks.append(track)
    mid.save(str(corpus / "untitled take.mid"))
    rc, rows = _run_cfg(tmp_path, corpus, {})
    assert rc == 0
    assert rows["tune_03.mid"]["title"] == "Piece 23"
    assert rows["untitled take.mid"]["title"] == "untitled take"
    assert list(rows["tune_03.mid"])[:4] == ["id", "source", "title", "sha256"]


def test_metadata_columns_reach_the_manifest_and_group_the_split(tmp_path):
    corpus = _titled_corpus(tmp_path)
    table = tmp_path / "meta.csv"
    lines = ["source,composer,licence"]
    lines += [f"tune_{i:02d}.mid,Composer {i % 4},{'CC-BY' if i % 2 else 'CC0'}" for i in range(12)]
    table.write_text("\n".join(lines) + "\n")
    rc, rows = _run_cfg(tmp_path, corpus, {"group_fields": ["composer"]}, table)
    assert rc == 0
    assert rows["tune_05.mid"]["composer"] == "Composer 1" and rows["tune_05.mid"]["licence"] == "CC-BY"
    by_composer: dict[str, set] = {}
    for r in rows.values():
        by_composer.setdefault(r["composer"], set()).add(r["split"])
    assert all(len(parts) == 1 for parts in by_composer.values()), by_composer
    # titles: each composer's pieces get one title through the table, and group_by_title ties them
    lines = ["source,title"] + [f"tune_{i:02d}.mid,Song {i % 3}" for i in range(12)]
    table.write_text("\n".join(lines) + "\n")
    rc, rows = _run_cfg(tmp_path, corpus, {"group_by_title": True}, table, name="out2")
    by_title: dict[str, set] = {}
    for r in rows.values():
        by_title.setdefault(r["title"], set()).add(r["split"])
    assert sorted(by_title) == ["Song 0", "Song 1", "Song 2"]
    assert all(len(parts) == 1 for parts in by_title.values()), by_title


def test_an_edited_metadata_table_is_not_nothing_changed(tmp_path):
    corpus = _titled_corpus(tmp_path)
    table = tmp_path / "meta.csv"
    table.write_text("source,composer\ntune_00.mid,A\n")
    _run_cfg(tmp_path, corpus, {}, table)
    table.write_text("source,composer\ntune_00.mid,B\n")
    _, rows = _run_cfg(tmp_path, corpus, {}, table)
    assert rows["tune_00.mid"]["composer"] == "B"


@pytest.mark.parametrize("text,match", [
    ("path,composer\nx.mid,A\n", "needs a 'source' column"),
    ("source,composer\nx.mid,A\nx.mid,B\n", r"line 3.*'x.mid' has a row already \(line 2\)"),
    ("source,composer\nx.mid,A,extra\n", "line 2.*3 fields but the header has 2"),
    ("source,notes\nx.mid,A\n", "notes would overwrite"),
    ('source,composer\n"x.mid,A\n', "not a valid CSV table"),
])
def test_bad_metadata_tables_are_config_errors_naming_the_line(tmp_path, text, match):
    from pipeline.config import parse_config
    from pipeline.errors import ConfigError
    table = tmp_path / "meta.csv"
    table.write_text(text)
    with pytest.raises(ConfigError, match=match):
        parse_config({"input": "in", "output": "out", "metadata": str(table),
                      "stages": ["validate", "split"]})


def test_a_bad_metadata_table_is_reported_once(tmp_path):
    """A mistake in the table is its one error: the names group_fields and metadata_exclude give
    are not checked against columns the table's error left unknown (an audit found a false
    "'composer' is neither a manifest field nor a metadata column" beside a path given twice)."""
    from pipeline.config import parse_config
    from pipeline.errors import ConfigError
    table = tmp_path / "meta.csv"
    table.write_text("source,composer\nx.mid,A\nx.mid,B\n")
    with pytest.raises(ConfigError) as err:
        parse_config({"input": "in", "output": "out", "metadata": str(table),
                      "stages": ["validate", {"filter": {"metadata_exclude": {"composer": ["A"]}}},
                                 {"split": {"group_fields": ["composer"]}}]})
    assert type(err.value) is ConfigError and "has a row already" in err.value.reason
    with pytest.raises(ConfigError) as err:  # a metadata value that is no path: the same
        parse_config({"input": "in", "output": "out", "metadata": 3,
                      "stages": ["validate", {"split": {"group_fields": ["composer"]}}]})
    assert type(err.value) is ConfigError and "must be the path of a CSV table" in err.value.reason


def test_group_fields_must_exist_and_suggest_the_nearest(tmp_path):
    from pipeline.config import parse_config
    from pipeline.errors import ConfigError
    table = tmp_path / "meta.csv"
    table.write_text("source,composer\nx.mid,A\n")
    raw = {"input": "in", "output": "out", "stages": ["validate", {"split": {"group_fields": ["composr"]}}]}
    with pytest.raises(ConfigError, match="'composr' is neither a manifest field.*add a 'metadata"):
        parse_config(raw)
    with pytest.raises(ConfigError, match="did you mean 'composer'"):
        parse_config({**raw, "metadata": str(table)})
    parse_config({**raw, "metadata": str(table),
                  "stages": ["validate", {"split": {"group_fields": ["composer"]}}]})


@pytest.mark.parametrize("field", ["split", "group", "group_size", "output"])
def test_group_fields_cannot_name_what_the_split_writes(field):
    # a split audit: [split] and [output] were accepted and grouped nothing, [group] was
    # refused with a hint to 'output'; our own contract
    from pipeline.config import parse_config
    from pipeline.errors import ConfigError
    raw = {"input": "in", "output": "out", "stages": ["validate", {"split": {"group_fields": [field]}}]}
    with pytest.raises(ConfigError, match=f"'{field}' is written by the split itself") as e:
        parse_config(raw)
    assert "did you mean" not in str(e.value)


def test_part_names_differing_only_in_case_are_refused():
    # a split audit: {train, Train} wrote midi/train/ and midi/Train/, one folder on a file
    # system that ignores case (macOS, Windows); common practice, no source
    assert "differ only in case" in check_ratios({"train": 0.5, "Train": 0.5})
    assert check_ratios({"train": 0.5, "train2": 0.5}) is None


def test_the_valid_names_listed_by_a_field_error_are_each_named_once(tmp_path):
    """The list after "valid names are:" names each field once: ``title`` is a manifest field,
    and a metadata table may have a title column of its own (before, it was listed twice, or
    three times with such a table). Our own contract; nothing to cite."""
    from pipeline.config import parse_config
    from pipeline.errors import ConfigError
    table = tmp_path / "meta.csv"
    table.write_text("source,title,licence\nx.mid,A,cc0\n")
    for stages, table_given in ((["validate", {"split": {"group_fields": ["xyzzy"]}}], False),
                                (["validate", {"split": {"group_fields": ["xyzzy"]}}], True),
                                (["validate", {"filter": {"metadata_exclude": {"xyzzy": ["a"]}}}], True)):
        raw = {"input": "in", "output": "out", "stages": stages}
        if table_given:
            raw["metadata"] = str(table)
        with pytest.raises(ConfigError) as err:
            parse_config(raw)
        listed = err.value.message.split("valid names are: ")[1].split(" (")[0].split(", ")
        assert len(listed) == len(set(listed)) and "title" in listed, listed
        if table_given:
            assert "licence" in listed


def test_metadata_rows_for_missing_files_are_reported(tmp_path, capsys):
    corpus = _titled_corpus(tmp_path)
    table = tmp_path / "meta.csv"
    table.write_text("source,composer\ntune_00.mid,A\nno/such.mid,B\n")
    import yaml

    from pipeline.cli import main
    cfg = tmp_path / "c.yaml"
    cfg.write_text(yaml.safe_dump({"input": str(corpus), "output": str(tmp_path / "o"), "workers": 1,
                                   "metadata": str(table), "stages": ["validate", "split"]}))
    assert main(["run", str(cfg)]) == 0
    out = capsys.readouterr().out
    assert "1 row(s) of" in out and "'no/such.mid'" in out


def test_filter_drops_by_a_metadata_column(tmp_path):
    import json
    """filter.metadata_exclude: a licence column drops its files as metadata_excluded; a
    misspelt column is a config error (exit 2)."""
    import yaml

    from pipeline.cli import main
    corpus = _titled_corpus(tmp_path)
    table = tmp_path / "meta.csv"
    table.write_text("source,licence\n" + "".join(
        f"tune_{i:02d}.mid,{'CC-BY-NC' if i < 3 else 'CC0'}\n" for i in range(12)))
    raw = {"input": str(corpus), "output": str(tmp_path / "o"), "workers": 1, "metadata": str(table),
           "stages": ["validate", {"filter": {"metadata_exclude": {"licence": ["cc-by-nc "]},
                                              "min_seconds": 0}}, "split"]}
    cfg = tmp_path / "c.yaml"
    cfg.write_text(yaml.safe_dump(raw))
    assert main(["run", str(cfg), "--quiet"]) == 0
    rows = {r["source"]: r for r in map(json.loads, (tmp_path / "o" / "manifest.jsonl").read_text().splitlines())}
    for i in range(12):
        r = rows[f"tune_{i:02d}.mid"]
        assert (r["status"], r["reason"]) == (("dropped", "metadata_excluded") if i < 3 else ("kept", None)), r
    assert rows["tune_01.mid"]["detail"] == "licence is 'CC-BY-NC', which metadata_exclude lists"
    raw["stages"][1]["filter"]["metadata_exclude"] = {"licnce": ["x"]}
    cfg.write_text(yaml.safe_dump(raw))
    assert main(["run", str(cfg), "--quiet"]) == 2


class _Unread(dict):
    """Values that must not be read (a rerun answers an old member's output count from the
    split's saved counts)."""

    def get(self, key, default=None):
        raise AssertionError(f"values read: {key}")

    __getitem__ = get


def test_a_rerun_reads_output_counts_of_new_members_only():
    """With the last run's results at hand (upstream options unchanged, so a member's
    ``augment`` is the same), an old member's output count comes from the counts the split
    saved; results and saved state equal those of the computation that reads every member's
    values (the oracle, as in the test above). Without them, every member's values are read."""
    c = Corpus(9)
    ids = [c.fresh() for _ in range(60)]
    aug = {m: {"augment": [-1, 2]} if k % 4 == 0 else {"augment": []} for k, m in enumerate(ids)}

    def member(m, values=None):
        out = c.member(m, values=aug[m])
        if values is not None:
            out.values = values
        out.outputs = []  # as the walk builds them: counts from the transpose stage's values
        return out

    r1, s1 = run([member(m) for m in ids[:50]])
    assert sum(s1.current["summary"]["files"].values()) == 50 + 2 * 13
    assert set(s1.current["output_counts"]) == {m for m in ids[:50] if aug[m]["augment"]}
    full, st_full = run([member(m) for m in ids], previous=s1.current)
    inc, st_inc = run([member(m, _Unread()) for m in ids[:50]] + [member(m) for m in ids[50:]],
                      previous=s1.current, flags={"previous_results": r1})
    assert {k: v.to_json() for k, v in inc.items()} == {k: v.to_json() for k, v in full.items()}
    assert st_inc.current == st_full.current
    with pytest.raises(AssertionError, match="values read"):
        run([member(m, _Unread()) for m in ids], previous=s1.current)


def test_results_name_the_groups_of_the_saved_links_and_parts():
    """The results, made a group at a time, say what the plain form says: each member's group is
    its connected component under the links the split saved (``grouping.build_groups``), named
    by its smallest id, with its size, and its part is the saved assignment's."""
    from pipeline.similarity.grouping import build_groups

    c = Corpus(11)
    base = [c.fresh() for _ in range(120)]
    nears = [c.near(base[i], 0.7) for i in range(25)] + [c.near(base[0], 0.75)]
    results, state = run([c.member(m) for m in base + nears])
    saved = state.current
    groups = build_groups(sorted(results), [tuple(link) for link in saved["links"]["links"]])
    assert any(len(g) == 3 for g in groups.values())
    expect = {m: {"split": saved["assignments"][m], "group": key, "group_size": len(g)}
              for key, g in groups.items() for m in g}
    assert {m: r.values for m, r in results.items()} == expect
    assert all(r.kept and r.detail == "" for r in results.values())


def test_parts_far_from_their_targets_are_warned_about():
    """A run whose parts lie far from their target shares says so, with the way back (an
    audit: one rerun with another folder grouping left train 6 files of 182, with no word
    beyond an empty part). The bounds are ours (common practice): 0.15 and half the target."""
    ratios = {"train": 0.8, "valid": 0.1, "test": 0.1}
    collapsed = off_target_warnings({"train": 6, "valid": 0, "test": 176}, ratios, "test")
    assert [w.split("'")[1] for w in collapsed] == ["train", "test"]
    assert "3.3% of the kept files (6 of 182), its target 80%" in collapsed[0]
    assert "'test' (freeze)" in collapsed[0] and "--reassign" in collapsed[0]
    # a fresh split of few large groups within the bounds (valid 16.5% against 10%), and any
    # split of fewer than 30 kept files, pass without a word
    assert off_target_warnings({"train": 146, "valid": 30, "test": 6}, ratios, "test") == []
    assert off_target_warnings({"train": 2, "valid": 0, "test": 20}, ratios, "test") == []
    assert "the part holding most" in off_target_warnings({"train": 60, "test": 40},
                                                          {"train": 0.9, "test": 0.1}, None)[0]


def test_a_run_ties_the_folder_of_every_path_of_a_byte_identical_copy(tmp_path):
    # the run's members carry their contents' other paths (engine: Contents.copies): a copy of
    # song 0's file filed under song 1's folder puts both songs in one part, with every seed
    from fixtures_midi import random_midi
    corpus = tmp_path / "in"
    for s in range(8):  # two large songs, which the split's greedy fill puts in two parts
        (corpus / f"song{s}").mkdir(parents=True)
        for k in range(6 if s < 2 else 1):
            (corpus / f"song{s}" / f"v{k}.mid").write_bytes(random_midi(100 * s + k, n_notes=60))
    (corpus / "song1" / "copy.mid").write_bytes((corpus / "song0" / "v0.mid").read_bytes())
    for seed in range(2):
        rc, rows = _run_cfg(tmp_path, corpus, {"group_by_folder": 1, "group_threshold": None,
                                               "seed": seed}, name=f"out{seed}")
        assert rc == 0
        assert len({r["split"] for src, r in rows.items() if src.startswith(("song0/", "song1/"))}) == 1
    # explain counts the group's files and contents apart (group_size counts contents)
    from pipeline.audit.explain import explain
    trail = explain(tmp_path / "out0", "song1/copy.mid")
    assert "group members (13 files, 12 contents: byte-identical files share an id" in trail


def test_changed_ratios_are_said_and_moves_are_listed_up_to_a_bound():
    # a split audit: new ratios on a rerun were applied to nothing without a word, and renaming
    # a part printed one line per moved file (143 on 2,000 files); our own contract
    from pipeline.stages.split import MOVES_LISTED
    c = Corpus(11)
    members = [c.member(c.fresh()) for _ in range(300)]
    first, s1 = run(members, ratios={"train": 0.8, "valid": 0.1, "test": 0.1})
    import json
    stored = json.loads(json.dumps(s1.current, sort_keys=True))  # as the ledger keeps it
    _, s2 = run(members, previous=stored, ratios={"train": 0.6, "valid": 0.2, "test": 0.2})
    assert any("the ratios changed since the last run (train 0.8, valid 0.1, test 0.1 -> "
               "train 0.6, valid 0.2, test 0.2)" in n for n in s2.notes)
    summary: dict = {"split": {}}
    Split({"ratios": {"train": 0.6, "valid": 0.2, "test": 0.2}}).add_to_summary(summary, s2.current)
    assert any(w.startswith("the split's ratios were changed (train 0.8, valid 0.1, test 0.1 -> "
                            "train 0.6, valid 0.2, test 0.2) on a rerun") for w in summary["warnings"])
    _, s3 = run(members, previous=s2.current, ratios={"train": 0.6, "valid": 0.2, "test": 0.2})
    assert not any("ratios changed" in n for n in s3.notes)  # said once, on the run that changed them
    renamed, s4 = run(members, previous=s1.current, ratios={"train": 0.8, "dev": 0.1, "test": 0.1})
    moved = [m for m, r in renamed.items() if "moved_from" in r.values]
    assert len(moved) == sum(1 for p in parts(first).values() if p == "valid") > MOVES_LISTED
    listed = [n for n in s4.notes if " moved from valid to " in n]
    assert len(listed) == MOVES_LISTED
    assert all(n.startswith("split: ") and ".mid (" in n for n in listed)  # named by path, then id
    assert any(f"{len(moved) - MOVES_LISTED} more files moved" in n for n in s4.notes)
