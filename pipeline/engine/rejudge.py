"""Verdicts judged again from stored results: a changed limit reads no file.

A per-file stage that can give its verdict under new options from the result it stored under
old ones (``Stage.judge_stored``: the filter's limits held against the measures it recorded;
validate's worker limits and ``allow_repairs``) is asked to, before any file is planned. The
old results are found by the fingerprints that earlier runs' options have under this code
(``Stage.fingerprint`` hashes the stage's version and the decoder's rules, so a fingerprint
this code computes names only results this code made). A content the stage cannot judge so
is decoded as before.
"""
from __future__ import annotations

from typing import Any, Callable, Iterator

from ..stages import Stage
from ..store.codec import stored_result
from ..store.ledger import Ledger

#: The latest distinct run configs whose options are looked at for stored results to judge again.
RUNS_LOOKED_AT = 20


def earlier_options(ledger: Ledger, stage: Stage) -> list[tuple[str, dict[str, Any]]]:
    """(fingerprint, options) of the stage in the latest runs, other than its own options,
    fingerprinted by this code (most recent first, each fingerprint once)."""
    out: dict[str, dict[str, Any]] = {}
    for stages in ledger.run_stage_options(RUNS_LOOKED_AT):
        for name, opts in stages:
            if name != stage.name or not isinstance(opts, dict):
                continue
            earlier = type(stage)(opts)
            if earlier.fingerprint != stage.fingerprint:
                out.setdefault(earlier.fingerprint, earlier.opts)
    return list(out.items())


def judge_again(ledger: Ledger, stage: Stage, earlier: list[tuple[str, dict[str, Any]]],
                missing: list[str]) -> Iterator[tuple[str, tuple]]:
    """(sha256, stored result) for each of the ``missing`` contents (no verdict under the
    stage's options) that the stage can judge from its result under one of the ``earlier``
    options (tried in their order)."""
    left = set(missing)
    for fp, opts in earlier:
        if not left:
            return
        for sha, stored in ledger.results_of(stage.name, fp, sorted(left)):
            result = stage.judge_stored(stored, opts)
            if result is None:
                continue
            left.discard(sha)
            yield sha, stored_result(result.to_json())


def judge_stages_again(ledger: Ledger, stages: list[Stage], cache: dict[str, Any],
                       order: list[str], mark: Callable[[int], None]) -> dict[str, int]:
    """Fill each judging stage's verdict columns (``cache``, ``records.Verdicts``) for the
    contents that have none under its options, from its earlier results; the new results are
    stored under its fingerprint and their contents marked (``mark``: their rows are made
    again). Returns stage -> contents judged again."""
    counts: dict[str, int] = {}
    for st in stages:
        if st.kind != "file" or not st.judges_stored:
            continue
        earlier = earlier_options(ledger, st)
        if not earlier:
            continue
        verdicts = cache[st.name]
        missing = [order[i] for i in range(len(order)) if verdicts.kept_at(i) is None]
        if not missing:
            continue
        rows: list[tuple] = []
        n = 0
        for sha, stored in judge_again(ledger, st, earlier, missing):
            i = verdicts.index[sha]
            verdicts.put_stored(i, stored)
            mark(i)
            rows.append((sha, st.name, st.fingerprint, stored))
            if len(rows) >= BATCH:  # memory: a result's values text each, not every file's at once
                n += _store(ledger, rows)
        n += _store(ledger, rows)
        if n:
            verdicts.source.rows_added()
            counts[st.name] = n
    return counts


#: Judged results stored per transaction.
BATCH = 4096


def _store(ledger: Ledger, rows: list[tuple]) -> int:
    """Store ``rows`` (``Ledger.put_results``' form) and empty the list; returns how many."""
    n = len(rows)
    if n:
        with ledger.batch():
            ledger.put_results(rows)
        rows.clear()
    return n
