"""Tests of pipeline.similarity.grouping: groups from links, and the grouped, rerun-stable assignment.

The grouped-split properties are the ones general-purpose libraries document for group-aware
splitters: scikit-learn's GroupShuffleSplit / GroupKFold guarantee that "the same group will not
appear in two different" parts (scikit-learn user guide, "Cross-validation iterators for grouped
data"; quoted from memory). Checked property-based on random group structures with hypothesis.
"""
from __future__ import annotations

from collections import defaultdict

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.similarity.grouping import (achieved_ratios, assign_groups, band_codes,
                                          build_groups, group_by_keys, lsh_rows, near_links)

RATIOS = {"train": 0.8, "valid": 0.1, "test": 0.1}


def components(nodes, edges):
    """Independent reference: connected components by breadth-first search."""
    adj = defaultdict(set)
    for a, b in edges:
        adj[a].add(b)
        adj[b].add(a)
    seen, comps = set(), []
    for n in sorted(nodes):
        if n in seen:
            continue
        comp, todo = [], [n]
        seen.add(n)
        while todo:
            x = todo.pop()
            comp.append(x)
            for y in adj[x] - seen:
                seen.add(y)
                todo.append(y)
        comps.append(sorted(comp))
    return sorted(comps)


@st.composite
def structures(draw):
    n = draw(st.integers(1, 120))
    ids = [f"{i:04x}" for i in range(n)]
    edges = draw(st.lists(st.tuples(st.sampled_from(ids), st.sampled_from(ids)), max_size=n))
    forced = draw(st.lists(st.lists(st.sampled_from(ids), min_size=1, max_size=5), max_size=5))
    return ids, edges, forced


@settings(max_examples=200, deadline=None)
@given(structures())
def test_groups_are_connected_components(s):
    ids, edges, forced = s
    groups = build_groups(ids, edges, forced)
    extra = [(g[0], x) for g in forced for x in g[1:]]
    assert sorted(groups.values()) == components(ids, edges + extra)
    assert all(key == min(members) for key, members in groups.items())


ratio_sets = st.sampled_from([RATIOS, {"train": 0.5, "test": 0.5},
                              {"train": 0.7, "dev": 0.15, "eval": 0.15},
                              {"a": 0.6, "b": 0.2, "c": 0.1, "d": 0.1}])


@settings(max_examples=200, deadline=None)
@given(structures(), ratio_sets, st.integers(0, 10_000), st.randoms(use_true_random=False))
def test_assignment_properties_from_scratch(s, ratios, seed, rnd):
    ids, edges, forced = s
    groups = build_groups(ids, edges, forced)
    assignment, moves = assign_groups(groups, ratios, seed)
    assert moves == []
    assert sorted(assignment) == sorted(ids) and set(assignment.values()) <= set(ratios)
    # No group in two parts (the GroupShuffleSplit guarantee).
    for members in groups.values():
        assert len({assignment[m] for m in members}) == 1
    # Deterministic whatever the input order (shuffled links, groups and member lists).
    e2, ids2 = list(edges), list(ids)
    rnd.shuffle(e2)
    rnd.shuffle(ids2)
    g2 = build_groups(ids2, e2, forced)
    g2 = {k: g2[k] for k in sorted(g2, key=lambda _: rnd.random())}
    assert assign_groups(g2, ratios, seed)[0] == assignment
    # Documented balance bound: over by < w_max / N, under by <= (k - 1) * w_max / N.
    w_max = max(len(g) for g in groups.values())
    n, k = len(ids), len(ratios)
    got = achieved_ratios(assignment, ratios)
    for part, target in ratios.items():
        assert got[part] - target < w_max / n + 1e-9
        assert target - got[part] <= (k - 1) * w_max / n + 1e-9


@settings(max_examples=200, deadline=None)
@given(structures(), st.integers(0, 1000), st.data())
def test_rerun_keeps_parts_and_reports_every_move(s, seed, data):
    ids, edges, forced = s
    # First run on a subset, second run with all members and all links.
    old_ids = [m for m in ids if data.draw(st.booleans())]
    old_edges = [(a, b) for a, b in edges if a in old_ids and b in old_ids]
    first, _ = assign_groups(build_groups(old_ids, old_edges), RATIOS, seed)
    groups = build_groups(ids, edges, forced)
    second, moves = assign_groups(groups, RATIOS, seed, previous=first)
    moved = {m: (old, new) for m, old, new, _ in moves}
    for m, part in first.items():
        if m in moved:
            assert moved[m] == (part, second[m])
        else:
            assert second[m] == part, "an earlier assignment changed without a reported move"
    for members in groups.values():
        assert len({second[m] for m in members}) == 1
        before = {first[m] for m in members if m in first}
        if len(before) > 1 and "test" in before:
            assert second[members[0]] == "test"   # the frozen part keeps merged groups
        if len(before) <= 1:
            assert not any(m in moved for m in members)


def test_merge_rules_freeze_and_majority():
    groups = {"a": ["a", "b", "c", "d"]}
    prev = {"a": "train", "b": "train", "c": "train", "d": "test"}
    got, moves = assign_groups(groups, RATIOS, 0, prev, freeze="test")
    assert set(got.values()) == {"test"}
    assert [(m, f, t) for m, f, t, _ in moves] == [("a", "train", "test"), ("b", "train", "test"),
                                                   ("c", "train", "test")]
    assert "frozen part 'test'" in moves[0][3]
    got, moves = assign_groups(groups, RATIOS, 0, prev, freeze=None)
    assert set(got.values()) == {"train"} and [m for m, *_ in moves] == ["d"]
    # A part that is no longer configured: the member is placed afresh and reported.
    got, moves = assign_groups({"x": ["x"]}, {"train": 0.5, "dev": 0.5}, 0, {"x": "valid"})
    assert moves[0][:2] == ("x", "valid") and "no longer configured" in moves[0][3]


def test_seed_changes_placement_and_sizes_weigh():
    groups = {f"{i:03d}": [f"{i:03d}"] for i in range(200)}
    a0, _ = assign_groups(groups, RATIOS, 0)
    a1, _ = assign_groups(groups, RATIOS, 1)
    assert a0 != a1
    assert achieved_ratios(a0, RATIOS) == pytest.approx(RATIOS)
    # Weights: a member with 8 outputs counts 8 files in the ratios.
    sizes = {m: (8.0 if m == "000" else 1.0) for m in groups}
    a, _ = assign_groups(groups, RATIOS, 0, sizes=sizes)
    got = achieved_ratios(a, RATIOS, sizes)
    assert all(abs(got[p] - RATIOS[p]) <= 8 / 207 for p in RATIOS)


def test_group_by_keys_skips_none():
    assert group_by_keys({"a": "x", "b": "x", "c": None, "d": None, "e": "y"}.items()) == [["a", "b"]]


def test_lsh_rows_meets_recall():
    # Candidate probability 1 - (1 - s^r)^(n/r) (Mining of Massive Datasets, ch. 3).
    for t in (0.3, 0.5, 0.8):
        r = lsh_rows(t, 128)
        assert 1 - (1 - t ** r) ** (128 // r) >= 0.99
        assert 128 % r == 0


def planted_sets(seed: int, n_base: int, keeps, digits: int = 1) -> dict[str, np.ndarray]:
    """Random shingle sets of 300 values (``b0``, ``b1``, ...) and, for each share in ``keeps``,
    a variant ``vI`` of ``bI`` keeping that share of its values (the rest fresh ones): planted
    overlaps at known Jaccard for the searches' tests. ``digits`` pads the numbers."""
    rng = np.random.default_rng(seed)
    base = {f"b{i:0{digits}d}": rng.choice(2**40, 300, replace=False).astype(np.uint64) for i in range(n_base)}
    sets = dict(base)
    for i, keep in enumerate(keeps):
        src = base[f"b{i:0{digits}d}"]
        n_keep = int(len(src) * keep)
        fresh = rng.choice(2**40, len(src) - n_keep, replace=False).astype(np.uint64) + np.uint64(2**41)
        sets[f"v{i:0{digits}d}"] = np.concatenate([src[:n_keep], fresh])
    return {k: np.unique(v) for k, v in sets.items()}


def test_near_links_finds_every_pair_above_threshold_and_no_other():
    """Against brute-force exact Jaccard on random shingle sets with planted overlaps."""
    from pipeline.similarity.minhash import minhash

    sets = planted_sets(7, 40, [0.95, 0.85, 0.75, 0.7, 0.66, 0.4, 0.3, 0.2])
    sigs = {k: minhash(v) for k, v in sets.items()}
    got = {(a, b): s for a, b, s in near_links(sigs, 0.5, sets)}
    keys = sorted(sets)
    for i, a in enumerate(keys):
        for b in keys[i + 1:]:
            inter = len(np.intersect1d(sets[a], sets[b]))
            jac = inter / (len(sets[a]) + len(sets[b]) - inter)
            cont = inter / min(len(sets[a]), len(sets[b]))   # equal sizes: containment = overlap share
            sim = max(jac, cont)
            if sim >= 0.55:
                assert (a, b) in got, (a, b, sim)
            if (a, b) in got:
                assert got[(a, b)] == pytest.approx(sim) and sim >= 0.5
    # the plausibility bounds go a chunk of candidates at a time (memory): chunks of 3 pairs
    # give the links one chunk gives
    from pipeline.similarity import lsh as similarity
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(similarity, "PAIR_CHUNK", 3)
        assert {(a, b): s for a, b, s in near_links(sigs, 0.5, sets)} == got


@settings(max_examples=60, deadline=None)
@given(st.integers(2, 60), st.sampled_from([4, 8, 16]), st.integers(0, 2**32 - 1),
       st.sampled_from(["all", "a fifth", "one"]), st.booleans())
def test_band_codes_equal_brute_force(n, bands, seed, marked, shifted):
    """The banded candidate search equals the definition of LSH banding (Mining of Massive
    Datasets, ch. 3: a pair is a candidate when any band of its two signatures is equal),
    checked pair by pair on signatures with small value ranges (many shared bands, runs longer
    than two, some empty signatures); with ``only``, the pairs touching a marked row (a fifth
    of the rows takes the path that sorts each band, one row among 16 or more the path that
    searches the new rows' keys). The per-file LSHIndex must give the same pairs. With
    ``shifted`` (the split's search), the bands taken again one row over count too: rows
    ``b * r + 1 .. b * r + r``, the last band wrapping round to row 0."""
    from pipeline.similarity.lsh import LSHIndex
    from pipeline.similarity.minhash import EMPTY_VALUE

    rng = np.random.default_rng(seed)
    sig = rng.integers(0, 3, (n, 32), dtype=np.uint32)
    sig[rng.random(n) < 0.1] = EMPTY_VALUE  # empty shingle sets never pair
    only = None
    if marked == "a fifth":
        only = rng.random(n) < 0.2
    elif marked == "one":
        only = np.zeros(n, dtype=bool)
        only[rng.integers(n)] = True
    rows = 32 // bands
    want = []
    for i in range(n):
        for j in range(i + 1, n):
            if (sig[i] == EMPTY_VALUE).all() or (sig[j] == EMPTY_VALUE).all():
                continue
            if only is not None and not (only[i] or only[j]):
                continue
            starts = [b * rows for b in range(bands)] + ([b * rows + 1 for b in range(bands)] if shifted else [])
            if any(all(sig[i, (s + k) % 32] == sig[j, (s + k) % 32] for k in range(rows)) for s in starts):
                want.append((i, j))
    codes, live = band_codes(sig, bands, only, shifted=shifted)
    got = zip(live[codes // len(live)].tolist(), live[codes % len(live)].tolist()) if len(codes) else []
    assert list(got) == want
    if shifted:
        return  # dedup's index bands without the shifted copy
    keys = [f"{i:03d}" for i in range(n)]
    index = LSHIndex(32, bands)
    for k, row in zip(keys, sig):
        index.add(k, row)
    new = None if only is None else {keys[i] for i in range(n) if only[i]}
    c, ids = index.candidate_codes(new), index.ids  # dedup's banding of the same signatures
    assert [(ids[a], ids[b]) for a, b in zip((c // len(ids)).tolist(), (c % len(ids)).tolist())] == \
        [(keys[i], keys[j]) for i, j in want]


def reference_assign(groups, ratios, seed, previous, freeze, sizes):
    """Independent reference of the placement rule in grouping's module docstring (every group
    through the same steps, in plain Python): inherited groups in key order, then new groups
    largest first (ties by the seeded rank) into the part with the largest deficit."""
    from pipeline.similarity.grouping import seeded_rank
    parts = list(ratios)
    current = dict.fromkeys(parts, 0.0)
    assignment, moves, fresh = {}, [], []

    def place(ids, target, w):
        current[target] += w
        for m in ids:
            assignment[m] = target
            if previous.get(m) not in (None, target):
                moves.append((m, previous[m], target))

    for key in sorted(groups):
        ids = groups[key]
        w = sum(float(sizes.get(m, 1.0)) for m in ids)
        counts = defaultdict(int)
        for m in ids:
            if previous.get(m) in parts:
                counts[previous[m]] += 1
        if not counts:
            fresh.append((-w, seeded_rank(key, seed), key))
        elif len(counts) > 1 and freeze in counts:
            place(ids, freeze, w)
        else:
            place(ids, max(counts, key=lambda p: (counts[p], -parts.index(p))), w)
    for neg_w, _, key in sorted(fresh):
        total = sum(current.values()) - neg_w
        place(groups[key], max(parts, key=lambda p: (ratios[p] * total - current[p], -parts.index(p))), -neg_w)
    return assignment, sorted(moves)


@settings(max_examples=150, deadline=None)
@given(structures(), st.integers(0, 50), st.data())
def test_rerun_assignment_equals_the_rule_stated_plainly(s, seed, data):
    # Reference: reference_assign above, the documented rule with no shortcut (assign_groups
    # takes one for a group of one member keeping its part, the bulk of a rerun)
    ids, edges, forced = s
    groups = build_groups(ids, edges, forced)
    previous = {m: data.draw(st.sampled_from(["train", "valid", "test", "old"])) for m in ids
                if data.draw(st.booleans())}
    sizes = {m: float(data.draw(st.integers(0, 3))) for m in ids if data.draw(st.booleans())}
    got, moves = assign_groups(groups, RATIOS, seed, previous, "test", sizes)
    want, want_moves = reference_assign(groups, RATIOS, seed, previous, "test", sizes)
    assert got == want
    assert [(m, a, b) for m, a, b, _ in moves] == want_moves
