"""The split's exact pre-filter (pipeline/similarity/overlap_sketch.py): it must never drop a
pair whose similarity reaches the threshold, and the search's links must not change with it."""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_similarity import _python_set_similarity, _signature

from pipeline.analysis.shingles import ShingleSpec
from pipeline.similarity import overlap_sketch
from pipeline.similarity.grouping import near_links
from pipeline.similarity.overlap_sketch import may_reach, sketch_sets
from pipeline.similarity.sets import MIN_SIZE_RATIO, drop_generic

CAP = ShingleSpec().max_shingles
LEAD = 1 << 63


def _set_of(values: list[int]) -> np.ndarray:
    return np.unique(np.array(values, dtype=np.uint64))


@st.composite
def _families(draw):
    """Sets drawn from a small pool of lead values (below 2**63) and other values, so that
    pairs share many shingles, one set is often a subset of another (containment), and a
    small bitmap has many collisions within a set and between sets."""
    lead_pool = draw(st.lists(st.integers(0, LEAD - 1), min_size=1, max_size=120, unique=True))
    rest_pool = draw(st.lists(st.integers(LEAD, 2**64 - 1), min_size=1, max_size=200, unique=True))
    n = draw(st.integers(2, 7))
    sets = []
    for _ in range(n):
        lead = draw(st.lists(st.sampled_from(lead_pool), max_size=90))
        rest = draw(st.lists(st.sampled_from(rest_pool), max_size=150))
        sets.append(_set_of(lead + rest))
    return sets


@settings(max_examples=150, deadline=None)
@given(_families(), st.sampled_from([128, 256, 1024, 4096]))
def test_the_bound_never_drops_a_pair_at_or_above_the_threshold(sets, bits):
    # Reference: Jaccard and containment with Python's built-in sets, whole sets and lead
    # parts (test_similarity._python_set_similarity). Each pair's threshold is its own exact
    # value (a pair just at the threshold) and the pair must be kept; a pair the filter drops
    # must lie below every threshold it is asked with.
    sk = sketch_sets(sets, bits)
    n = len(sets)
    i, j = np.triu_indices(n, 1)
    exact = np.array([_python_set_similarity(sets[a], sets[b], CAP, MIN_SIZE_RATIO)
                      for a, b in zip(i.tolist(), j.tolist())])
    for t in sorted(set(exact.tolist()) | {0.2, 0.5}):
        if t <= 0:
            continue
        kept = may_reach(sk, i, j, t)
        assert kept[exact >= t].all(), (t, exact, kept)


def test_the_bound_drops_pairs_sharing_little_at_a_low_threshold():
    # The filter must reject something: unrelated random sets of 300 (about 40 lead values)
    # sharing a few stock values are far below 0.2 (Python sets); with 4096 bits nearly all of
    # their pairs (at least 99%) go, while a planted subset (containment 1.0) stays.
    rng = np.random.default_rng(5)
    stock = rng.integers(0, 2**64, 40, dtype=np.uint64)
    sets = [np.unique(np.concatenate([rng.integers(0, 2**63, 40, dtype=np.uint64),
                                      rng.integers(2**63, 2**64, 260, dtype=np.uint64),
                                      rng.choice(stock, 8, replace=False)])) for _ in range(60)]
    sets.append(sets[0][::3].copy())  # a third of set 0: containment 1.0
    sk = sketch_sets(sets)
    i, j = np.triu_indices(len(sets), 1)
    exact = np.array([_python_set_similarity(sets[a], sets[b], CAP, MIN_SIZE_RATIO)
                      for a, b in zip(i.tolist(), j.tolist())])
    kept = may_reach(sk, i, j, 0.2)
    assert kept[exact >= 0.2].all() and (exact >= 0.2).sum() == 1
    assert kept.sum() <= 0.01 * len(kept)  # 1,830 pairs


def test_sets_at_the_cap_are_kept():
    # Sets cut at max_shingles are compared on their common hash range (a sub-range), so
    # the bound on the whole sets does not hold for them: such pairs are always kept.
    rng = np.random.default_rng(1)
    big = np.unique(rng.integers(0, 2**64, CAP + 10, dtype=np.uint64))[:CAP]
    other = np.unique(rng.integers(0, 2**64, 300, dtype=np.uint64))
    assert may_reach(sketch_sets([big, other]), np.array([0]), np.array([1]), 0.9).tolist() == [True]


@pytest.mark.parametrize("bits, chunk", [(128, 7), (4096, 7), (4096, 256)])
def test_near_links_at_the_split_threshold_equal_brute_force_and_the_search_without_the_filter(bits, chunk):
    # Reference: every pair compared with Python sets (_python_set_similarity). The search's
    # links at 0.2 are pairs of the brute force with their exact values; every pair found by
    # the search without the filter is found with it (the filter only removes pairs below the
    # threshold), here with a bitmap of 128 bits too (many collisions). The sets: tunes with
    # variants (a head cut off), melody-only excerpts (containment), pairs sharing exactly a
    # fifth of the smaller set (containment 0.2: just at the threshold) and unrelated sets.
    # ``chunk``: sets sketched at once; 7 spreads the sets in candidate pairs over several chunks.
    rng = np.random.default_rng(11)
    sets = {}
    for c in range(12):
        lead = rng.integers(0, 2**63, 60, dtype=np.uint64)
        rest = rng.integers(2**63, 2**64, 240, dtype=np.uint64)
        full = np.unique(np.concatenate([lead, rest]))
        sets[f"t{c:02d}"] = full
        sets[f"v{c:02d}"] = full[rng.integers(5, 40):]
        sets[f"m{c:02d}"] = np.unique(lead)  # the lead alone: contained in the full set
        sets[f"e{c:02d}"] = np.unique(np.concatenate([rest[:20], rng.integers(2**63, 2**64, 80, dtype=np.uint64)]))
    for c in range(20):
        sets[f"u{c:02d}"] = np.unique(rng.integers(0, 2**64, 250, dtype=np.uint64))
    sigs = {k: _signature(v) for k, v in sets.items()}
    keys = sorted(sets)
    brute = {(a, b): v for x, a in enumerate(keys) for b in keys[x + 1:]
             for v in [_python_set_similarity(sets[a], sets[b], CAP, MIN_SIZE_RATIO)] if v >= 0.2}
    assert any(v == 0.2 for v in brute.values())  # pairs just at the threshold
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(overlap_sketch, "sketched_codes", lambda keys, codes, *a, **k: codes)
        unfiltered = near_links(sigs, 0.2, sets)
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(overlap_sketch, "SKETCH_BITS", bits)
        mp.setattr(overlap_sketch, "_READ_CHUNK", chunk)
        got = near_links(sigs, 0.2, sets)
    assert got == unfiltered
    assert all(brute.get((a, b)) == pytest.approx(v) for a, b, v in got)
    # the LSH search finds a pair with a probability below one; pairs at 0.5 and above are
    # found with probability above 0.9999 at 64 bands of 2 rows (Mining of Massive Datasets, ch. 3)
    assert {p for p, v in brute.items() if v >= 0.5} <= {(a, b) for a, b, _ in got}


@pytest.mark.parametrize("bits", [128, 4096])
def test_sketches_are_the_bits_of_the_sets_without_the_generic_shingles(bits):
    # Reference: the bitmap's definition in plain Python (a shingle sets bit ``x % (bits / 2)``
    # of the lead half when ``x < 2**63``, else that bit of the other half; bit p is bit
    # ``p % 64`` of word ``p // 64``), over Python sets without the generic shingles; sizes,
    # lead sizes and the shingles lost to collisions follow from the same sets.
    rng = np.random.default_rng(3)
    generic = _set_of(rng.integers(0, 2**64, 30, dtype=np.uint64).tolist())
    sets = [_set_of(rng.integers(0, 2**64, k, dtype=np.uint64).tolist() + generic[:k // 3].tolist())
            for k in (0, 1, 40, 300)] + [generic[:5].copy()]
    sk = sketch_sets([drop_generic(x, generic) for x in sets], bits)
    half = bits // 2
    for r, x in enumerate(sets):
        own = set(x.tolist()) - set(generic.tolist())
        on = {(v % half) + (0 if v < LEAD else half) for v in own}
        want = [sum(1 << (p % 64) for p in on if p // 64 == w) for w in range(bits // 64)]
        assert sk.bits[r].tolist() == want
        lead = sum(v < LEAD for v in own)
        assert (sk.size[r], sk.lead[r]) == (len(own), lead)
        assert sk.lost_lead[r] == lead - sum(p < half for p in on)
        assert sk.lost_rest[r] == len(own) - lead - sum(p >= half for p in on)
    assert sketch_sets(sets, bits).size[3] > sk.size[3]  # not dropped: every shingle
