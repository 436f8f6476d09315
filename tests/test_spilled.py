"""The spilled signature matrix (pipeline/similarity/spilled.py) against the in-memory matrix:
columns and bands read back row by row, candidate pairs against banding by its definition pair
by pair (Leskovec, Rajaraman, Ullman, Mining of Massive Datasets, ch. 3: a pair is a candidate
when any band of its two signatures is equal) and against ``lsh.banded_pair_codes``, MinHash
bounds against ``lsh.plausible_pair_codes`` on the matrix (the share of equal values estimates
Jaccard: Broder 1997), the store's pairs met once each as the matrix's (dedup's full search bands
from the store), and the signature column let go to a file (columns.stacked)."""
import os

import numpy as np
import pytest

from test_candidates import _brute_force, _every_fifth_pair_dropped

from pipeline.similarity import lsh
from pipeline.similarity.candidates import streamed_pair_codes
from pipeline.similarity.lsh import banded_pair_codes, plausible_pair_codes
from pipeline.similarity.spilled import SpilledColumns
from pipeline.store.columns import ArtifactColumns, stacked


def test_columns_read_back_as_written(tmp_path):
    # Reference: the matrix itself, column by column and band by band (row by row equal).
    rng = np.random.default_rng(0)
    sig = rng.integers(0, 2**32, (37, 20), dtype=np.uint32)
    with SpilledColumns(sig, tmp_path) as store:
        assert (store.n, store.width) == sig.shape
        for c in range(20):
            assert np.array_equal(store.column(c), sig[:, c])
        assert np.array_equal(store.columns([3, 4]), sig[:, 3:5])
        assert np.array_equal(store.columns([19, 0]), sig[:, [19, 0]])
        i, j = rng.integers(0, 37, 50), rng.integers(0, 37, 50)
        assert store.equal_counts(i, j, range(20)).tolist() == (sig[i] == sig[j]).sum(axis=1).tolist()
    assert not list(tmp_path.iterdir())  # an unnamed file: nothing left behind


@pytest.mark.parametrize("n,num_perm,bands,values,shifted,seed", [
    (30, 8, 4, 3, False, 0), (50, 16, 8, 3, True, 1), (80, 32, 16, 3, True, 2), (60, 128, 64, 3, False, 3),
    (200, 8, 4, 2, True, 5)])
def test_spilled_codes_are_the_banded_codes(n, num_perm, bands, values, shifted, seed, monkeypatch, tmp_path):
    # Reference: _brute_force (the definition of banding) and banded_pair_codes filtered
    # afterwards; small value ranges give buckets of many rows and pairs sharing many bands
    # (each met once per band here); pieces of 7 pairs and of the default size.
    rng = np.random.default_rng(seed)
    sig = rng.integers(0, values, (n, num_perm), dtype=np.uint32)
    with SpilledColumns(sig, tmp_path) as store:
        for is_new in (np.ones(n, dtype=bool), rng.random(n) < 0.3, np.eye(1, n, 0, dtype=bool)[0]):
            want = _brute_force(sig, bands, is_new, shifted=shifted)
            assert banded_pair_codes(sig, bands, is_new, shifted=shifted).tolist() == want

            def keep(codes):
                assert codes.tolist() == sorted(set(codes.tolist()))  # sorted, unique
                return _every_fifth_pair_dropped(codes)

            filtered = _every_fifth_pair_dropped(np.array(want, dtype=np.int64)).tolist()
            assert streamed_pair_codes(store, bands, is_new, keep, shifted=shifted).tolist() == filtered
            with monkeypatch.context() as mp:
                mp.setattr(lsh, "STREAM_PAIRS", 7)
                assert streamed_pair_codes(store, bands, is_new, keep, shifted=shifted).tolist() == filtered


def test_columns_written_from_row_blocks_are_the_matrix_columns(tmp_path):
    # Reference: the matrix itself; its rows handed over in blocks of uneven sizes give the
    # file written from the whole matrix, column by column; blocks of too few rows are an error.
    rng = np.random.default_rng(5)
    sig = rng.integers(0, 2**32, (53, 16), dtype=np.uint32)
    cuts = [0, 1, 9, 10, 40, 53]
    blocks = (sig[a:b] for a, b in zip(cuts, cuts[1:]))
    with SpilledColumns(blocks, tmp_path, shape=sig.shape) as store, SpilledColumns(sig, tmp_path) as whole:
        assert store.shape == sig.shape
        for c in range(16):
            assert np.array_equal(store.column(c), sig[:, c])
            assert np.array_equal(whole.column(c), sig[:, c])
    with pytest.raises(ValueError, match="blocks of 40 rows for a matrix of 53"):
        SpilledColumns(iter([sig[:40]]), tmp_path, shape=sig.shape)


@pytest.mark.parametrize("shifted,skipped,once,gather,seed", [
    (False, False, False, None, 0), (True, False, False, None, 1), (False, True, False, None, 2),
    (False, False, True, 5, 0), (True, False, True, 1, 1), (False, True, True, 5, 2),
    (False, True, True, 1 << 18, 3), (True, False, True, 64, 4)])
def test_matrix_and_spilled_store_give_the_same_codes(shifted, skipped, once, gather, seed, monkeypatch, tmp_path):
    # Reference: _brute_force (the definition of banding, skip marks as LSHIndex.candidate_codes
    # gives them) on one matrix, banded by the one loop from the matrix and from its spilled
    # store with the same filter; from the matrix each pair meets the filter once (the test of
    # earlier bands on the rows' values), from the store once per band that finds it, no fewer:
    # both filter the same set of pairs; with ``once`` the store's filter meets each pair once
    # too, gathered ``gather`` pairs at a time or all in one gathering, each gathering sorted
    # (dedup's MinHash and exact bounds take sorted codes).
    from pipeline.similarity import candidates

    if gather is not None:
        monkeypatch.setattr(candidates, "ONCE_PAIRS", gather)
    rng = np.random.default_rng(seed)
    n, num_perm, bands = 90, 32, 16
    sig = rng.integers(0, 3, (n, num_perm), dtype=np.uint32)
    skip = rng.random((n, bands)) < 0.4 if skipped else None
    is_new = rng.random(n) < 0.5
    want = _brute_force(sig, bands, is_new, shifted=shifted, skip=skip)
    filtered = _every_fifth_pair_dropped(np.array(want, dtype=np.int64)).tolist()
    met = {"matrix": [], "store": []}
    calls = []

    def keep_of(name):
        def keep(codes):
            assert codes.tolist() == sorted(codes.tolist())
            calls.append(name)
            met[name].extend(codes.tolist())
            return _every_fifth_pair_dropped(codes)
        return keep

    with SpilledColumns(sig, tmp_path) as store:
        from_store = streamed_pair_codes(store, bands, is_new, keep_of("store"), shifted=shifted, skip=skip,
                                         once=once)
    from_matrix = streamed_pair_codes(sig, bands, is_new, keep_of("matrix"), shifted=shifted, skip=skip)
    assert from_matrix.tolist() == from_store.tolist() == filtered and filtered
    assert sorted(met["matrix"]) == want  # once each
    if once:
        assert sorted(met["store"]) == want  # once each, the same pairs
        if gather >= len(want) * bands:
            assert calls.count("store") == 1  # one gathering held every piece
    else:
        assert sorted(set(met["store"])) == want and len(met["store"]) > len(want)  # pairs share bands here


def test_plausible_codes_as_on_the_matrix(tmp_path):
    # Reference: lsh.plausible_pair_codes on the in-memory matrix (the estimates gathered row by
    # row); near-equal rows and unrelated ones, sets of several sizes, two thresholds.
    rng = np.random.default_rng(4)
    n, num_perm = 120, 128
    sig = rng.integers(0, 2**32, (n, num_perm), dtype=np.uint32)
    for r in range(1, n, 2):  # every second row shares a random share of its values with the row before
        same = rng.random(num_perm) < rng.random()
        sig[r, same] = sig[r - 1, same]
    sizes = rng.integers(5, 400, n).astype(np.float64)
    codes = np.sort(rng.choice(n * n, 3000, replace=False)).astype(np.int64)
    codes = codes[codes // n < codes % n]
    codes = np.union1d(codes, (np.arange(0, n, 2) * n + np.arange(1, n, 2)).astype(np.int64))
    with SpilledColumns(sig, tmp_path) as store:
        for t, margin in ((0.2, 4.0), (0.5, 3.0)):
            want = plausible_pair_codes(sig, codes, sizes, t, margin_sigmas=margin)
            got = plausible_pair_codes(store, codes, sizes, t, margin_sigmas=margin)
            assert got.tolist() == want.tolist()
            if t == 0.5:  # at 0.2 with 4 sigmas the lead's bound keeps every pair (README)
                assert 0 < len(want) < len(codes)  # the check has pairs on both sides


def _column_of(sig, folder):
    """An ArtifactColumns holding the rows of ``sig`` as its signature column, spilling to ``folder``."""
    cols = ArtifactColumns([f"{k:064x}" for k in range(len(sig))], {})
    for k in range(len(sig)):
        cols.put_array(k, "signature", sig[k])
    cols.finish()
    cols.spill_folder = str(folder)
    return cols


def test_stacked_release_spills_the_column(tmp_path):
    # Reference: the rows as put (plain numpy); after release the column reads the same rows
    # from its file, row by row and stacked again in another order, and still takes a new row.
    rng = np.random.default_rng(2)
    sig = rng.integers(0, 2**32, (9, 16), dtype=np.uint32)
    cols = _column_of(sig, tmp_path)
    rows = [cols.row(k) for k in (7, 2, 5)]
    matrix = stacked(rows, "signature")
    assert np.array_equal(matrix(), sig[[7, 2, 5]])
    matrix.release()
    col = cols._columns["signature"]
    assert col.matrix is None and col.spilled is not None
    assert os.fstat(col.spilled[0].fileno()).st_dev == os.stat(tmp_path).st_dev  # in the folder given
    assert not list(tmp_path.iterdir())  # an unnamed file
    for k in range(9):
        assert np.array_equal(cols.row(k)["signature"], sig[k])
    assert np.array_equal(stacked([cols.row(k) for k in (1, 8)], "signature")(), sig[[1, 8]])
    assert col.spilled is None  # read back whole, in the new order
    matrix.release()
    assert np.array_equal(stacked([cols.row(k) for k in (3, 3)], "signature")(), sig[[3, 3]])
    matrix.release()
    assert np.array_equal(matrix(), sig[[7, 2, 5]])
    matrix.release()
    cols.put_array(4, "signature", sig[0])
    assert np.array_equal(cols.row(4)["signature"], sig[0])
    assert np.array_equal(cols.row(3)["signature"], sig[3])


def test_row_blocks_of_a_spilled_column_leave_it_in_its_file(tmp_path, monkeypatch):
    # Reference: the rows as put (plain numpy), asked in an order with runs of consecutive rows
    # and jumps, from the column in memory and spilled; the spilled column is never read back.
    from pipeline.store import columns

    monkeypatch.setattr(columns, "_LOAD_ROWS", 4)
    rng = np.random.default_rng(3)
    sig = rng.integers(0, 2**32, (15, 8), dtype=np.uint32)
    cols = _column_of(sig, tmp_path)
    order = [2, 3, 4, 9, 0, 1, 14, 13, 7, 8]
    matrix = stacked([cols.row(k) for k in order], "signature")
    assert np.array_equal(np.concatenate(list(matrix.row_blocks())), sig[order])
    matrix.release()
    col = cols._columns["signature"]
    monkeypatch.setattr(type(col), "_load", lambda *a: pytest.fail("the spilled column was read back whole"))
    blocks = list(matrix.row_blocks())
    assert [len(b) for b in blocks] == [4, 4, 2]
    assert np.array_equal(np.concatenate(blocks), sig[order])
    assert col.matrix is None and col.spilled is not None


def test_full_search_through_the_column_equals_the_in_memory_search(tmp_path):
    # Reference: grouping.near_links_of's rerun path (few new rows: the matrix held in memory,
    # banded whole, no spill), asked once per key, whose union is every linked pair; and
    # brute-force exact similarity on random sets with planted overlaps (test_grouping).
    from test_grouping import planted_sets

    from pipeline.similarity.grouping import near_links_of
    from pipeline.similarity.minhash import minhash

    sets = planted_sets(7, 40, [0.95, 0.85, 0.6, 0.4, 0.3, 0.25, 0.2, 0.1])
    keys = sorted(sets)
    cols = ArtifactColumns(keys, {})
    for k, key in enumerate(keys):
        cols.put_array(k, "signature", minhash(sets[key]))
    cols.finish()
    cols.spill_folder = str(tmp_path)
    rows = [cols.row(k) for k in range(len(keys))]
    full = near_links_of(keys, stacked(rows, "signature"), 0.2, sets)
    assert cols._columns["signature"].spilled is not None  # the search let the column go
    # a search over the column already spilled (as dedup's search leaves it) reads its rows
    # from the file, a block at a time, and finds the same links
    reads = []
    real = type(cols._columns["signature"])._spilled_rows
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(type(cols._columns["signature"]), "_load", lambda *a: pytest.fail("read back whole"))
        mp.setattr(type(cols._columns["signature"]), "_spilled_rows",
                   lambda self, lo, count: reads.append(count) or real(self, lo, count))
        assert near_links_of(keys, stacked(rows, "signature"), 0.2, sets) == full
    assert sum(reads) == 2 * len(keys)  # each row read twice: its emptiness, then its columns
    one_by_one = set()
    for key in keys:
        one_by_one |= set(near_links_of(keys, stacked(rows, "signature"), 0.2, sets, only={key}))
    assert sorted(one_by_one) == full
    got = {(a, b) for a, b, _ in full}
    for i, a in enumerate(keys):
        for b in keys[i + 1:]:
            inter = len(np.intersect1d(sets[a], sets[b]))
            if inter / (len(sets[a]) + len(sets[b]) - inter) >= 0.25:  # Jaccard well above 0.2
                assert (a, b) in got, (a, b)
    assert len(got) >= 6 and all(sim >= 0.2 for _, _, sim in full)


def test_a_short_read_of_a_damaged_spill_file_is_an_error(tmp_path):
    # Common practice: a read that returns fewer bytes than asked is reported, never taken as data.
    sig = np.arange(40, dtype=np.uint32).reshape(10, 4)
    with SpilledColumns(sig, tmp_path) as store:
        os.ftruncate(store._file.fileno(), 50)  # column 1 now ends after 10 of its 40 bytes
        assert np.array_equal(store.column(0), sig[:, 0])
        with pytest.raises(OSError, match="column 1 of spilled signatures read 10 of 40 bytes"):
            store.column(1)
