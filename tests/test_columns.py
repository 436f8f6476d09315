"""The artifact column store (``Ledger.artifact_columns``) returns what the dict per file
(``Ledger.artifacts_for``) returned: the same names, equal values of the same Python types,
arrays of the same dtype, shape and bytes (numpy's own ``array_equal`` is the reference)."""
from __future__ import annotations

import contextlib
from typing import Iterator

import numpy as np
import pytest

from pipeline.store.columns import ArtifactRow
from pipeline.store.ledger import Ledger, StoredArray, load_arrays


def _items(ragged: bool) -> dict[str, dict]:
    rng = np.random.default_rng(1)
    items = {}
    for k in range(9):
        items["%064x" % k] = {
            "signature": rng.integers(0, 2**32, size=4, dtype=np.uint32),
            "shingles": rng.integers(0, 2**63, size=k + 1, dtype=np.uint64),
            "notes": int(rng.integers(0, 5000)),
            "duration_beats": float(rng.random() * 100),
            "content_hash": "%032x" % int(rng.integers(0, 2**62)),
        }
        if ragged:
            items["%064x" % k]["mixed"] = [1, 2.5, "a", None, True, "é", "x\0", 3, 4][k]
    if not ragged:
        return items
    # a signature of another length and dtype: that column falls back to a list of arrays
    items["%064x" % 3]["signature"] = np.arange(5, dtype=np.uint64)
    items["%064x" % 4] = {}  # prepare ran and returned nothing
    del items["%064x" % 5]["notes"]  # a scalar some files lack
    return items


@contextlib.contextmanager
def _stored(tmp_path, items: dict[str, dict]) -> Iterator[Ledger]:
    """A ledger holding ``items`` as dedup's artifacts under fingerprint ``fp``."""
    with Ledger(tmp_path / "state.sqlite") as led:
        with led.batch():
            led.put_artifacts([(sha, "dedup", "fp", it) for sha, it in items.items()])
        yield led


@pytest.mark.parametrize("chunk", [4096, 2, 3])
@pytest.mark.parametrize("ragged", [False, True])
def test_rows_read_as_the_dicts_did(tmp_path, monkeypatch, ragged, chunk):
    # rows are handed to the columns a chunk at a time (arrays decoded from their joined
    # bytes): small chunks put the odd-shaped signature in a chunk of its own or beside
    # regular ones, after or before the matrix is made
    from pipeline.store import ledger
    monkeypatch.setattr(ledger, "ARTIFACT_CHUNK", chunk)
    items = _items(ragged)
    with _stored(tmp_path, items) as led:
        order = sorted(items)[::-1]  # not in table order
        if ragged:
            order.append("f" * 64)  # a content never prepared
        for defer in ((), ("shingles",)):
            want = led.artifacts_for("dedup", "fp", defer=defer)
            cols = led.artifact_columns("dedup", "fp", order, defer=defer)
            for i, sha in enumerate(order):
                row, exp = cols.row(i), want.get(sha, {})
                assert type(row) is ArtifactRow
                assert sorted(row) == sorted(exp) and len(row) == len(exp) and bool(row) == bool(exp)
                for name, v in exp.items():
                    got = row[name]
                    if isinstance(v, np.ndarray):
                        assert type(got) is np.ndarray and got.dtype == v.dtype and got.shape == v.shape
                        assert np.array_equal(got, v) and not got.flags.writeable
                    elif isinstance(v, StoredArray):
                        assert type(got) is StoredArray and len(got) == len(v) and got.shape == v.shape
                        a, b = load_arrays([got, v])
                        assert a.dtype == b.dtype and np.array_equal(a, b)
                    else:
                        assert type(got) is type(v) and got == v
                assert "nothing" not in row and row.get("nothing", 7) == 7
                with pytest.raises(KeyError):
                    row["nothing"]
            if not ragged:  # the compact forms: one matrix, typed columns
                c = cols._columns
                assert c["signature"].matrix.shape == (len(order), 4) and c["signature"].rows is None
                assert c["notes"].column.dtype == np.int64 and c["duration_beats"].column.dtype == np.float64



def test_stacked_rows_and_values_of_read_what_the_rows_hold(tmp_path):
    # the split's readers of many members' signatures and shingle sets: numpy's vstack of the
    # rows' own values is the reference, from the column's matrix and from plain dicts alike
    from pipeline.store.columns import ValuesOf, stacked
    items = _items(False)
    with _stored(tmp_path, items) as led:
        order = sorted(items)
        cols = led.artifact_columns("dedup", "fp", order, defer=("shingles",))
        pick = [5, 0, 7, 2]
        for rows in ([cols.row(i) for i in pick], [items[order[i]] for i in pick]):
            got = stacked(rows, "signature")()
            want = np.vstack([np.asarray(r["signature"]) for r in rows])
            assert got.dtype == want.dtype and np.array_equal(got, want)
        by_id = {order[i][-16:]: cols.row(i) for i in pick}
        sh = ValuesOf(by_id, "shingles")
        assert sorted(sh) == sorted(by_id) and len(sh) == len(pick)
        for k, i in zip(by_id, pick):
            assert np.array_equal(load_arrays([sh[k]])[0], items[order[i]]["shingles"])


def test_stacked_distinct_rows_are_the_column_itself_reordered(tmp_path):
    # dedup's and then the split's searches take their members' signatures from the column
    # without a copy beside it (the column's matrix is reordered so they come first): numpy's
    # vstack of the stored arrays is the reference, every row read stays equal to the stored
    # array after each reordering, and rows asked twice still give a plain copy
    from pipeline.store.columns import stacked
    items = _items(False)
    with _stored(tmp_path, items) as led:
        order = sorted(items)
        cols = led.artifact_columns("dedup", "fp", order, defer=("shingles",))
        col = cols._columns["signature"]
        for pick in ([5, 0, 7, 2], [5, 0, 7, 2], [1, 2, 3], [8, 7, 6, 5, 4, 3, 2, 1, 0], [4], [2, 0, 2]):
            rows = [cols.row(i) for i in pick]
            matrix = stacked(rows, "signature")
            got = matrix()
            want = np.vstack([items[order[i]]["signature"] for i in pick])
            assert got.dtype == want.dtype and np.array_equal(got, want)
            assert np.array_equal(matrix(), want)  # asked again: the same rows
            if len(set(pick)) == len(pick):
                assert np.shares_memory(got, col.matrix) and not got.flags.writeable
            else:
                assert not np.shares_memory(got, col.matrix)
            for i, sha in enumerate(order):  # every row still reads its own stored array
                assert np.array_equal(cols.row(i)["signature"], items[sha]["signature"])
        # the column stays writable after its matrix was reordered: a row put goes to its place
        fresh = np.arange(col.matrix.shape[1], dtype=col.matrix.dtype)
        col.put(3, fresh)
        assert np.array_equal(cols.row(3)["signature"], fresh)
        for i, sha in enumerate(order):
            if i != 3:
                assert np.array_equal(cols.row(i)["signature"], items[sha]["signature"])


@pytest.mark.parametrize("ragged", [False, True])
def test_column_reads_equal_row_reads(tmp_path, ragged):
    # dedup's and the split's readers of one value of every member (column_of, lengths_of)
    # against the stored items themselves: the same values and types as reading row by row,
    # and numpy's len of each stored array; rows of plain dicts take the same path's fallback
    from pipeline.store.columns import column_of, lengths_of
    items = _items(ragged)
    with _stored(tmp_path, items) as led:
        order = sorted(items)[::-1]
        for defer in ((), ("shingles",)):
            cols = led.artifact_columns("dedup", "fp", order, defer=defer)
            for pick in ([i for i, sha in enumerate(order) if items[sha]], [2, 0, 2]):
                picked = [order[i] for i in pick if items[order[i]]]
                for rows in ([cols.row(i) for i in pick if items[order[i]]], [items[s] for s in picked]):
                    for name in ("content_hash", "duration_beats"):
                        got = column_of(rows, name)
                        assert got == [items[s][name] for s in picked]
                        assert [type(v) for v in got] == [type(items[s][name]) for s in picked]
                    assert lengths_of(rows, "shingles").tolist() == [len(items[s]["shingles"]) for s in picked]
            if ragged:  # a member without the value: the error a row read gives
                with pytest.raises(KeyError):
                    column_of([cols.row(i) for i in range(len(order)) if items.get(order[i])], "notes")


@pytest.mark.parametrize("ragged", [False, True])
def test_present_equals_reading_each_row(tmp_path, ragged):
    # the split's test of which members hold a signature and a shingle set (present) against
    # the stored items themselves: a name is present where the item has a value for it
    from pipeline.store.columns import present
    items = _items(ragged)
    with _stored(tmp_path, items) as led:
        order = sorted(items)[::-1]
        for defer in ((), ("shingles",), ("shingles", "signature")):
            cols = led.artifact_columns("dedup", "fp", order, defer=defer)
            for pick in (list(range(len(order))), [2, 0, 2]):
                for rows in ([cols.row(i) for i in pick], [items[order[i]] for i in pick],
                             [cols.row(i) for i in pick] + [None]):
                    for name in ("signature", "shingles", "notes", "mixed", "absent"):
                        want = [order[i] in items and items[order[i]].get(name) is not None for i in pick]
                        if len(rows) > len(pick):
                            want.append(False)
                        assert present(rows, name) == want


@pytest.mark.parametrize("texts", [
    ["%032x" % (k * 7919) for k in range(6)],  # one length, ASCII: held as fixed-width bytes
    ["ab", "cd", "ef", "gh"],
    ["ab", "c\0", "de"],  # a NUL: numpy's fixed-width bytes would drop a trailing one
    ["ab", "é!", "cd"],  # not ASCII
    ["ab", "abc", "d"],  # lengths differ
    ["", "", ""],
])
def test_text_column_reads_the_texts_it_was_given(texts):
    # a scalar column of texts reads back each text as the list it was made from holds it
    # (Python's own str equality and type are the reference), by row and by column
    from pipeline.store.columns import _ScalarColumn
    col = _ScalarColumn(len(texts))
    for i, t in enumerate(texts):
        col.put(i, t)
    col.finish()
    got = [col.get(i) for i in range(len(texts))]
    assert got == texts and all(type(g) is str for g in got)
    at = list(range(len(texts)))[::-1]
    read = col.read(at) if col.values is None else [col.values[i] for i in at]
    assert read == [texts[i] for i in at] and all(type(g) is str for g in read)
    assert (col.values is None) == (texts[0] == "%032x" % 0 or texts == ["ab", "cd", "ef", "gh"])
