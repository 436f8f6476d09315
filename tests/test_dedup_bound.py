"""Dedup's exact pre-filter (overlap_sketch.sketched_codes before links.verify_codes): built on
the sets dedup compares (generic shingles left out) with its ``min_size_ratio``, it must never
drop a pair that dedup's verification links, and dedup's links must not change with it."""
from __future__ import annotations

import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_dedup import _tunes_over_one_accompaniment, corpus, jaccard_or_containment, planted, run  # noqa: F401
from test_overlap_sketch import _families
from test_similarity import _python_set_similarity

from pipeline.analysis.shingles import ShingleSpec
from pipeline.similarity.overlap_sketch import sketched_codes
from pipeline.stages import dedup as dedup_module

CAP = ShingleSpec().max_shingles


def _without(s: np.ndarray, generic: set) -> np.ndarray:
    """``s`` less the generic values, with Python sets (not ``sets.drop_generic``)."""
    return np.array(sorted({int(x) for x in s} - generic), dtype=np.uint64)


def _all_pairs(n: int) -> np.ndarray:
    i, j = np.triu_indices(n, 1)
    return np.sort(i.astype(np.int64) * n + j)


@settings(max_examples=150, deadline=None)
@given(_families(), st.data(), st.sampled_from([0.1, 0.3, 1.0]), st.sampled_from([128, 4096]))
def test_the_bound_on_dedups_sets_never_drops_a_pair_dedup_would_link(sets, data, ratio, bits):
    # Reference: Jaccard and containment with Python's built-in sets (test_similarity.
    # _python_set_similarity: whole sets and lead parts, containment within ``ratio``) of the
    # sets less the generic shingles (Python set difference). Each pair's own exact value is a
    # threshold (a pair just at it) and the pair must be kept at it.
    pool = sorted({int(x) for s in sets for x in s})
    generic = set(data.draw(st.lists(st.sampled_from(pool), max_size=40))) if pool else set()
    g = np.array(sorted(generic), dtype=np.uint64)
    n = len(sets)
    keys = [f"k{x}" for x in range(n)]
    codes = _all_pairs(n)
    exact = np.array([_python_set_similarity(_without(sets[c // n], generic), _without(sets[c % n], generic),
                                             CAP, ratio) for c in codes.tolist()])
    for t in sorted(set(exact.tolist()) | {0.3}):
        if t <= 0:
            continue
        kept = sketched_codes(keys, codes, dict(zip(keys, sets)), t, bits=bits, generic=g,
                              min_size_ratio=ratio)
        assert set(codes[exact >= t].tolist()) <= set(kept.tolist()), (t, exact, kept)


def test_the_bound_is_taken_without_the_generic_shingles():
    # Two sets alike only once their generic material is left out: the same 40 shingles (no
    # lead values, so only the whole sets count) beside 400 different generic ones each.
    # Without the generic shingles they are equal (1.0 with Python sets); on the whole sets
    # Jaccard is 40/840 and containment 40/440, so a bound on the whole sets drops the pair.
    rng = np.random.default_rng(3)
    tune = rng.integers(2**63, 2**64, 40, dtype=np.uint64)
    ga, gb = rng.integers(2**63, 2**64, 400, dtype=np.uint64), rng.integers(2**63, 2**64, 400, dtype=np.uint64)
    a, b = np.unique(np.concatenate([tune, ga])), np.unique(np.concatenate([tune, gb]))
    generic = {int(x) for x in np.concatenate([ga, gb])}
    assert _python_set_similarity(_without(a, generic), _without(b, generic), CAP, 0.1) == 1.0
    assert _python_set_similarity(a, b, CAP, 0.1) < 0.3
    codes, shingles = np.array([1]), {"a": a, "b": b}
    g = np.array(sorted(generic), dtype=np.uint64)
    # 65,536 bits: few chance collisions among 440 values, so the whole sets' bound is near 0.1
    assert sketched_codes(["a", "b"], codes, shingles, 0.3, generic=g, bits=1 << 16).tolist() == [1]
    assert sketched_codes(["a", "b"], codes, shingles, 0.3, bits=1 << 16).tolist() == []  # the mechanism matters


def _counts(notes: list[str]) -> tuple[int, int]:
    """(pairs plausible by their MinHash estimate, pairs kept by the exact bounds) of dedup's note."""
    note = next(n for n in notes if n.startswith("dedup:"))
    m = re.search(r"(\d+) plausible by their MinHash estimate, (\d+) by their exact bounds", note)
    return int(m.group(1)), int(m.group(2))


def _borderline(count: int = 30) -> list:
    """Planted members (test_dedup.planted): ``count`` random sets of 200 lead and 200 other
    shingles, each with a copy keeping a share of 0.1 to 0.6 of its values (so pairs on both
    sides of the threshold, which MinHash estimates on 128 values cannot tell apart), every
    set beside one accompaniment of 60 shingles (generic: in every file)."""
    rng = np.random.default_rng(8)
    accompaniment = rng.integers(2**63, 2**64, 60, dtype=np.uint64)
    out = []
    for k, share in enumerate(np.linspace(0.1, 0.6, count)):
        base = np.unique(np.concatenate([rng.integers(0, 2**63, 200, dtype=np.uint64),
                                         rng.integers(2**63, 2**64, 200, dtype=np.uint64)]))
        part = rng.permutation(base)[:int(share * len(base))]
        fresh = np.concatenate([rng.integers(0, 2**63, 150, dtype=np.uint64),
                                rng.integers(2**63, 2**64, 150, dtype=np.uint64)])
        out.append(planted(f"b{k}", np.concatenate([base, accompaniment]), 400))
        out.append(planted(f"c{k}", np.concatenate([part, fresh, accompaniment]), 300))
    return out


def test_dedups_links_are_the_same_with_and_without_the_bound(corpus, monkeypatch):  # noqa: F811
    # A generated corpus: three families of pieces with their variants (test_dedup.corpus),
    # twelve tunes over one accompaniment, and planted pairs on both sides of the threshold
    # over another (generic shingles). The bound must drop pairs here (else it tests nothing),
    # and the links, results and kept members must not change; each link's value is the
    # Python-set similarity of its pair, generic shingles left out
    # (test_dedup.jaccard_or_containment, README "How similarity is computed").
    members = corpus[0] + _tunes_over_one_accompaniment(12) + _borderline()
    for ratio in (0.1, 1.0):
        opts = {"min_size_ratio": ratio}
        bounded, with_state = run(members, opts)
        plausible, kept = _counts(with_state.notes)
        assert kept < plausible
        with monkeypatch.context() as mp:
            mp.setattr(dedup_module, "sketched_codes", lambda keys, codes, *a, **k: codes)
            mp.setattr(dedup_module, "bounded_codes", lambda sk, at, codes, *a, **k: codes)  # streamed
            plain, plain_state = run(members, opts)
        assert _counts(plain_state.notes)[1] == plausible
        assert with_state.current["links"] == plain_state.current["links"]
        assert with_state.current["links"]
        assert with_state.current["kept"] == plain_state.current["kept"]
        assert {k: r.to_json() for k, r in bounded.items()} == {k: r.to_json() for k, r in plain.items()}
        generic = np.array(with_state.current["generic"], dtype=np.uint64)
        assert len(generic) > 0
        sets = {m.id: m.artifacts["dedup"]["shingles"] for m in members}
        if ratio == 0.1:  # jaccard_or_containment's ratio
            for a, b, v in with_state.current["links"]:
                assert jaccard_or_containment(sets[a], sets[b], generic) == pytest.approx(v, abs=1e-6)
