"""Streamed candidate pairs (pipeline/similarity/candidates.py) against banding by its
definition, pair by pair (Leskovec, Rajaraman, Ullman, Mining of Massive Datasets, ch. 3: a
pair is a candidate when any band of its two signatures is equal), and against the all-at-once
``lsh.banded_pair_codes`` filtered afterwards."""
import numpy as np
import pytest

from test_dedup import _tunes_over_one_accompaniment, corpus, run  # noqa: F401

from pipeline.similarity import lsh
from pipeline.similarity.candidates import streamed_pair_codes
from pipeline.similarity.lsh import LSHIndex, banded_pair_codes, few_new
from pipeline.similarity.minhash import EMPTY_VALUE


def _brute_force(sig, bands, is_new, *, shifted=False, skip=None):
    """Reference: the definition of banding, pair by pair in Python. ``shifted`` adds every
    band again one row over (wrapping round to column 0); ``skip`` marks bands of a row that
    take the values (row, EMPTY_VALUE - 1, ...) instead, as ``LSHIndex.candidate_codes`` does."""
    n, num_perm = sig.shape
    rows = num_perm // bands
    cols = [[b * rows + k for k in range(rows)] for b in range(bands)]
    if shifted:
        cols += [[(b * rows + 1 + k) % num_perm for k in range(rows)] for b in range(bands)]

    def band(i, c, b):
        if skip is not None and b < bands and skip[i, b]:
            return [i] + [int(EMPTY_VALUE) - 1] * (rows - 1)
        return [int(sig[i, x]) for x in c]

    out = []
    for i in range(n):
        for j in range(i + 1, n):
            if (is_new[i] or is_new[j]) and any(band(i, c, b) == band(j, c, b) for b, c in enumerate(cols)):
                out.append(i * n + j)
    return out


def _every_fifth_pair_dropped(codes):
    """A pure per-pair filter (the codes' hash decides), standing in for the exact bounds."""
    return codes[(codes * 2654435761) % 5 != 0]


@pytest.mark.parametrize("n,num_perm,bands,values,shifted,seed", [
    (30, 8, 4, 3, False, 0), (50, 16, 8, 3, True, 1), (80, 32, 16, 3, True, 2), (60, 128, 64, 3, False, 3),
    (45, 24, 12, 3, True, 4), (200, 8, 4, 2, True, 5)])
def test_streamed_codes_are_the_banded_codes(n, num_perm, bands, values, shifted, seed, monkeypatch):
    # Reference: _brute_force (the definition of banding) and banded_pair_codes (the
    # all-at-once path it replaces on full runs); small value ranges give buckets of many rows
    # (the last case: buckets of about 50 rows, beyond lsh._SMALL_BUCKET) and pairs sharing
    # many bands; pieces of 7 pairs and of the default size.
    rng = np.random.default_rng(seed)
    sig = rng.integers(0, values, (n, num_perm), dtype=np.uint32)
    for is_new in (np.ones(n, dtype=bool), rng.random(n) < 0.3, np.eye(1, n, 0, dtype=bool)[0]):
        want = _brute_force(sig, bands, is_new, shifted=shifted)
        assert banded_pair_codes(sig, bands, is_new, shifted=shifted).tolist() == want
        seen: list[int] = []

        def keep(codes):
            assert codes.tolist() == sorted(set(codes.tolist()))  # sorted, unique
            seen.extend(codes.tolist())
            return codes

        for piece in (7, lsh.STREAM_PAIRS):
            monkeypatch.setattr(lsh, "STREAM_PAIRS", piece)
            # the whole-corpus banding pairs a band through the same pieces
            assert banded_pair_codes(sig, bands, is_new, shifted=shifted, compiled=False).tolist() == want
            seen.clear()
            assert streamed_pair_codes(sig, bands, is_new, keep, shifted=shifted).tolist() == want
            assert sorted(seen) == want  # every pair handed to keep once
            filtered = _every_fifth_pair_dropped(np.array(want, dtype=np.int64)).tolist()
            assert streamed_pair_codes(sig, bands, is_new, _every_fifth_pair_dropped,
                                       shifted=shifted).tolist() == filtered


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_streamed_codes_with_skipped_bands_are_the_index_codes(seed):
    # Reference: _brute_force with the skip marks' values, and LSHIndex.candidate_codes with the
    # same marks (dedup's generic bands), the all-at-once path.
    rng = np.random.default_rng(seed)
    n, num_perm, bands = 70, 32, 16
    sig = rng.integers(0, 3, (n, num_perm), dtype=np.uint32)
    skip = rng.random((n, bands)) < 0.4
    is_new = np.ones(n, dtype=bool)
    want = _brute_force(sig, bands, is_new, skip=skip)
    index = LSHIndex(num_perm, bands)
    index.extend([f"k{i:03d}" for i in range(n)], sig)
    assert index.candidate_codes(skip=skip).tolist() == want
    before = sig.copy()
    got = streamed_pair_codes(sig, bands, is_new, lambda c: c, skip=skip)
    assert got.tolist() == want
    assert (sig == before).all()  # the matrix is left as it was
    with pytest.raises(ValueError, match="shifted"):
        streamed_pair_codes(sig, bands, is_new, lambda c: c, skip=skip, shifted=True)


def test_few_new_is_one_row_in_sixteen_or_fewer():
    # common practice: the share at which banded_pair_codes takes its incremental path
    assert few_new(np.eye(1, 16, 0, dtype=bool)[0])
    assert not few_new(np.array([True, True] + [False] * 14))


def test_dedup_streamed_equals_dedup_all_at_once(corpus, monkeypatch):  # noqa: F811
    # Reference: dedup's all-at-once path (candidate_codes, plausible_codes, sketched_codes over
    # every candidate), which reruns with few new files still take; forced here for a full run.
    # Same links, results, kept members and counts in the note (test_dedup's generated corpus
    # with planted pairs on both sides of the threshold, generic shingles).
    from pipeline.stages import dedup as dedup_module
    from test_dedup_bound import _borderline

    members = corpus[0] + _tunes_over_one_accompaniment(12) + _borderline()
    streamed, s_state = run(members)
    with monkeypatch.context() as mp:
        mp.setattr(dedup_module, "few_new", lambda is_new: True)
        whole, w_state = run(members)
    assert "all against all" in s_state.notes[0] and s_state.notes == w_state.notes
    assert s_state.current["links"] == w_state.current["links"] and s_state.current["links"]
    assert s_state.current["kept"] == w_state.current["kept"]
    assert {k: r.to_json() for k, r in streamed.items()} == {k: r.to_json() for k, r in whole.items()}
    # the streamed search bands from the signatures spilled to a file; its pieces gathered a
    # few pairs at a time (many gatherings, each testing the earlier bands) count the same
    from pipeline.similarity import candidates
    with monkeypatch.context() as mp:
        mp.setattr(candidates, "ONCE_PAIRS", 3)
        small, g_state = run(members)
    assert g_state.notes == w_state.notes and g_state.current["links"] == w_state.current["links"]
    assert {k: r.to_json() for k, r in small.items()} == {k: r.to_json() for k, r in whole.items()}


def test_dedup_streamed_equals_all_at_once_with_members_of_one_content(monkeypatch):
    # Reference: the all-at-once path, as above, on test_dedup_own_pairs' piece in two track
    # layouts (one note content, other shingles: both searched) with an edited copy in each:
    # pairs of one content are left out on both paths, the same links, counts and verdicts.
    from pipeline.stages import dedup as dedup_module
    from test_dedup_own_pairs import _layout_members

    members = list(_layout_members())
    streamed, s_state = run(members)
    with monkeypatch.context() as mp:
        mp.setattr(dedup_module, "few_new", lambda is_new: True)
        whole, w_state = run(members)
    assert "1 members of a content with shingles of their own" in s_state.notes[0]
    assert s_state.notes == w_state.notes
    assert s_state.current["links"] == w_state.current["links"] and s_state.current["links"]
    assert {k: r.to_json() for k, r in streamed.items()} == {k: r.to_json() for k, r in whole.items()}


def test_split_search_streamed_equals_all_at_once(monkeypatch):
    # Reference: near_links_of's all-at-once path (band_codes, sketched_codes, the MinHash
    # bounds over every candidate), which a rerun with few new files still takes; forced here
    # (lsh.few_new, the one rule every search asks, so the banding takes the rerun's path too).
    # Random sets with planted overlaps on both sides of the grouping threshold (0.2).
    from pipeline.similarity.grouping import near_links
    from pipeline.similarity.minhash import minhash

    from test_grouping import planted_sets

    sets = planted_sets(11, 60, np.linspace(0.05, 0.6, 30), digits=2)
    sigs = {k: minhash(v) for k, v in sets.items()}
    streamed = near_links(sigs, 0.2, sets)
    with monkeypatch.context() as mp:
        mp.setattr(lsh, "few_new", lambda is_new: True)
        whole = near_links(sigs, 0.2, sets)
    assert streamed == whole and len(whole) > 10
