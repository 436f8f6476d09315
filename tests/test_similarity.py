"""MinHash, LSH banding, verification and union-find, checked against datasketch, theory and
brute force (Python sets)."""
from __future__ import annotations

import numpy as np
import pytest
from datasketch import MinHash, MinHashLSH

from pipeline.midi import accel
from pipeline.midi import decode as smf
from pipeline.similarity.grouping import near_links
from pipeline.similarity.lsh import (LSHIndex, band_keys, candidate_probability, check_banding,
                                     pair_estimates, sorted_unique)
from pipeline.similarity.links import UnionFind, code_similarities, verify_codes
from pipeline.similarity.minhash import fold32, minhash
from pipeline.similarity.sets import pair_similarities, set_similarity


def pair_with_jaccard(rng: np.random.Generator, j: float, union: int = 400) -> tuple[np.ndarray, np.ndarray]:
    """Two sets of random 64-bit hashes whose exact Jaccard is round(j*union)/union."""
    u = np.unique(rng.integers(0, 2**63, union + 20, dtype=np.uint64))[:union]
    rng.shuffle(u)
    inter = int(round(j * union))
    rest = union - inter
    a = np.concatenate([u[:inter], u[inter:inter + rest // 2]])
    b = np.concatenate([u[:inter], u[inter + rest // 2:]])
    return np.sort(a), np.sort(b)


@pytest.mark.parametrize("num_perm,seed", [(128, 1), (64, 7), (256, 42)])
def test_numpy_minhash_equals_datasketch_digest(num_perm, seed):
    # Reference: datasketch.MinHash (scheme affine32, datasketch >= 2.0) with an identity hash
    # over our 32-bit folded shingles must give the same digest as our numpy implementation.
    rng = np.random.default_rng(seed)
    sh = np.unique(rng.integers(0, 2**63, 300, dtype=np.uint64))
    ref = MinHash(num_perm=num_perm, seed=seed, hashfunc=int)
    ref.update_batch([int(x) for x in fold32(sh)])
    empty = MinHash(num_perm=num_perm, seed=seed, hashfunc=int)
    for compiled in (False, True):  # the numpy formulation, and the C path where it is built
        assert np.array_equal(minhash(sh, num_perm, seed, compiled=compiled), ref.digest())
        assert np.array_equal(minhash(np.zeros(0, np.uint64), num_perm, seed, compiled=compiled),
                              empty.digest())


def test_estimate_error_follows_broder_standard_deviation():
    # Broder 1997, "On the resemblance and containment of documents": the fraction of equal
    # min-hashes is an unbiased estimate of J with variance J(1-J)/k for k permutations.
    rng = np.random.default_rng(0)
    k = 128
    # pair_estimates (the split's and dedup's MinHash estimates) on one pair per seed
    z = []
    for i in range(300):
        j = float(rng.uniform(0.1, 0.9))
        a, b = pair_with_jaccard(rng, j)
        exact = len(np.intersect1d(a, b)) / len(np.union1d(a, b))
        sig = np.vstack([minhash(a, k, seed=i), minhash(b, k, seed=i)])
        est = float(pair_estimates(sig, np.array([0]), np.array([1]))[0])
        z.append((est - exact) / np.sqrt(exact * (1 - exact) / k))
    z = np.array(z)
    assert abs(z.mean()) < 0.25            # unbiased: mean of 300 z-scores is ~N(0, 1/300)
    assert 0.7 < np.mean(z ** 2) < 1.35    # variance matches J(1-J)/k
    assert np.mean(np.abs(z) <= 2) > 0.9   # ~95% within two standard deviations


@pytest.mark.parametrize("bands,rows", [(16, 4), (32, 2)])
def test_lsh_candidate_probability_follows_banding_formula(bands, rows):
    # Leskovec, Rajaraman, Ullman, Mining of Massive Datasets, ch. 3: P = 1 - (1 - s^r)^b.
    rng = np.random.default_rng(bands)
    trials = 300
    for s in (0.2, 0.35, 0.5, 0.7):
        hits = 0
        for t in range(trials):
            a, b = pair_with_jaccard(rng, s)
            keys = band_keys(np.vstack([minhash(a, bands * rows, seed=t), minhash(b, bands * rows, seed=t)]), bands)
            hits += bool(np.any(keys[0] == keys[1]))
        p = float(candidate_probability(s, bands, rows))
        sd = np.sqrt(p * (1 - p) / trials)
        assert abs(hits / trials - p) <= 4 * sd + 0.02, (s, hits / trials, p)


def test_lsh_index_finds_the_pairs_datasketch_lsh_finds():
    # Reference: datasketch.MinHashLSH with the same banding (params=(b, r)) on the same digests.
    rng = np.random.default_rng(5)
    sets = {}
    for c in range(40):
        base = np.unique(rng.integers(0, 2**63, 200, dtype=np.uint64))
        for v in range(3):
            keep = base[rng.random(len(base)) > 0.1 * v]
            sets[f"c{c:02d}v{v}"] = np.unique(np.concatenate([keep, rng.integers(0, 2**63, 5 * v, dtype=np.uint64)]))
    bands, rows = 32, 4
    lsh = MinHashLSH(num_perm=bands * rows, params=(bands, rows))
    index = LSHIndex(bands * rows, bands)
    mh = {}
    for key, sh in sets.items():
        m = MinHash(num_perm=bands * rows, seed=1, hashfunc=int)
        m.update_batch([int(x) for x in fold32(sh)])
        mh[key] = m
        lsh.insert(key, m)
        index.add(key, minhash(sh, bands * rows, 1))
    theirs = {tuple(sorted((k, o))) for k, m in mh.items() for o in lsh.query(m) if o != k}
    assert _id_pairs(index) == theirs
    assert len(theirs) >= 80
    # the same index built in one call (with an empty signature, which never pairs)
    keys = sorted(sets) + ["zz-empty"]
    sigs = np.vstack([minhash(sets[k], bands * rows, 1) for k in keys[:-1]] +
                     [minhash(np.zeros(0, dtype=np.uint64), bands * rows, 1)])
    whole = LSHIndex(bands * rows, bands)
    whole.extend(keys, sigs)
    assert whole.ids == sorted(sets) and _id_pairs(whole) == theirs


def _id_pairs(index) -> set[tuple[str, str]]:
    """The ids of an index's candidate pairs (``candidate_codes``), each pair sorted."""
    c, ids, n = index.candidate_codes(), index.ids, len(index.ids)
    return {tuple(sorted((ids[a], ids[b]))) for a, b in zip((c // n).tolist(), (c % n).tolist())}


def test_set_similarity_jaccard_and_containment():
    a = np.arange(100, dtype=np.uint64)
    assert set_similarity(a, a) == (1.0, "jaccard")
    excerpt = a[:85]
    assert set_similarity(a, excerpt) == (1.0, "containment")
    assert set_similarity(a, excerpt, min_size_ratio=0.9) == (0.85, "jaccard")
    half = np.arange(50, 150, dtype=np.uint64)
    assert set_similarity(a, half) == (0.5, "containment")           # 50 shared of 100
    assert set_similarity(a, half, min_size_ratio=1.0) == (pytest.approx(50 / 150), "jaccard")
    assert set_similarity(a, np.zeros(0, np.uint64)) == (0.0, "jaccard")


def test_capped_sets_compare_on_their_common_hash_range():
    rng = np.random.default_rng(9)
    a, b = pair_with_jaccard(rng, 0.6, union=6000)
    exact = set_similarity(a, b, min_size_ratio=1.0, cap=10**9)[0]
    capped = set_similarity(a[:2000], b[:2000], min_size_ratio=1.0, cap=2000)[0]
    assert abs(capped - exact) < 0.05


def _python_set_similarity(a: np.ndarray, b: np.ndarray, cap: int, ratio: float) -> float:
    """Reference: Jaccard |A & B| / |A | B| and containment |A & B| / min(|A|, |B|) with
    Python's built-in sets (a general-purpose implementation, not ours), on the common hash
    range when a set was cut at ``cap``; containment only for sizes within ``ratio``. The same
    measure of the lead parts (values below 2**63) counts too when both hold 16 or more
    (containment there only from 64 in the smaller)."""
    whole = _python_measure({int(x) for x in a}, {int(x) for x in b}, cap, ratio)
    A, B = {int(x) for x in a if int(x) < 1 << 63}, {int(x) for x in b if int(x) < 1 << 63}
    if len(A) >= 16 and len(B) >= 16:
        return max(whole, _python_measure(A, B, cap, ratio, 64))
    return whole


def _python_measure(A: set, B: set, cap: int, ratio: float, min_contained: int = 0) -> float:
    if not A or not B:
        return 0.0
    if len(A) >= cap or len(B) >= cap:
        limit = min(max(A), max(B))
        A, B = {x for x in A if x <= limit}, {x for x in B if x <= limit}
    inter = len(A & B)
    jac = inter / len(A | B)
    small, large = min(len(A), len(B)), max(len(A), len(B))
    if ratio < 1.0 and small >= ratio * large and small >= min_contained and inter / small > jac:
        return inter / small
    return jac


def _random_sets(rng: np.random.Generator, n: int, cap: int) -> list[np.ndarray]:
    """Sorted unique uint64 sets of mixed sizes (empty, small, at and above ``cap``), many of
    them sharing values, so every branch of the comparison is taken."""
    pool = rng.integers(0, 2**64, 4 * cap, dtype=np.uint64)
    out = []
    for k in range(n):
        size = int(rng.choice([0, 1, 5, cap // 3, cap - 1, cap, cap + 40]))
        out.append(sorted_unique(rng.choice(pool, size=size))[:cap] if size else np.zeros(0, np.uint64))
    return out


@pytest.mark.parametrize("ratio", [0.75, 1.0, 0.3])
def test_pair_similarities_equal_python_sets_and_set_similarity(ratio):
    # Reference: Python's set operations (_python_set_similarity). Both paths of
    # pair_similarities (the numpy specification and the C kernel where it is built) must give
    # exactly set_similarity's float for every pair, and that the reference's value.
    rng = np.random.default_rng(11)
    cap = 60
    sets = _random_sets(rng, 40, cap)
    # an excerpt of exactly 0.75 of a set (containment applies at the default ratio, to the bit)
    sets += [np.arange(40, dtype=np.uint64), np.arange(30, dtype=np.uint64)]
    i = np.append(rng.integers(0, len(sets), 600), [40, 41])
    j = np.append(rng.integers(0, len(sets), 600), [41, 40])
    want = np.array([set_similarity(sets[x], sets[y], min_size_ratio=ratio, cap=cap)[0]
                     for x, y in zip(i, j)])
    ref = np.array([_python_set_similarity(sets[x], sets[y], cap, ratio) for x, y in zip(i, j)])
    assert np.allclose(want, ref, rtol=0, atol=1e-15)
    paths = (False, True) if accel.USE_ACCEL else (False,)
    for compiled in paths:
        got = pair_similarities(sets, i, j, min_size_ratio=ratio, cap=cap, compiled=compiled)
        assert got.dtype == np.float64 and np.array_equal(got, want), compiled
    assert len(pair_similarities(sets, i[:0], j[:0])) == 0


@pytest.mark.skipif(not accel.USE_ACCEL, reason="the compiled kernels are not built")
def test_overlap_kernel_names_bad_input():
    kernel = accel.module.overlap_counts
    sets = [np.arange(4, dtype=np.uint64)]
    with pytest.raises(IndexError, match="set index 3 outside 0..0"):
        kernel(sets, np.array([0], np.int64), np.array([3], np.int64), 10)
    with pytest.raises(ValueError, match="not a uint64 array"):
        kernel([np.arange(3, dtype=np.uint8)], np.array([0], np.int64), np.array([0], np.int64), 10)
    with pytest.raises(ValueError, match="one length"):
        kernel(sets, np.array([0, 0], np.int64), np.array([0], np.int64), 10)
    with pytest.raises(ValueError, match="int64 arrays"):
        kernel(sets, np.array([0.0]), np.array([0.0]), 10)
    with pytest.raises(ValueError, match="not a uint64 array"):
        kernel([np.arange(4, dtype=np.float64)], np.array([0], np.int64), np.array([0], np.int64), 10)


def _banded_brute_force(sig, bands, is_new):
    """LSH banding by its definition (Mining of Massive Datasets, ch. 3: a pair is a candidate
    when any band of its two signatures is equal), pair by pair, as codes i * n + j."""
    n, rows = len(sig), sig.shape[1] // bands
    return [i * n + j for i in range(n) for j in range(i + 1, n)
            if (is_new[i] or is_new[j])
            and any((sig[i, b * rows:(b + 1) * rows] == sig[j, b * rows:(b + 1) * rows]).all()
                    for b in range(bands))]


@pytest.mark.parametrize("n,bands,seed", [(40, 16, 0), (120, 32, 1), (300, 64, 2)])
def test_incremental_banding_kernel_equals_the_definition_and_numpy(n, bands, seed):
    """With few new rows (one in 16 or fewer) ``banded_pair_codes`` takes the compiled kernel
    when built; its codes equal the numpy formulation's and banding's definition, on
    signatures with small value ranges (buckets of many rows, pairs sharing many bands)."""
    from pipeline.similarity.lsh import banded_pair_codes

    rng = np.random.default_rng(seed)
    sig = rng.integers(0, 3, (n, 128), dtype=np.uint32)
    for few in (1, max(1, n // 16)):
        is_new = np.zeros(n, dtype=bool)
        is_new[rng.choice(n, few, replace=False)] = True
        want = _banded_brute_force(sig, bands, is_new)
        assert banded_pair_codes(sig, bands, is_new, compiled=False).tolist() == want
        assert banded_pair_codes(sig, bands, is_new).tolist() == want
        # not C-contiguous (a column slice): the same codes
        wide = np.hstack([sig, sig])[:, :128]
        assert banded_pair_codes(wide, bands, is_new).tolist() == want
    assert banded_pair_codes(sig, bands, np.zeros(n, dtype=bool)).tolist() == []
    assert banded_pair_codes(sig, bands, np.zeros(n, dtype=bool), compiled=False).tolist() == []


@pytest.mark.skipif(not accel.USE_ACCEL, reason="the compiled kernels are not built")
def test_banding_kernel_names_bad_input():
    kernel = accel.module.band_pair_codes
    sig = np.zeros((4, 8), dtype=np.uint32)
    new = np.zeros(4, dtype=np.uint8)
    with pytest.raises(ValueError, match="2-d uint32"):
        kernel(sig.astype(np.uint64), 4, 0, 4, new)
    with pytest.raises(ValueError, match="bands must divide num_perm"):
        kernel(sig, 3, 0, 3, new)
    with pytest.raises(ValueError, match="one byte per row"):
        kernel(sig, 4, 0, 4, new[:3])
    with pytest.raises(ValueError, match="band_lo <= band_hi"):
        kernel(sig, 4, 2, 5, new)


def _brute_force(x: np.ndarray, y: np.ndarray, generic: np.ndarray | None = None) -> float:
    """Reference value of one pair at the verification's defaults (cap ``max_shingles``,
    containment from ``MIN_SIZE_RATIO``): Python's set operations (``_python_set_similarity``)
    on the two sets without the ``generic`` values."""
    from pipeline.analysis.shingles import ShingleSpec
    from pipeline.similarity.sets import MIN_SIZE_RATIO
    g = set() if generic is None else {int(v) for v in generic}
    x = np.array([v for v in x.tolist() if v not in g], dtype=np.uint64)
    y = np.array([v for v in y.tolist() if v not in g], dtype=np.uint64)
    return _python_set_similarity(x, y, ShingleSpec().max_shingles, MIN_SIZE_RATIO)


def _mixed_sets(rng: np.random.Generator, n: int, tunes: int) -> dict[str, np.ndarray]:
    """``n`` sets, each a variant of one of ``tunes`` random sets (a random head cut off, 8
    values of its own) plus 40 of 60 values all share (stock figures): values below 2**63
    form a lead part (``lead_part``) and the rest the other voices, so whole sets and leads
    are both compared."""
    base = [np.unique(rng.integers(0, 2**64, 120, dtype=np.uint64)) for _ in range(tunes)]
    common = rng.integers(0, 2**64, 60, dtype=np.uint64)
    return {f"k{c:03d}": np.unique(np.concatenate([base[c % tunes][rng.integers(0, 10):],
                                                   rng.integers(0, 2**64, 8, dtype=np.uint64),
                                                   rng.choice(common, 40, replace=False)]))
            for c in range(n)}


def _signature(x: np.ndarray) -> np.ndarray:
    """A signature as ``signature_of`` lays it out: the lead part's MinHash (64 permutations)
    in the first half when it holds 16 or more shingles, the whole set's in the second."""
    from pipeline.similarity.sets import lead_part
    lead = lead_part(x)
    first = minhash(lead, 64, 1) if len(lead) >= 16 else minhash(x, 128, 1)[:64]
    return np.concatenate([first, minhash(x, 128, 1)[64:]])


def test_verify_codes_equals_brute_force_on_any_codes_and_on_dedups_candidates():
    # Reference: Jaccard / containment with Python sets, pair by pair (_brute_force). First on
    # arbitrary sorted codes (every pair's value decides alone), then on the pairs dedup
    # verifies: LSH candidates (LSHIndex, 64 bands of 2 rows) kept by the MinHash bounds
    # (plausible_codes); those must be all pairs at or above the threshold.
    rng = np.random.default_rng(5)
    sets = _mixed_sets(rng, 60, 12)
    keys = sorted(sets)
    n = len(keys)
    codes = sorted_unique(rng.integers(0, n * n, 900))
    codes = codes[codes // n < codes % n]
    want = [(keys[a], keys[b], v) for a, b in zip((codes // n).tolist(), (codes % n).tolist())
            for v in [_brute_force(sets[keys[a]], sets[keys[b]])] if v >= 0.5]
    got = verify_codes(keys, codes, sets, 0.5)
    assert got == want and 10 < len(got) < len(codes)
    every = [(keys[a], keys[b], v) for a in range(n) for b in range(a + 1, n)
             for v in [_brute_force(sets[keys[a]], sets[keys[b]])] if v >= 0.5]
    index = LSHIndex(128, 64)
    index.extend(keys, np.vstack([_signature(sets[k]) for k in keys]))
    found = index.candidate_codes()
    kept = index.plausible_codes(found, np.array([len(sets[k]) for k in keys]), 0.5)
    assert len(kept) < len(found)  # the bounds drop pairs (of different tunes)
    assert verify_codes(index.ids, kept, sets, 0.5) == every and len(every) > 100
    # dedup's clusters: the union-find over the links are the tunes (variants of one base)
    uf = UnionFind(keys)
    for a, b, _ in every:
        uf.union(a, b)
    assert uf.groups() == [[k for k in keys if int(k[1:]) % 12 == t] for t in range(12)]


def test_verify_with_generic_shingles_equals_brute_force_and_leaves_the_sets_alone():
    # Reference: _brute_force with the same generic shingles left out, on every pair; the
    # caller's arrays are not changed (verification drops generic shingles from its own reads)
    rng = np.random.default_rng(8)
    keys = [f"k{n:02d}" for n in range(30)]
    common = np.unique(rng.integers(0, 2**63, 60, dtype=np.uint64))
    sets = {k: np.unique(np.concatenate([common[rng.integers(0, 20):], rng.integers(0, 2**63, 40, dtype=np.uint64)]))
            for k in keys}
    before = {k: v.copy() for k, v in sets.items()}
    generic = common[::2].copy()
    i, j = np.triu_indices(len(keys), 1)
    codes = i * len(keys) + j
    got = verify_codes(keys, codes, sets, 0.375, generic=generic)
    want = [(keys[a], keys[b], v) for a, b in zip(i.tolist(), j.tolist())
            for v in [_brute_force(sets[keys[a]], sets[keys[b]], generic)] if v >= 0.375]
    assert got == want and 0 < len(got) < len(i)
    assert all(np.array_equal(sets[k], before[k]) for k in keys)


@pytest.mark.parametrize("budget", [1, 300, 2_000, None])
def test_verification_in_blocks_equals_brute_force(budget):
    # Reference: _brute_force pair by pair (generic shingles left out). The verification
    # reads the sets a block at a time (at most about ``budget`` shingles held; 1 makes every
    # set a block of its own, None the default, one block here): the values must not depend on
    # the blocks, for the pairs kept (verify_codes) and for every pair's value
    # (code_similarities, pairs of a file with itself included), and every set is read only
    # through the caller's bulk reader, never held beyond the budget.
    from pipeline.similarity import links
    rng = np.random.default_rng(21)
    keys = [f"k{n:02d}" for n in range(40)]
    common = np.unique(rng.integers(0, 2**63, 50, dtype=np.uint64))
    sets = {k: np.unique(np.concatenate([common[rng.integers(0, 25):],
                                         rng.integers(0, 2**63, int(rng.integers(5, 90)), dtype=np.uint64)]))
            for k in keys}
    generic = common[::3].copy()
    n = len(keys)
    codes = sorted_unique(rng.integers(0, n * n, 500))
    codes = codes[codes // n <= codes % n]
    ref = np.array([_brute_force(sets[keys[a]], sets[keys[b]], generic)
                    for a, b in zip((codes // n).tolist(), (codes % n).tolist())])
    low = codes // n < codes % n
    want = [(keys[a], keys[b], v) for a, b, v in
            zip((codes[low] // n).tolist(), (codes[low] % n).tolist(), ref[low].tolist()) if v >= 0.3]
    got = verify_codes(keys, codes[low], sets, 0.3, generic=generic, budget=budget)
    assert got == want and 0 < len(got) < low.sum()
    values = np.full(len(codes), np.nan)
    for at, val in code_similarities(keys, codes, sets, generic=generic, budget=budget):
        assert np.isnan(values[at]).all()  # each pair once
        values[at] = val
    assert np.array_equal(values, ref) and (values[~low] == 1.0).all()
    held = []

    def spy(values):  # the caller's reader: sees every read of the verification
        held.append(sum(len(x) for x in values))
        return values

    verify_codes(keys, codes, sets, 0.3, generic=generic, budget=budget, read=spy)
    largest = max(len(x) for x in sets.values())
    limit = (budget or links.VERIFY_SHINGLES) // 2 + largest  # a block: half the budget, plus its last set
    assert max(held) <= limit
    assert sum(held) >= sum(len(sets[k]) for k in keys)  # every set in a pair was read
    if budget == 1:
        assert len(held) > n  # blocks of one set: sets are read again for later blocks


def test_generic_bands_are_bands_of_generic_values_and_pair_nothing():
    # Reference: the MinHash value of a shingle under a column's permutation is the signature
    # of the set holding only it (minhash([g]), which equals datasketch's digest: see
    # test_numpy_minhash_equals_datasketch_digest); a band is generic when each of its values
    # is such a value of a generic shingle (the first half under the lead's permutations or,
    # lead too short, the whole set's)
    from pipeline.similarity.lsh import GenericBands, LSHIndex, generic_bands
    from pipeline.similarity.minhash import minhash
    rng = np.random.default_rng(11)
    generic = np.unique(rng.integers(0, 2**63, 40, dtype=np.uint64))
    own = [np.unique(rng.integers(0, 2**63, 30, dtype=np.uint64)) for _ in range(6)]
    # rows 0-3: unrelated files made mostly of generic material; 4 and 5 share their own tune
    sets = [np.unique(np.concatenate([generic[k:k + 30], own[k][:3]])) for k in range(4)]
    sets += [np.unique(np.concatenate([own[4], generic[:5]])), np.unique(np.concatenate([own[4][:25], generic[5:9]]))]
    sig = np.vstack([np.concatenate([minhash(x, 64, 1), minhash(x, 128, 1)[64:]]) for x in sets])
    singles = np.vstack([minhash(np.array([g]), 128, 1) for g in generic])
    lead_singles = np.vstack([minhash(np.array([g]), 64, 1) for g in generic])
    want = np.zeros((len(sets), 64), dtype=bool)
    for r in range(len(sets)):
        for band in range(64):
            cols = (2 * band, 2 * band + 1)
            want[r, band] = all(sig[r, c] in singles[:, c] or (c < 64 and sig[r, c] in lead_singles[:, c])
                                for c in cols)
    got = generic_bands(sig, generic, 64, 1)
    assert np.array_equal(got, want) and got[:4].sum() > 20
    rows = np.array([0, 2, 5])
    for band in (0, 17, 63):  # one band of some rows (a rerun's marks)
        assert np.array_equal(GenericBands(lambda: sig, generic, 64, 1).band(rows, band), want[rows, band])
    assert np.array_equal(GenericBands(lambda: sig, generic, 64, 1).every(), want)
    index = LSHIndex(128, 64)
    index.extend([f"k{r}" for r in range(len(sets))], sig)
    pairs = set(index.candidate_codes().tolist())
    kept = set(index.candidate_codes(skip=got).tolist())
    n = len(sets)
    assert {(c // n, c % n) for c in pairs} >= {(0, 1), (1, 2), (4, 5)}  # generic bands pair the first ones
    assert {(c // n, c % n) for c in kept} == {(4, 5)}  # left out, only the shared tune pairs
    assert np.array_equal(generic_bands(sig, generic[:0], 64, 1), np.zeros((n, 64), dtype=bool))


def test_generic_shingles_count_files_exactly():
    # Reference: a plain count of the files holding each value (collections.Counter); values
    # sharing their low bits (the bucket the count starts from) must not be merged
    from collections import Counter

    from pipeline.similarity.sets import generic_shingles
    rng = np.random.default_rng(4)
    low = rng.integers(0, 2**20, 30, dtype=np.uint64)
    pool = np.unique(np.concatenate([low + (np.uint64(k) << np.uint64(40)) for k in range(1, 4)]
                                    + [rng.integers(0, 2**63, 200, dtype=np.uint64)]))
    sets = [np.unique(rng.choice(pool, rng.integers(5, 120), replace=False)) for _ in range(60)]
    counts = Counter(v for x in sets for v in x.tolist())
    for share, min_files in ((0.1, 10), (0.3, 3), (0.01, 1), (1.0, 60)):
        need = max(min_files, int(np.ceil(share * len(sets))))
        want = sorted(v for v, c in counts.items() if c >= need)
        assert generic_shingles(sets, share=share, min_files=min_files).tolist() == want
    assert generic_shingles(sets[:5], share=0.1, min_files=10).tolist() == []


def test_sorted_unique_equals_numpy_unique():
    # Reference: numpy.unique (sorted distinct values).
    rng = np.random.default_rng(2)
    for n in (0, 1, 2, 1000):
        a = rng.integers(0, max(n // 3, 1), n)
        assert np.array_equal(sorted_unique(a), np.unique(a))


def test_near_links_equal_brute_force_and_the_incremental_form_matches():
    # Reference: _brute_force over all pairs. The split's (and leakage's) search near_links
    # must return exactly the pairs at or above the threshold with their values; with
    # ``only`` (a rerun's new files) the pairs touching them; without shingle sets the MinHash
    # estimate decides, on the same pairs here (variants near 0.9, other pairs near 0).
    rng = np.random.default_rng(3)
    sets = {}
    for c in range(30):
        base = np.unique(rng.integers(0, 2**64, 150, dtype=np.uint64))
        sets[f"o{c:02d}"] = base
        sets[f"d{c:02d}"] = np.unique(np.concatenate([base[10:], rng.integers(0, 2**64, 5, dtype=np.uint64)]))
    sigs = {k: _signature(v) for k, v in sets.items()}
    keys = sorted(sets)
    want = [(a, b, v) for x, a in enumerate(keys) for b in keys[x + 1:]
            for v in [_brute_force(sets[a], sets[b])] if v >= 0.7]
    pairs = near_links(sigs, 0.7, sets)
    assert pairs == want
    assert [(a, b) for a, b, _ in pairs] == sorted((f"d{c:02d}", f"o{c:02d}") for c in range(30))
    new = {k for k in sigs if k >= "o15"}
    assert near_links(sigs, 0.7, sets, only=new) == [p for p in want if p[0] in new or p[1] in new]
    est = near_links(sigs, 0.7)  # estimate-verified
    assert {(a, b) for a, b, _ in est} == {(a, b) for a, b, _ in pairs}


def test_union_find_groups():
    uf = UnionFind(range(6))
    uf.union(4, 1)
    uf.union(1, 3)
    assert uf.union(3, 4) is False
    assert uf.groups() == [[0], [1, 3, 4], [2], [5]]
    # the sets holding some keys: those of groups() holding any of them, in the same order
    for keys in ([], [3], [5, 4], [0, 1, 2, 3, 4, 5], [4, 4, 1]):
        assert uf.groups_of(keys) == [g for g in uf.groups() if set(g) & set(keys)]


def test_banding_errors_name_the_values():
    assert check_banding(128, 32) is None
    msg = check_banding(128, 30)
    assert "bands (30) must divide num_perm (128)" in msg and "32" in msg
    with pytest.raises(ValueError, match="bands \\(30\\)"):
        LSHIndex(128, 30)


def _excerpt_pair(rng: np.random.Generator, containment: float, ratio: float,
                  large: int = 300) -> tuple[np.ndarray, np.ndarray]:
    """A small set of ``ratio * large`` hashes sharing ``containment`` of itself with a large set."""
    small = int(round(ratio * large))
    inter = int(round(containment * small))
    u = np.unique(rng.integers(0, 2**63, large + small + 50, dtype=np.uint64))
    rng.shuffle(u)
    big = u[:large]
    a = np.concatenate([big[:inter], u[large:large + small - inter]])
    return np.sort(a), np.sort(big)


def _plausible_of(pairs: list[tuple[np.ndarray, np.ndarray]], threshold: float
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Index each pair's two sets side by side; (the pairs' codes, those the pre-filter keeps)."""
    index = LSHIndex(128, 64)
    sizes = []
    for p, (a, b) in enumerate(pairs):
        for k, s in ((f"{p:05d}a", a), (f"{p:05d}b", b)):
            index.add(k, minhash(s))
            sizes.append(len(s))
    n = len(index.ids)
    codes = np.array([(2 * p) * n + 2 * p + 1 for p in range(len(pairs))], dtype=np.int64)
    return codes, index.plausible_codes(codes, np.array(sizes), threshold)


@pytest.mark.parametrize("kind", ["jaccard", "containment"])
def test_plausible_codes_keep_pairs_at_the_threshold(kind):
    """The MinHash pre-filter must not drop a pair whose exact similarity reaches the threshold.
    Pairs are built at the boundary itself (Jaccard exactly 0.3, or containment exactly 0.3 at
    the smallest size ratio 0.75, the hardest case: Jaccard 0.1475 there), where the estimate's
    spread is Broder's sqrt(J(1-J)/k); at a 4-sigma margin the expected miss rate is about 3e-5
    (normal tail), so 0 or 1 misses in 1,500 pairs (the filter now keeps a pair when either
    signature half could pass, at 3 sigma of 64 values each); a wrong bound (Jaccard 0.3 applied to the
    excerpts, min_size_ratio=1) drops about a third of them (526 of 1,500 when measured)."""
    rng = np.random.default_rng(5)
    pairs = [pair_with_jaccard(rng, 0.3) if kind == "jaccard" else _excerpt_pair(rng, 0.3, 0.75)
             for _ in range(1500)]
    for a, b in pairs:
        assert set_similarity(a, b)[0] >= 0.3 - 1e-9
    codes, kept = _plausible_of(pairs, 0.3)
    assert len(codes) - len(kept) <= 1


def test_plausible_codes_drop_unrelated_pairs():
    """Pairs of unrelated sets are dropped: the filter does its job. Each signature half (the
    leads', the whole sets') estimates from 64 values and a pair stays when either half could
    still pass, so at Jaccard 0.02 (one or two equal values in 64) about a quarter stay
    (0.256 when measured); disjoint sets never do."""
    rng = np.random.default_rng(6)
    codes, kept = _plausible_of([pair_with_jaccard(rng, 0.02) for _ in range(500)], 0.3)
    assert len(kept) < 0.35 * len(codes)
    codes, kept = _plausible_of([pair_with_jaccard(rng, 0.0) for _ in range(500)], 0.3)
    assert len(kept) == 0


def test_band_keys_one_band_at_a_time_equal_the_whole_table():
    """The per-band keys (what the corpus stages compute, one band at a time) equal the
    all-bands-at-once formulation they replace, kept here as the oracle."""
    from pipeline.similarity.lsh import _ROLL, band_key
    from pipeline.analysis.shingles import fmix64

    def whole_table(signatures, bands):
        n, num_perm = signatures.shape
        rows = num_perm // bands
        sig = signatures.reshape(n, bands, rows).astype(np.uint64)
        h = np.full((n, bands), np.uint64(rows), dtype=np.uint64)
        with np.errstate(over="ignore"):
            for j in range(rows):
                h = fmix64(h * _ROLL + sig[:, :, j])
            return h + np.arange(bands, dtype=np.uint64)[None, :] * _ROLL

    rng = np.random.default_rng(3)
    for bands, num_perm in ((64, 128), (32, 128), (16, 64), (128, 128)):
        sig = rng.integers(0, 2**32, (300, num_perm), dtype=np.uint64).astype(np.uint32)
        want = whole_table(sig, bands)
        assert (band_keys(sig, bands) == want).all()
        for b in (0, bands // 2, bands - 1):
            assert (band_key(sig, bands, b) == want[:, b]).all()


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_rerun_candidates_with_marks_of_paired_rows_only_equal_brute_force(seed):
    # Reference: the LSH banding definition (Mining of Massive Datasets, ch. 3) in plain
    # Python: a pair is a candidate when some band's values are equal in both rows; a band
    # marked to pair nothing (generic_bands) in either row does not count. A rerun (few new
    # rows) asks for the marks of the rows in its pairs only; the all-rows form agrees.
    from pipeline.similarity.lsh import LSHIndex
    rng = np.random.default_rng(seed)
    n, num_perm, bands = 240, 32, 16
    sig = rng.integers(0, 12, (n, num_perm)).astype(np.uint32)  # few values: many shared bands
    marks = rng.random((n, bands)) < 0.3
    new = {f"k{r:03d}" for r in rng.choice(n, 6, replace=False)}
    index = LSHIndex(num_perm, bands)
    index.extend([f"k{r:03d}" for r in range(n)], sig)
    asked: list[tuple] = []

    class Marks:  # lsh.BandMarks over the marks above, noting what was asked
        def every(self):
            asked.append((None, None))
            return marks

        def band(self, rows, band):
            asked.append((rows, band))
            return marks[rows, band]

    got = index.candidate_codes(new, skip=Marks())
    rows = num_perm // bands
    want = set()
    for i in range(n):
        for j in range(i + 1, n):
            if f"k{i:03d}" not in new and f"k{j:03d}" not in new:
                continue
            if any(not marks[i, b] and not marks[j, b]
                   and list(sig[i, b * rows:(b + 1) * rows]) == list(sig[j, b * rows:(b + 1) * rows])
                   for b in range(bands)):
                want.add(i * n + j)
    assert set(got.tolist()) == want and len(want) > 30
    assert list(got) == sorted(got)
    # marks of the rows sharing a band's key only, each band asked once at most
    assert asked and all(rows is not None and band is not None for rows, band in asked)
    assert len({band for _, band in asked}) == len(asked) and sum(len(r) for r, _ in asked) < n * bands
    assert np.array_equal(index.candidate_codes(new, skip=marks), got)
