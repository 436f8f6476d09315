"""pipeline/tools/split_recall.py: the split's LSH search against every pair verified.

The exact measure itself is checked against Python's set operations in test_similarity.py;
here the bookkeeping is checked against counts worked by hand on sets built in code."""
from __future__ import annotations

import numpy as np

from pipeline.similarity.minhash import minhash
from pipeline.similarity.sets import set_similarity
from pipeline.tools.split_recall import format_recall, split_recall


def _signed(sets: dict[str, np.ndarray]) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    return {k: (minhash(v, 128, 1), v) for k, v in sets.items()}


def _tunes() -> dict[str, np.ndarray]:
    """Two tunes, three files each: a copy, the same set again and a near copy (5 of 200
    values changed); every pair within a tune is far above 0.2, across tunes 0."""
    rng = np.random.default_rng(3)
    out = {}
    for t in range(2):
        base = np.unique(rng.integers(0, 2**63, 200, dtype=np.uint64))
        near = base.copy()
        near[:5] = rng.integers(2**63, 2**64 - 1, 5, dtype=np.uint64)
        out[f"t{t}a"], out[f"t{t}b"], out[f"t{t}c"] = base, base.copy(), np.unique(near)
    return out


def test_every_link_is_found_when_the_pairs_are_near_copies():
    sets = _tunes()
    res = split_recall(_signed(sets), 0.2, label_of=lambda k: k[:2])
    # 3 pairs per tune, each near 1.0 (banding finds such pairs with probability ~1)
    assert res["links"] == 6 and res["found"] == 6 and res["extra"] == 0
    assert res["recall"] == 1.0 and res["missed"] == [] and res["groups_apart"] == []
    assert res["groups"] == 2 and res["missed_within_label"] == 0


def test_a_missed_bridge_is_counted_and_its_group_listed():
    sets = _tunes()

    def search(sigs, threshold, shingles):  # the real links, but t0a ~ t0b and t0a ~ t0c lost
        keys = sorted(sigs)
        pairs = [(a, b) for i, a in enumerate(keys) for b in keys[i + 1:]]
        return [(a, b, set_similarity(shingles[a], shingles[b])[0]) for a, b in pairs
                if a[:2] == b[:2] and (a, b) not in {("t0a", "t0b"), ("t0a", "t0c")}]

    res = split_recall(_signed(sets), 0.2, label_of=lambda k: k[:2], search=search)
    assert res["links"] == 6 and res["found"] == 4
    assert [p for p, _ in res["missed"]] == [("t0a", "t0b"), ("t0a", "t0c")]
    assert res["recall"] == 1 - 2 / 6
    # t0a is left alone, away from t0b and t0c: one group of all links is apart
    assert res["groups_apart"] == [["t0a", "t0b", "t0c"]] and res["missed_within_label"] == 2
    text = format_recall("two tunes", res)
    assert "recall 0.6667" in text and "left apart by the search: 1 of 2" in text
