"""The compact result records read exactly like the result dicts they replace.

The oracle is the plain dict form (``StageResult.to_json()``): every way the runner, the ledger,
the workers and the manifest read a result must give the same answer from a ``Result``.
"""
from __future__ import annotations

import pickle

from pipeline.store.records import Compactor, TrailValues, Verdicts
from pipeline.stages import StageResult

PLAIN = [
    StageResult.keep("G minor (estimated), 12/8 (file)", values={
        "tonic": "G", "tonic_pc": 7, "mode": "minor", "key_confidence": 0.2991, "bpm": 65.1,
        "key_declared": None, "augment": []}).to_json(),
    StageResult.drop("too_short", "8.0 s < min_seconds 10", values={"duration_s": 8.0},
                     thresholds={"min_seconds": 10}).to_json(),
    StageResult.keep().to_json(),
]


def test_result_reads_like_its_dict():
    c = Compactor()
    for d in PLAIN:
        r = c.of(d)
        assert {**r} == d
        assert r.to_json() == d
        assert r == d
        for k, v in d.items():
            assert r[k] == v and r.get(k) == v
        assert r.get("nope", 5) == 5
        for k, v in d["values"].items():
            assert r.value(k) == v
        assert r.value("nope", "x") == "x"
        back = pickle.loads(pickle.dumps(r))
        assert back.to_json() == d


def test_values_are_a_fresh_dict_each_time():
    r = Compactor().of(PLAIN[0])
    r["values"]["tonic"] = "changed"
    assert r.value("tonic") == "G"


def test_compactor_shares_names_and_equal_thresholds():
    c = Compactor()
    a = c.of(StageResult.keep(values={"x": 1.0, "y": "short"}, thresholds={"t": 1}).to_json())
    b = c.of(StageResult.keep(values={"x": 2.0, "y": "short"}, thresholds={"t": 1}).to_json())
    assert a.names is b.names
    assert a.thresholds is b.thresholds
    assert a.vals[1] is b.vals[1]  # short strings interned


def test_trail_values_later_stages_win():
    c = Compactor()
    first = c.of(StageResult.keep(values={"a": 1, "b": 2}).to_json())
    second = Compactor().of(StageResult.keep(values={"b": 3, "c": 4}).to_json())
    tv = TrailValues([first, second])
    merged = {}
    for r in (first, second):
        merged.update(r["values"])
    assert dict(tv) == merged == {"a": 1, "b": 3, "c": 4}
    assert tv.get("b") == 3 and tv.get("zzz") is None
    assert list(tv) == ["a", "b", "c"]


def test_stored_records_read_like_their_dict_without_parsing_everything():
    """A record read back from the ledger (values still JSON text) gives, name by name, what the
    json module's parse of the text gives (the reference), including names that appear in
    nested objects or inside strings, and for names the text does not have."""
    import json

    from pipeline.store.codec import canonical_json, stored_result
    values = [
        {"augment": [], "augment_folded": 0, "transpose": 2, "transpose_folded": 0},
        {"augment": [3, -5], "x": 'a"augment":1', "y": {"augment": 9}},
        {"x": "{", "augment": [1]},
        {"cluster": "abcdef0123456789", "cluster_size": 3},
        {"a": 1.5e-7, "b": None, "c": True, "d": "é\u2028", "e": [[1, 2], {"f": 1}]},
        {"y": {"augment": 9}},
        {"ключ": 1, 'q"uote': 2},
    ]
    c = Compactor()
    for v in values:
        d = StageResult.keep("kept", values=v, thresholds={"t": 1}).to_json()
        stored = stored_result(d)
        want = json.loads(stored[3])
        for name in [*v, "augment", "missing", "f", "ключ"]:
            r = c.from_stored(stored)
            assert r.value(name, "default") == want.get(name, "default"), (v, name)
        r = c.from_stored(stored)
        assert r.to_json() == d and r.values_json() == canonical_json(v) == stored[3]


def _stored_verdicts(ledger, n):
    """``n`` key_meter results stored in ``ledger`` and read back as deferred records: (sha256s
    in order, their dicts, the values source, the ``Verdicts``)."""
    order = [f"{i:064x}" for i in range(n)]
    plain = {sha: PLAIN[i % len(PLAIN)] for i, sha in enumerate(order)}
    with ledger.batch():
        ledger.put_results((sha, "key_meter", "fp", d) for sha, d in plain.items())
    source = ledger.values_source("key_meter", "fp", order)
    got = ledger.verdicts_for(Verdicts(source, {sha: i for i, sha in enumerate(order)}, Compactor(), n))
    return order, plain, source, got


def test_records_whose_values_stay_in_the_ledger_read_like_their_dict(tmp_path):
    """A record left in the ledger (``Result.defer``) reads exactly like its dict: read back
    from a store in chunks, one row at a time when the reader jumps, and after a prefetch; its
    trail text is the stored one; pickling for a worker leaves it deferred."""
    from pipeline.store.codec import stored_result
    from pipeline.store.ledger import FETCH_CHUNK, SEQUENTIAL, Ledger
    n = FETCH_CHUNK + 40
    with Ledger(tmp_path / "state.sqlite") as ledger:
        order, plain, source, got = _stored_verdicts(ledger, n)
        assert len(got) == n and all(sha in got for sha in order)
        for sha in order:  # in order: chunks of FETCH_CHUNK
            r, d = got[sha], plain[sha]
            assert r.to_json() == d and {**r} == d
            assert r.values_json() == stored_result(d)[3]
            for k, v in d["values"].items():
                assert r.value(k) == v
            assert r.value("nope", "x") == "x"
        for i in range(n - 1, -1, -7):  # jumping backwards: single rows once a chunk serves few
            assert got[order[i]].to_json() == plain[order[i]]
        assert SEQUENTIAL > 1
        source.prefetch(order[:3])
        r = got[order[1]]
        back = pickle.loads(pickle.dumps(r))
        assert back.to_json() == plain[order[1]]
        assert type(r.names) is not tuple  # still deferred: nothing of it kept in memory
        # a record that held its text (from a worker) and is deferred once its row is committed
        live = Compactor().from_stored(stored_result(plain[order[2]]))
        live.defer(source, 2)
        assert live.to_json() == plain[order[2]] and live.values_json() == stored_result(plain[order[2]])[3]


def test_compactor_shares_equal_details():
    # results arriving from workers carry their own copy of a detail sentence; the records of
    # a stage hold one string per distinct sentence, and their verdicts read as before
    c = Compactor()
    texts = ["".join(["SMF format 1, ", "5 tracks"]) for _ in range(3)]
    assert texts[0] is not texts[1]
    made = [c.make_stored(True, None, t, "{}", {}) for t in texts]
    made.append(c.make(True, None, "".join(["SMF format 1, ", "5 tracks"]), {}, {}))
    assert all(r.detail == "SMF format 1, 5 tracks" for r in made)
    assert all(r.detail is made[0].detail for r in made)


def test_verdict_columns_read_like_the_records_they_replace(tmp_path):
    """``Verdicts`` keeps a stage's verdicts as columns; each content's record made from them
    equals the record the worker's stored form gives (``Compactor.from_stored``) and its plain
    dict; a content without a verdict has none, and the states are the columns' own."""
    from pipeline.store.codec import stored_result
    from pipeline.store.ledger import Ledger
    order = [f"{i:064x}" for i in range(9)]
    plain = {sha: PLAIN[i % len(PLAIN)] for i, sha in enumerate(order[:-1])}  # the last: none
    with Ledger(tmp_path / "state.sqlite") as ledger:
        with ledger.batch():
            ledger.put_results((sha, "filter", "fp", d) for sha, d in plain.items())
            # a stored verdict of a content this run does not have is left out
            ledger.put_results([("f" * 64, "filter", "fp", PLAIN[0])])
        index = {sha: i for i, sha in enumerate(order)}
        stored = Verdicts(ledger.values_source("filter", "fp", order), index, Compactor(), len(order))
        ledger.verdicts_for(stored)
        # the same verdicts put one by one in the form the workers return them
        live = Verdicts(ledger.values_source("filter", "fp", order), index, Compactor(), len(order))
        for sha, d in plain.items():
            live.put_stored(index[sha], stored_result(d))
        for cols in (stored, live):
            for sha, d in plain.items():
                r, want = cols.get(sha), Compactor().from_stored(stored_result(d))
                assert r == want and r.to_json() == d and r.values_json() == want.values_json()
                assert cols.kept_at(index[sha]) is d["kept"]
                assert r.thresholds is cols.get(sha).thresholds  # one dict per distinct text
            assert cols.get(order[-1]) is None and cols.kept_at(len(order) - 1) is None
            assert order[-1] not in cols and len(cols) == len(plain)


def test_a_reader_of_scattered_contents_reads_no_chunk_after_one_that_served_it_nothing(tmp_path, monkeypatch):
    """The values of contents far apart (the split reading its new members' ``augment``) come
    back right; after the first chunk, which served one read, each miss reads its own row and
    no further chunk of ``FETCH_CHUNK`` rows (a chunk read per few misses was most of it)."""
    from pipeline.store.ledger import FETCH_CHUNK, Ledger, StoredValues
    n = 4 * FETCH_CHUNK
    with Ledger(tmp_path / "state.sqlite") as ledger:
        order, plain, _, got = _stored_verdicts(ledger, n)
        chunks = []
        prefetch = StoredValues.prefetch
        monkeypatch.setattr(StoredValues, "prefetch", lambda self, shas: chunks.append(len(shas)) or prefetch(self, shas))
        for i in range(0, n, 37):
            assert got[order[i]].to_json() == plain[order[i]]
        assert chunks == [FETCH_CHUNK]
        for sha in order[:FETCH_CHUNK + 1]:  # in order again: a chunk that serves reads, then the next
            assert got[sha].to_json() == plain[sha]
        assert len(chunks) == 2


def test_a_key_no_stored_text_has_is_scanned_for_only_once_many_contents_ask_for_it(tmp_path):
    """A value no stored text holds (``composer`` here) reads as missing whether or
    not the stage's texts were scanned for its key: a few readers read their own texts and no
    scan runs (the split's new members on a rerun); from ``SCAN_AFTER`` reads on one scan
    answers for all, once."""
    from pipeline.store.ledger import SCAN_AFTER, Ledger
    n = SCAN_AFTER + 50
    with Ledger(tmp_path / "state.sqlite") as ledger:
        order, plain, _, got = _stored_verdicts(ledger, n)
        queries: list[str] = []
        ledger.db.set_trace_callback(queries.append)
        for sha in order[:20]:
            assert got[sha].value("composer", "none") == "none"
            assert got[sha].value("tonic") == plain[sha]["values"].get("tonic")
        assert not any("instr(" in q for q in queries)
        for sha in order:
            assert got[sha].value("composer", "none") == "none"
        assert sum("instr(" in q for q in queries) == 1


def _columns_state(v: Verdicts, order: list[str]) -> list:
    """Every content's verdict as its record's plain dict (None without one)."""
    return [None if v.get(sha) is None else v.get(sha).to_json() for sha in order]


def test_verdicts_taken_from_the_last_runs_columns_equal_those_read_from_every_result(tmp_path):
    """A rerun takes its known contents' verdicts from the columns the last run stored
    (``Ledger.put_run_columns``) and reads the others: the records equal those of reading every
    stored result, for contents the last run had in another order, contents it did not have
    (stored by an earlier run, or new), contents without a verdict, and verdicts recorded
    after. The oracle: ``Ledger.verdicts_for`` without columns."""
    from pipeline.store.codec import stored_result
    from pipeline.store.ledger import Ledger
    drops = [StageResult.drop("too_long", f"{s} s > max_seconds 600", values={"duration_s": s},
                              thresholds={"max_seconds": 600}).to_json() for s in (700, 900)]
    kinds = PLAIN + drops
    last = [f"{i:064x}" for i in range(40)]
    older = [f"{i:064x}" for i in range(100, 105)]  # stored by a run before the last
    results = {sha: kinds[i % len(kinds)] for i, sha in enumerate(last + older) if i % 7 != 3}
    with Ledger(tmp_path / "state.sqlite") as ledger:
        with ledger.batch():
            ledger.put_results((sha, "filter", "fp", d) for sha, d in results.items())
            run = ledger.start_run({})
        index = {sha: i for i, sha in enumerate(last)}
        cols = ledger.verdicts_for(Verdicts(ledger.values_source("filter", "fp", last), index, Compactor(), len(last)))
        with ledger.batch():
            ledger.put_run_columns(run, last, [cols])
            ledger.finish_run(run, {})
        # this run: the last run's contents reordered, some gone, the older ones back, new ones
        now = [*older, *last[::-1][5:], f"{999:064x}"]
        index = {sha: i for i, sha in enumerate(now)}
        this = ledger.start_run({})
        stored = ledger.run_columns(this, index)
        assert stored is not None and len(stored.missing) == len(older) + 1
        fast = ledger.verdicts_for(Verdicts(ledger.values_source("filter", "fp", now), index, Compactor(), len(now)),
                                   stored)
        slow = ledger.verdicts_for(Verdicts(ledger.values_source("filter", "fp", now), index, Compactor(), len(now)))
        assert _columns_state(fast, now) == _columns_state(slow, now)
        assert any(r is None for r in _columns_state(fast, now)) and len(fast) == len(slow)
        # a verdict recorded afterwards (a new content's, from a worker) reads the same way
        with ledger.batch():
            ledger.put_results([(now[-1], "filter", "fp", drops[1])])
        for v in (fast, slow):
            v.put_stored(index[now[-1]], stored_result(drops[1]))
        assert _columns_state(fast, now) == _columns_state(slow, now)
        assert fast.get(now[-1]).to_json() == drops[1]
        # another options fingerprint has no columns: every result is read
        assert stored.verdicts("filter", "other") is None


def test_stored_columns_are_not_taken_after_a_stopped_run_or_a_fresh_start(tmp_path):
    """Columns hold what the results table held when their run completed: a run started since
    and not completed may have stored results they lack, and ``--fresh`` forgets results;
    in both cases every result is read."""
    from pipeline.store.ledger import Ledger
    order = [f"{i:064x}" for i in range(10)]
    index = {sha: i for i, sha in enumerate(order)}
    with Ledger(tmp_path / "state.sqlite") as ledger:
        with ledger.batch():
            ledger.put_results((sha, "filter", "fp", PLAIN[0]) for sha in order)
            run = ledger.start_run({})
        cols = ledger.verdicts_for(Verdicts(ledger.values_source("filter", "fp", order), index, Compactor(), 10))
        with ledger.batch():
            ledger.put_run_columns(run, order, [cols])
            ledger.finish_run(run, {})
        assert ledger.run_columns(run + 1, index) is not None  # the next run
        ledger.start_run({})  # a run stopped before it completed
        assert ledger.run_columns(ledger.start_run({}), index) is None
    with Ledger(tmp_path / "state2.sqlite") as ledger:
        with ledger.batch():
            run = ledger.start_run({})
            ledger.put_run_columns(run, order, [])
            ledger.finish_run(run, {})
        this = ledger.start_run({})
        assert ledger.run_columns(this, index) is not None
        # columns covering less than half of this run's contents are not taken
        assert ledger.run_columns(this, index | {f"{i:064x}": i - 90 for i in range(100, 111)}) is None
        with ledger.batch():
            ledger.clear_cache()
        assert ledger.run_columns(this, index) is None
