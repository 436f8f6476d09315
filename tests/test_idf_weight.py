"""The idf-weighted verification measured by pipeline.tools.idf_weight (not used by the stages)."""
from __future__ import annotations

import math

import numpy as np

from pipeline.similarity import links, lsh, sets
from pipeline.similarity.links import verify_codes
from pipeline.tools.idf_weight import IdfTable, weighted_measure, weighted_similarity, weighted_verification


def _python_weighted(A: set, B: set, df: dict, n: int, ratio: float) -> float:
    """Reference: weighted Jaccard sum(w, A & B) / sum(w, A | B) and weighted containment
    sum(w, A & B) / sum(w, smaller set), w = log(N / df) (inverse document frequency, Sparck
    Jones 1972), with Python sets and math.log; containment for sizes within ``ratio`` (below 1,
as set_similarity)."""
    w = {x: math.log(n / df.get(x, 1)) for x in A | B}
    inter = sum(w[x] for x in A & B)
    jac = inter / sum(w[x] for x in A | B)
    small = A if len(A) <= len(B) else B
    if ratio < 1.0 and len(small) >= ratio * max(len(A), len(B)):
        return max(jac, inter / sum(w[x] for x in small))
    return jac


def test_weighted_measures_equal_the_definition():
    rng = np.random.default_rng(4)
    pool = rng.integers(0, 2**63, 80, dtype=np.uint64)
    files = [np.unique(rng.choice(pool, int(rng.integers(5, 60)), replace=False)) for _ in range(40)]
    table = IdfTable(files)
    df: dict = {}
    for f in files:
        for x in f.tolist():
            df[x] = df.get(x, 0) + 1
    assert table.files == 40
    assert table.df(files[0]).tolist() == [df[x] for x in files[0].tolist()]
    assert table.df(np.array([1], dtype=np.uint64)).tolist() == [1]  # held by no counted file
    for a, b in zip(files[:-1], files[1:]):
        for ratio in (0.1, 1.0):
            want = _python_weighted(set(a.tolist()), set(b.tolist()), df, 40, ratio)
            assert math.isclose(weighted_measure(a, b, table, min_size_ratio=ratio), want, rel_tol=1e-12)


def test_weighting_lowers_a_pair_sharing_common_material_more_than_one_sharing_rare():
    # two pairs with the same unweighted Jaccard (20 shared of 60): one shares shingles every
    # other file holds too, the other shares shingles only they hold; 30 filler files
    rng = np.random.default_rng(1)
    common = np.unique(rng.integers(0, 2**62, 20, dtype=np.uint64))
    rare = np.unique(rng.integers(2**62, 2**63, 20, dtype=np.uint64))

    def own(k):
        return rng.integers(0, 2**63, k, dtype=np.uint64)

    fillers = [np.unique(np.concatenate([common, own(40)])) for _ in range(30)]
    p1 = [np.unique(np.concatenate([common, own(20)])) for _ in range(2)]
    p2 = [np.unique(np.concatenate([rare, own(20)])) for _ in range(2)]
    table = IdfTable(fillers + p1 + p2)
    assert sets.set_similarity(*p1, min_size_ratio=1.0)[0] == sets.set_similarity(*p2, min_size_ratio=1.0)[0]
    low = weighted_similarity(*p1, table, min_size_ratio=1.0)[0]
    high = weighted_similarity(*p2, table, min_size_ratio=1.0)[0]
    assert low < 0.1 < 0.25 < high  # unweighted both 20 / 60


def test_weighted_verification_replaces_the_one_core_and_puts_it_back():
    rng = np.random.default_rng(2)
    keys = [f"k{n}" for n in range(12)]
    shingles = {k: np.unique(rng.integers(0, 2**63, 50, dtype=np.uint64)) for k in keys}
    shingles["k1"] = np.unique(np.concatenate([shingles["k0"][:30], shingles["k1"][:20]]))
    table = IdfTable([shingles[k] for k in keys])
    saved = links.pair_similarities, lsh.plausible_pairs, sets.set_similarity
    codes = np.array([0 * 12 + 1, 2 * 12 + 3], dtype=np.int64)
    plain = verify_codes(keys, codes, shingles, 0.0)
    with weighted_verification(table):
        got = verify_codes(keys, codes, shingles, 0.0)
        assert sets.set_similarity(shingles["k0"], shingles["k1"])[1].startswith("weighted")
        assert lsh.plausible_pairs(None, np.arange(3), np.arange(3), None, 0.5).all()
    assert (links.pair_similarities, lsh.plausible_pairs, sets.set_similarity) == saved
    want = weighted_similarity(shingles["k0"], shingles["k1"], table)[0]
    assert got[0][:2] == ("k0", "k1") and got[0][2] == want and want != plain[0][2]
