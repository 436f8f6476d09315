"""The SQLite state of an output folder (``OUTPUT/state.sqlite``): the only module that speaks SQL.

Tables
  sources    path -> size, mtime_ns, sha256 (cheap re-fingerprinting: hash only when size or
             mtime changed)
  results    (sha256, stage, fingerprint) -> verdict, reason, detail, values, thresholds
             (per-file stage results; a rerun reuses every row whose key matches)
  artifacts  (sha256, stage, fingerprint, name) -> a scalar (JSON) or a numpy array (raw bytes
             + dtype + shape; never pickle) from a corpus stage's per-file ``prepare``; an
             array of more than ``INLINE_BYTES`` has data NULL here and its bytes in
  artifact_data (stage, fingerprint, sha256, name) -> those bytes (the shingle sets), so reading
             the small artifacts and the keys of a stage does not page through them
  state      (stage, key) -> JSON saved by a corpus stage in the last completed run
  decisions  source -> the whole decision trail of the last completed run (for ``explain``), and
             its verdict (a rerun compares each file's with it: ``outputs.changes``)
  row_digests source -> digest of what its manifest row and trail were made from in the last
             completed run (a rerun reuses the rows whose digest is unchanged)
  outputs    path (relative to OUTPUT) -> sha256, fingerprint of the written normalized file
  runs       one row per run: when, config, counts, status
  run_columns name -> columns over the contents of the last completed run, stored for the next
             one: the contents' sha256 digests in the run's order, and each per-file stage's
             verdict columns (``records.Verdicts``), so a rerun takes its known contents'
             verdicts from them instead of reading every stored result

The database runs in WAL mode; every batch of writes is one transaction, so a killed run never
leaves a half-written result and the next run picks up what was committed.
"""
from __future__ import annotations

import json
import sqlite3
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterable, Iterator

from ..errors import LedgerError
from .codec import (EMPTY, SCALARS, canonical_json, decode_array, shape_of, stored_artifacts,
                    stored_result, thresholds_from_json)

if TYPE_CHECKING:
    from .columns import ArtifactColumns

#: 2: results and artifacts keyed by (stage, fingerprint, sha256, ...) instead of sha256
#: first, so reading one stage's rows is a range of the table, not a scan of every stage's
#: rows; a version-1 database is migrated when opened (``_migrate_from_1``)
#: 3: the bytes of arrays over ``INLINE_BYTES`` in their own table, ``artifact_data``; a
#: version-2 database is migrated when opened (``_migrate_from_2``)
#: 4: ``run_columns`` (a version-3 database gets the empty table; an older version of the
#: program must not write results beside columns it does not keep up to date)
SCHEMA_VERSION = 4
#: The ledger's file name in an output folder.
LEDGER_NAME = "state.sqlite"
#: The ``state`` entry of the last run's skipped input entries (path -> why; no stage has
#: this name): ``put_skipped``, ``skipped_why``.
SKIPPED_STATE = "_skipped"
#: Versions a reader (explain, leakage: ``read_only``) opens as they are: version 3 lacks only
#: ``run_columns``, which no reader uses.
READABLE_VERSIONS = (3, 4)
#: An artifact array of at most this many bytes (a MinHash signature: 128 x 4) is stored in its
#: artifacts row, a larger one (a shingle set) in ``artifact_data``.
INLINE_BYTES = 512
#: Columns and keys of the two tables a rerun reads by stage (see SCHEMA_VERSION).
_KEYED_BY_STAGE = {
    "results": """sha256 TEXT NOT NULL, stage TEXT NOT NULL, fingerprint TEXT NOT NULL,
    kept INTEGER NOT NULL, reason TEXT, detail TEXT NOT NULL, vals TEXT NOT NULL,
    thresholds TEXT NOT NULL, PRIMARY KEY (stage, fingerprint, sha256)""",
    "artifacts": """sha256 TEXT NOT NULL, stage TEXT NOT NULL, fingerprint TEXT NOT NULL,
    name TEXT NOT NULL, dtype TEXT, shape TEXT, data BLOB,
    PRIMARY KEY (stage, fingerprint, sha256, name)""",
}

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS sources (
    path TEXT PRIMARY KEY, size INTEGER NOT NULL, mtime_ns INTEGER NOT NULL, sha256 TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS results ({results}) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS artifacts ({artifacts}) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS artifact_data (
    stage TEXT NOT NULL, fingerprint TEXT NOT NULL, sha256 TEXT NOT NULL, name TEXT NOT NULL,
    data BLOB NOT NULL, PRIMARY KEY (stage, fingerprint, sha256, name));
CREATE TABLE IF NOT EXISTS state (
    stage TEXT NOT NULL, key TEXT NOT NULL, value TEXT NOT NULL, PRIMARY KEY (stage, key));
CREATE TABLE IF NOT EXISTS decisions (
    source TEXT PRIMARY KEY, sha256 TEXT, status TEXT NOT NULL, trail TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS row_digests (
    source TEXT PRIMARY KEY, digest TEXT NOT NULL) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS outputs (
    path TEXT PRIMARY KEY, sha256 TEXT NOT NULL, fingerprint TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    id INTEGER PRIMARY KEY AUTOINCREMENT, started REAL NOT NULL, finished REAL,
    status TEXT NOT NULL, config TEXT NOT NULL, counts TEXT);
CREATE TABLE IF NOT EXISTS run_columns (
    name TEXT PRIMARY KEY, run INTEGER NOT NULL, meta TEXT NOT NULL, data BLOB NOT NULL);
""".format(**_KEYED_BY_STAGE)



class Ledger:
    """An open ``state.sqlite``. Use as a context manager; writes go through ``batch()``."""

    def __init__(self, path: Path, *, read_only: bool = False):
        """Open (and create or migrate) the ledger; ``read_only`` opens an existing one for
        reading only (explain, leakage), which also works in a folder the user cannot write."""
        self.path = Path(path)
        if read_only:
            self.db = self._open_read_only()
            return
        try:
            self.db = sqlite3.connect(str(self.path), isolation_level=None, timeout=30)
            self.db.execute("PRAGMA journal_mode=WAL")
            self.db.execute("PRAGMA synchronous=NORMAL")
            # speed: checkpoint the WAL every ~40 MB instead of every 4 MB (each checkpoint
            # syncs the database file; the per-file pass writes a few KB per file)
            self.db.execute("PRAGMA wal_autocheckpoint=10000")
            self.db.executescript(_SCHEMA)
            row = self.db.execute("SELECT value FROM meta WHERE key='schema'").fetchone()
            if row is None:
                self.db.execute("INSERT INTO meta VALUES ('schema', ?)", (str(SCHEMA_VERSION),))
            elif int(row[0]) in (1, 2, 3):
                if int(row[0]) == 1:
                    _migrate_from_1(self.db)
                if int(row[0]) <= 2:
                    _migrate_from_2(self.db)
                # version 3 -> 4: the run_columns table, created above, is all that is new
                self.db.execute("UPDATE meta SET value=? WHERE key='schema'", (str(SCHEMA_VERSION),))
            elif int(row[0]) != SCHEMA_VERSION:
                raise LedgerError(
                    f"state schema version {row[0]} is not {SCHEMA_VERSION}; rerun with --fresh into a new output folder",
                    file=str(self.path))
        except sqlite3.DatabaseError as e:
            raise LedgerError(f"cannot open the state database ({e}); if it is corrupt, move it away and rerun",
                              file=str(self.path)) from None

    def _open_read_only(self) -> sqlite3.Connection:
        """A read-only connection. In a folder the user cannot write, SQLite cannot create the
        WAL index it needs for ``mode=ro``; the database is then opened as immutable (a
        completed run leaves no WAL behind: the last connection to close checkpoints it)."""
        uri = self.path.resolve().as_uri()
        try:
            try:
                db = sqlite3.connect(f"{uri}?mode=ro", uri=True, isolation_level=None, timeout=30)
                db.execute("SELECT 1 FROM meta LIMIT 1").fetchall()
            except sqlite3.OperationalError:
                db = sqlite3.connect(f"{uri}?mode=ro&immutable=1", uri=True, isolation_level=None)
            row = db.execute("SELECT value FROM meta WHERE key='schema'").fetchone()
        except sqlite3.DatabaseError as e:
            raise LedgerError(f"cannot read the state database ({e}); if it is corrupt, move it "
                              "away and rerun", file=str(self.path)) from None
        if row is None or int(row[0]) not in READABLE_VERSIONS:
            raise LedgerError(f"state schema version {row[0] if row else 'unknown'} is not "
                              f"{SCHEMA_VERSION}; rerun 'midisift run' on this folder first",
                              file=str(self.path))
        return db

    def close(self) -> None:
        self.db.close()

    def __enter__(self) -> "Ledger":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    # -- transactions ------------------------------------------------------------------
    def batch(self) -> "_Batch":
        """A transaction: ``with ledger.batch(): ...`` commits at the end or rolls back."""
        return _Batch(self.db)

    # -- sources -------------------------------------------------------------------------
    def sources(self) -> dict[str, tuple[int, int, str]]:
        """path -> (size, mtime_ns, sha256) as recorded by the last fingerprinting."""
        return {p: (s, m, h) for p, s, m, h in self.db.execute("SELECT path, size, mtime_ns, sha256 FROM sources")}

    def put_sources(self, rows: Iterable[tuple[str, int, int, str]]) -> None:
        self.db.executemany("INSERT OR REPLACE INTO sources VALUES (?,?,?,?)", rows)

    def forget_sources(self, paths: Iterable[str]) -> None:
        self.db.executemany("DELETE FROM sources WHERE path=?", ((p,) for p in paths))

    # -- per-file results ------------------------------------------------------------------
    def results_for(self, stage: str, fingerprint: str,
                    make: Callable[[bool, str | None, str, dict, dict], Any] | None = None, *,
                    values_as_text: bool = False) -> dict[str, Any]:
        """sha256 -> result dict (kept, reason, detail, values, thresholds) of one stage, or
        what ``make(kept, reason, detail, values, thresholds)`` builds of each row (the runner
        keeps compact records: no dict per row is built first). With ``values_as_text`` the
        values reach ``make`` as their stored JSON text (an object with sorted keys), unparsed."""
        out: dict[str, Any] = {}
        loads = json.loads
        if make is None:
            def make(kept, reason, detail, values, thresholds):  # noqa: E306
                return {"kept": kept, "reason": reason, "detail": detail,
                        "values": loads(values) if values_as_text else values, "thresholds": thresholds}
        thresholds_of = thresholds_from_json
        for sha, kept, reason, detail, vals, thr in self.db.execute(
                "SELECT sha256, kept, reason, detail, vals, thresholds FROM results WHERE stage=? AND fingerprint=?",
                (stage, fingerprint)):
            out[sha] = make(bool(kept), reason, detail, vals if values_as_text else loads(vals),
                            thresholds_of(thr))
        return out

    def verdicts_for(self, verdicts: Any, stored: "RunColumns | None" = None) -> Any:
        """Fill ``verdicts`` (a ``records.Verdicts`` over the contents its ``source`` reads,
        ``values_source``) with the stage's stored verdicts of those contents; the values stay in
        the ledger. Memory: columns, no record per file and stage. With ``stored`` (the last
        run's columns, ``run_columns``) the contents they cover take their verdicts from them
        and only the others are read (speed: a rerun does not read every stored result)."""
        key = verdicts.source.key
        select = "SELECT sha256, kept, reason, detail, thresholds FROM results WHERE stage=? AND fingerprint=?"
        columns = stored.verdicts(*key) if stored is not None else None
        if columns is None:
            verdicts.fill(self.db.execute(select, key))
            return verdicts
        verdicts.take_columns(*columns, stored.rows, stored.at)
        order = verdicts.source.order
        missing = [order[i] for i in stored.missing.tolist()]
        verdicts.fill(rows_of_contents(self.db, select, key, missing))
        return verdicts

    def values_source(self, stage: str, fingerprint: str, order: list[str]) -> "StoredValues":
        """Where the stored values texts of one stage's per-file results are read, by index
        into ``order`` (sha256s)."""
        return StoredValues(self.db, stage, fingerprint, order)

    def results_of(self, stage: str, fingerprint: str, shas: list[str]) -> Iterator[tuple[str, dict]]:
        """(sha256, result dict: kept, reason, detail, values, thresholds) of the stage's
        results under ``fingerprint`` for those of ``shas`` that have one."""
        select = "SELECT sha256, kept, reason, detail, vals, thresholds FROM results WHERE stage=? AND fingerprint=?"
        for sha, kept, reason, detail, vals, thr in rows_of_contents(self.db, select, (stage, fingerprint), shas):
            yield sha, {"kept": bool(kept), "reason": reason, "detail": detail,
                        "values": json.loads(vals), "thresholds": thresholds_from_json(thr)}

    def put_results(self, rows: Iterable[tuple[str, str, str, Any]]) -> None:
        """rows of (sha256, stage, fingerprint, result): a result dict, or its stored form
        (``stored_result``: what the workers send, values already JSON text)."""
        self.db.executemany(
            "INSERT OR REPLACE INTO results VALUES (?,?,?,?,?,?,?,?)",
            ((sha, stage, fp, *(r if type(r) is tuple else stored_result(r))) for sha, stage, fp, r in rows))

    def forget_results(self, stage: str, fingerprint: str) -> None:
        """Forget every stored result of one stage under one fingerprint."""
        self.db.execute("DELETE FROM results WHERE stage=? AND fingerprint=?", (stage, fingerprint))

    # -- artifacts ---------------------------------------------------------------------------
    def artifact_keys(self, stage: str, fingerprint: str) -> set[str]:
        return {sha for (sha,) in self.db.execute(
            "SELECT DISTINCT sha256 FROM artifacts WHERE stage=? AND fingerprint=?", (stage, fingerprint))}

    def artifacts_for(self, stage: str, fingerprint: str, shas: set[str] | None = None, *,
                      defer: tuple[str, ...] = ()) -> dict[str, dict[str, Any]]:
        """sha256 -> {name: value}; arrays come back as read-only numpy arrays, those named in
        ``defer`` as ``StoredArray`` handles (length and shape known, bytes read when loaded,
        ``load_arrays`` reads many at once). Speed and memory: a rerun's dedup reads the
        shingle sets of the files it compares, not of every file (about 0.9 KB each)."""
        out: dict[str, dict[str, Any]] = {}
        array = decode_array
        deferred = {name: _ArrayRows(self.db, stage, fingerprint, name) for name in defer}
        for sha, name, dtype, shape, data in self._artifact_rows(stage, fingerprint, defer):
            if shas is not None and sha not in shas:
                continue
            entry = out.get(sha)
            if entry is None:
                entry = out[sha] = {}
            if dtype is not None:
                rows = deferred.get(name)
                entry[name] = array(dtype, shape, data) if rows is None else StoredArray(rows, sha, dtype, shape)
            elif name == SCALARS:
                entry.update(json.loads(data))
            elif name != EMPTY:
                entry[name] = json.loads(data)  # a scalar on its own row (earlier versions)
        return out

    def artifact_columns(self, stage: str, fingerprint: str, order: list[str], *,
                         defer: tuple[str, ...] = ()) -> "ArtifactColumns":
        """The artifacts of the contents ``order`` (sha256s) as columns, row ``i`` for
        ``order[i]`` (``columns.ArtifactColumns``; ``row(i)`` reads like the dict
        ``artifacts_for`` gives, deferred arrays as ``StoredArray`` handles). Memory: one
        matrix per array name and one array per scalar name instead of a dict per file."""
        from .columns import ArtifactColumns  # numpy: not imported by the nothing-changed check
        index = dict(zip(order, range(len(order))))
        cols = ArtifactColumns(order, {name: _ArrayRows(self.db, stage, fingerprint, name) for name in defer},
                               StoredArray)
        cols.spill_folder = str(self.path.parent)  # a spilled signature matrix: the run's own folder
        # speed: rows are handed over a chunk at a time per name (arrays decoded from their
        # joined bytes, scalar objects parsed as one JSON array); a chunk bounds what is held
        pending: dict[str, tuple[list, list]] = {}  # name -> (row numbers, stored rows)
        chunk = ARTIFACT_CHUNK
        for sha, name, dtype, shape, data in self._artifact_rows(stage, fingerprint, defer):
            i = index.get(sha)
            if i is None or (dtype is None and name == EMPTY):
                continue
            at_rows = pending.get(name)
            if at_rows is None:
                at_rows = pending[name] = ([], [])
            at, rows = at_rows
            at.append(i)
            rows.append((dtype, shape, data))
            if len(at) >= chunk:
                _put_columns(cols, name, at, rows, defer)
                at.clear()
                rows.clear()
        for name, (at, rows) in pending.items():
            _put_columns(cols, name, at, rows, defer)
        return cols.finish()

    def _artifact_rows(self, stage: str, fingerprint: str, defer: tuple[str, ...]) -> Iterator[tuple]:
        """(sha256, name, dtype, shape, data) of a stage's stored artifacts; the bytes of the
        arrays named in ``defer`` are not selected (data None; the row still gives the shape)."""
        blob = (f"CASE WHEN name IN (%s) THEN NULL ELSE {_DATA} END" % ",".join("?" * len(defer))
                if defer else _DATA)
        return self.db.execute(
            f"SELECT sha256, name, dtype, shape, {blob} FROM artifacts AS a WHERE stage=? AND fingerprint=?",
            (*defer, stage, fingerprint))

    def put_artifacts(self, rows: Iterable[tuple[str, str, str, Any]]) -> None:
        """rows of (sha256, stage, fingerprint, items): items as ``{name: array or JSON
        scalar}``, or in their stored form (``stored_artifacts``, what the workers send)."""
        flat, apart = [], []
        inline = INLINE_BYTES
        for sha, stage, fp, items in rows:
            for name, dtype, shape, data in (items if type(items) is tuple else stored_artifacts(items)):
                if dtype is not None and len(data) > inline:
                    apart.append((stage, fp, sha, name, data))
                    data = None
                flat.append((sha, stage, fp, name, dtype, shape, data))
        self.db.executemany("INSERT OR REPLACE INTO artifacts VALUES (?,?,?,?,?,?,?)", flat)
        self.db.executemany("INSERT OR REPLACE INTO artifact_data VALUES (?,?,?,?,?)", apart)

    # -- corpus-stage state ------------------------------------------------------------------
    def state_for(self, stage: str) -> dict[str, Any]:
        return {k: json.loads(v) for k, v in self.db.execute("SELECT key, value FROM state WHERE stage=?", (stage,))}

    def state_value(self, stage: str, key: str) -> Any:
        """One saved value of ``state_for(stage)`` (None when not saved), without reading the others."""
        row = self.db.execute("SELECT value FROM state WHERE stage=? AND key=?", (stage, key)).fetchone()
        return None if row is None else json.loads(row[0])

    def put_state(self, stage: str, values: dict[str, Any]) -> None:
        self.db.execute("DELETE FROM state WHERE stage=?", (stage,))
        self.db.executemany("INSERT INTO state VALUES (?,?,?)", ((stage, k, canonical_json(v)) for k, v in values.items()))

    # -- decisions (explain) -------------------------------------------------------------------
    def put_decisions(self, rows: Iterable[tuple[str, str | None, str, Any]], *, replace: bool = True) -> None:
        """Replace the trails with this run's: rows of (source, sha256, status, trail), the trail
        a list or its ``canonical_json`` text. With
        ``replace=False`` the rows are added to those already written in this transaction (a
        run writes its trails in chunks while the manifest streams past)."""
        if replace:
            self.db.execute("DELETE FROM decisions")
        self.db.executemany("INSERT INTO decisions VALUES (?,?,?,?)",
                            ((src, sha, status, trail if type(trail) is str else canonical_json(trail))
                             for src, sha, status, trail in rows))

    def update_decisions(self, rows: Iterable[tuple[str, str | None, str, Any]],
                         gone: Iterable[str]) -> None:
        """Replace the trails of some sources (rows as for ``put_decisions``) and forget the
        sources in ``gone``; the other trails stay as the last run wrote them."""
        self.db.executemany("DELETE FROM decisions WHERE source=?", ((s,) for s in gone))
        self.db.executemany("INSERT OR REPLACE INTO decisions VALUES (?,?,?,?)",
                            ((src, sha, status, trail if type(trail) is str else canonical_json(trail))
                             for src, sha, status, trail in rows))

    def row_digests(self) -> dict[str, str]:
        """source -> digest of its manifest row in the last completed run."""
        return dict(self.db.execute("SELECT source, digest FROM row_digests"))

    def put_row_digests(self, rows: Iterable[tuple[str, str]], gone: Iterable[str] = (), *,
                        replace: bool = False) -> None:
        """Record (source, digest) rows; ``replace`` forgets all others first, else only those
        in ``gone``."""
        if replace:
            self.db.execute("DELETE FROM row_digests")
        else:
            self.db.executemany("DELETE FROM row_digests WHERE source=?", ((s,) for s in gone))
        self.db.executemany("INSERT OR REPLACE INTO row_digests VALUES (?,?)", rows)

    def decision_statuses(self) -> Iterator[tuple[str, str]]:
        """(sha256, 'kept'|'dropped') of the last completed run; 'kept' wins for shared contents."""
        return self.db.execute(
            "SELECT sha256, MAX(status) FROM decisions GROUP BY sha256")  # 'kept' > 'dropped'

    def set_verdicts_aside(self) -> None:
        """Copy the last completed run's verdicts, (source, sha256, status), to a temporary
        table before ``put_decisions`` replaces every trail: ``last_verdicts(aside=True)`` reads
        them there (the trails, the bulk of the table, are not copied)."""
        self.db.execute("DROP TABLE IF EXISTS temp.last_verdicts")
        self.db.execute("CREATE TEMP TABLE last_verdicts (source TEXT PRIMARY KEY, sha256 TEXT, "
                        "status TEXT NOT NULL) WITHOUT ROWID")
        self.db.execute("INSERT INTO temp.last_verdicts SELECT source, sha256, status FROM decisions")

    def last_verdicts(self, sources: list[str], *, aside: bool = False) -> dict[str, tuple[str | None, str]]:
        """Source -> (sha256, 'kept' | 'dropped') in the last completed run, for those of
        ``sources`` it had: from its decisions (read before this run replaces theirs), or
        ``aside``, from the copy ``set_verdicts_aside`` made."""
        table = "temp.last_verdicts" if aside else "decisions"
        out: dict[str, tuple[str | None, str]] = {}
        for chunk in iter_chunks(sources, 500):
            marks = ",".join("?" * len(chunk))
            for source, sha, status in self.db.execute(
                    f"SELECT source, sha256, status FROM {table} WHERE source IN ({marks})", chunk):
                out[source] = (sha, status)
        return out

    def decision_sources(self) -> dict[str, str]:
        """Source -> sha256 of every file of the last completed run (its trails' rows)."""
        return dict(self.db.execute("SELECT source, sha256 FROM decisions"))

    def decision(self, source: str) -> tuple[str | None, list] | None:
        row = self.db.execute("SELECT sha256, trail FROM decisions WHERE source=?", (source,)).fetchone()
        return None if row is None else (row[0], json.loads(row[1]))

    def put_skipped(self, skipped: Iterable[tuple[str, str]]) -> None:
        """Record the entries the run's discovery left out (path, why), replacing the last
        run's (``SourceTable.skipped``)."""
        self.put_state(SKIPPED_STATE, dict(skipped))

    def skipped_why(self, source: str) -> str | None:
        """Why the last run left ``source`` out when it listed the input, or None."""
        return self.state_value(SKIPPED_STATE, source)

    def decisions_by_sha_prefix(self, prefix: str) -> list[tuple[str, str | None, list]]:
        return [(s, h, json.loads(t)) for s, h, t in self.db.execute(
            "SELECT source, sha256, trail FROM decisions WHERE sha256 LIKE ? ORDER BY source", (prefix + "%",))]

    # -- outputs ---------------------------------------------------------------------------------
    def outputs(self) -> dict[str, tuple[str, str]]:
        return {p: (h, f) for p, h, f in self.db.execute("SELECT path, sha256, fingerprint FROM outputs")}

    def put_outputs(self, rows: Iterable[tuple[str, str, str]]) -> None:
        self.db.executemany("INSERT OR REPLACE INTO outputs VALUES (?,?,?)", rows)

    def forget_outputs(self, paths: Iterable[str]) -> None:
        self.db.executemany("DELETE FROM outputs WHERE path=?", ((p,) for p in paths))

    # -- runs --------------------------------------------------------------------------------------
    def start_run(self, config: dict) -> int:
        cur = self.db.execute("INSERT INTO runs (started, status, config) VALUES (?, 'running', ?)",
                              (time.time(), canonical_json(config)))
        return int(cur.lastrowid)

    def finish_run(self, run_id: int, counts: dict) -> None:
        self.db.execute("UPDATE runs SET finished=?, status='complete', counts=? WHERE id=?",
                        (time.time(), canonical_json(counts), run_id))

    def run_stage_options(self, latest: int) -> list[list]:
        """The ``stages`` ([name, options] pairs) of the ``latest`` distinct run configs, most
        recent first (a rerun of the same config, nothing changed or stopped, counts once)."""
        out = []
        for (text,) in self.db.execute("SELECT config FROM runs GROUP BY config ORDER BY MAX(id) DESC "
                                       "LIMIT ?", (latest,)):
            stages = json.loads(text).get("stages")
            if isinstance(stages, list):
                out.append([pair for pair in stages if isinstance(pair, list) and len(pair) == 2])
        return out

    def runs_unfinished(self, after: int, before: int) -> int:
        """How many runs started after run ``after`` and before run ``before`` did not complete."""
        return self.db.execute("SELECT COUNT(*) FROM runs WHERE id>? AND id<? AND status!='complete'",
                               (after, before)).fetchone()[0]

    def last_run(self) -> dict | None:
        row = self.db.execute(
            "SELECT id, started, finished, config, counts FROM runs WHERE status='complete' ORDER BY id DESC LIMIT 1"
        ).fetchone()
        if row is None:
            return None
        return {"id": row[0], "started": row[1], "finished": row[2], "config": json.loads(row[3]),
                "counts": json.loads(row[4] or "{}")}

    # -- columns for the next run ---------------------------------------------------------
    def put_run_columns(self, run: int, order: list[str], verdicts: Iterable[Any]) -> None:
        """Store, for the next run, this run's contents (``order``, sha256s) and each per-file
        stage's verdict columns over them (``records.Verdicts``); written in the run's last
        transaction, so they hold what the results table holds when it commits."""
        self.db.execute("DELETE FROM run_columns")
        self.db.execute("INSERT INTO run_columns VALUES (?,?,?,?)",
                        (_ORDER, run, json.dumps({"n": len(order)}), bytes.fromhex("".join(order))))
        for v in verdicts:
            meta, data = v.stored_columns()
            self.db.execute("INSERT INTO run_columns VALUES (?,?,?,?)",
                            (_verdicts_name(*v.source.key), run, json.dumps(meta), data))

    def run_columns(self, run: int, index: dict[str, int]) -> "RunColumns | None":
        """The columns the last completed run stored (``put_run_columns``), mapped onto run
        ``run``'s contents (``index``: sha256 -> content index); None when a run started since
        then did not complete (it may have stored results they do not hold) or when they cover
        less than ``COLUMNS_COVER`` of the contents (reading every stored result is then as
        quick)."""
        row = self.db.execute("SELECT run, data FROM run_columns WHERE name=?", (_ORDER,)).fetchone()
        if row is None or self.runs_unfinished(row[0], run):
            return None
        stored = RunColumns(self.db, row[1], index)
        return stored if len(stored.at) >= COLUMNS_COVER * len(index) else None

    def clear_cache(self) -> None:
        """Forget cached per-file results and artifacts (``--fresh``); keeps history of runs."""
        self.db.execute("DELETE FROM results")
        self.db.execute("DELETE FROM artifacts")
        self.db.execute("DELETE FROM artifact_data")
        self.db.execute("DELETE FROM row_digests")
        self.db.execute("DELETE FROM run_columns")


def _migrate_from_1(db: sqlite3.Connection) -> None:
    """Rebuild the results and artifacts tables of a version-1 database (keyed sha256 first)
    with version 2's keys (same columns, same rows), in one transaction: a run killed meanwhile
    leaves version 1."""
    db.execute("BEGIN IMMEDIATE")
    try:
        for table, spec in _KEYED_BY_STAGE.items():
            columns = [r[1] for r in db.execute(f"PRAGMA table_info({table})")]
            db.execute(f"CREATE TABLE {table}_v2 ({spec}) WITHOUT ROWID")
            db.execute(f"INSERT INTO {table}_v2 ({', '.join(columns)}) SELECT {', '.join(columns)} FROM {table}")
            db.execute(f"DROP TABLE {table}")
            db.execute(f"ALTER TABLE {table}_v2 RENAME TO {table}")
        db.execute("UPDATE meta SET value='2' WHERE key='schema'")
        db.execute("COMMIT")
    except BaseException:
        db.execute("ROLLBACK")
        raise


def _migrate_from_2(db: sqlite3.Connection) -> None:
    """Move the bytes of a version-2 database's arrays over ``INLINE_BYTES`` into
    ``artifact_data`` and rebuild the artifacts table without them (its pages then hold only
    the small rows), in one transaction: a run killed meanwhile leaves version 2. Every stored
    artifact is kept, so the next run reuses them as before."""
    large = "dtype IS NOT NULL AND data IS NOT NULL AND length(data) > ?"
    db.execute("BEGIN IMMEDIATE")
    try:
        db.execute("INSERT OR REPLACE INTO artifact_data SELECT stage, fingerprint, sha256, name, data "
                   f"FROM artifacts WHERE {large}", (INLINE_BYTES,))
        columns = [r[1] for r in db.execute("PRAGMA table_info(artifacts)")]
        kept = ", ".join(f"CASE WHEN {large} THEN NULL ELSE data END" if c == "data" else c for c in columns)
        db.execute(f"CREATE TABLE artifacts_v3 ({_KEYED_BY_STAGE['artifacts']}) WITHOUT ROWID")
        db.execute(f"INSERT INTO artifacts_v3 ({', '.join(columns)}) SELECT {kept} FROM artifacts",
                   (INLINE_BYTES,))
        db.execute("DROP TABLE artifacts")
        db.execute("ALTER TABLE artifacts_v3 RENAME TO artifacts")
        db.execute("UPDATE meta SET value='3' WHERE key='schema'")
        db.execute("COMMIT")
    except BaseException:
        db.execute("ROLLBACK")
        raise


#: An artifacts row's bytes (``a``), read from ``artifact_data`` when stored there (data NULL;
#: SQLite's coalesce runs the lookup only then).
_DATA = ("coalesce(a.data, (SELECT d.data FROM artifact_data AS d WHERE d.stage=a.stage AND "
         "d.fingerprint=a.fingerprint AND d.sha256=a.sha256 AND d.name=a.name))")


#: ``run_columns``' row of the contents' order.
_ORDER = "order"
#: A rerun takes stored columns only when they cover at least this share of its contents.
COLUMNS_COVER = 0.5


def _verdicts_name(stage: str, fingerprint: str) -> str:
    """``run_columns``' row of one per-file stage's verdicts under one options fingerprint."""
    return f"verdicts {stage} {fingerprint}"


class RunColumns:
    """The columns the last completed run stored, as this run reads them: its row ``rows[k]``
    is this run's content ``at[k]``; ``missing`` lists this run's contents (indices) they do
    not hold (``Ledger.run_columns``)."""

    def __init__(self, db: sqlite3.Connection, digests: bytes, index: dict[str, int]):
        import numpy as np
        n = len(digests) // 32
        at = np.fromiter((index.get(digests[32 * k:32 * k + 32].hex(), -1) for k in range(n)),
                         dtype=np.int64, count=n)
        self.rows = np.flatnonzero(at >= 0)
        self.at = at[self.rows]
        held = np.zeros(len(index), dtype=bool)
        held[self.at] = True
        self.missing = np.flatnonzero(~held)
        self.db = db

    def verdicts(self, stage: str, fingerprint: str) -> tuple[dict[str, Any], bytes] | None:
        """The stored verdict columns of one stage (``records.Verdicts.stored_columns``), or
        None when the last run stored none under this fingerprint."""
        row = self.db.execute("SELECT meta, data FROM run_columns WHERE name=?",
                              (_verdicts_name(stage, fingerprint),)).fetchone()
        return None if row is None else (json.loads(row[0]), row[1])


class _Batch:
    """One transaction; any SQLite failure (disk full, I/O error) becomes a LedgerError naming
    the database, and the transaction is rolled back so no half-written result remains."""

    def __init__(self, db: sqlite3.Connection):
        self.db = db

    def __enter__(self) -> sqlite3.Connection:
        try:
            self.db.execute("BEGIN IMMEDIATE")
        except sqlite3.Error as e:
            raise _ledger_error(self.db, e) from None
        return self.db

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> bool:
        if exc_type is None:
            try:
                self.db.execute("COMMIT")
                return False
            except sqlite3.Error as e:
                self._rollback()
                raise _ledger_error(self.db, e) from None
        self._rollback()
        if isinstance(exc, sqlite3.Error):
            raise _ledger_error(self.db, exc) from None
        return False

    def _rollback(self) -> None:
        try:
            self.db.execute("ROLLBACK")
        except sqlite3.Error:
            pass


def _ledger_error(db: sqlite3.Connection, e: Exception) -> LedgerError:
    try:
        path = next((row[2] for row in db.execute("PRAGMA database_list") if row[1] == "main"), None)
    except sqlite3.Error:
        path = None
    return LedgerError(f"the state database could not be written ({e}); check free space and "
                       "permissions, then rerun: committed results are kept", file=path)



class _ArrayRows:
    """Where the deferred arrays of one artifact name of one stage and fingerprint are read."""

    __slots__ = ("db", "key")

    def __init__(self, db: sqlite3.Connection, stage: str, fingerprint: str, name: str):
        self.db, self.key = db, (stage, fingerprint, name)

    def fetch(self, shas: list[str]) -> dict[str, bytes]:
        """sha256 -> stored bytes, in queries of ``FETCH_CHUNK`` keys."""
        stage, fp, name = self.key
        got: dict[str, bytes] = {}
        for chunk in iter_chunks(shas, FETCH_CHUNK):
            # speed: the large arrays straight from artifact_data, then the small ones left
            # (one lookup a key each, not a lookup in artifacts and then in artifact_data)
            for table in ("artifact_data", "artifacts"):
                got.update(self.db.execute(
                    f"SELECT sha256, data FROM {table} WHERE stage=? AND fingerprint=? AND name=? "
                    f"AND data IS NOT NULL AND sha256 IN ({','.join('?' * len(chunk))})", (stage, fp, name, *chunk)))
                chunk = [sha for sha in chunk if sha not in got]
                if not chunk:
                    break
        return got


class StoredValues:
    """The stored values texts of one stage's per-file results (``records.Result.defer``),
    read by content index (a position in ``order``, the run's contents in first-source order).

    ``prefetch`` reads the texts of many contents in one query per ``FETCH_CHUNK`` keys and
    holds them until the next read; ``text`` answers from them, else reads the next
    ``FETCH_CHUNK`` contents from the missed one on (readers walk the contents in order: the
    corpus stages' members, the placed outputs), or only the missed one when the last chunk
    served few reads."""

    __slots__ = ("db", "key", "order", "_held", "_served", "_asked", "_found")

    def __init__(self, db: sqlite3.Connection, stage: str, fingerprint: str, order: list[str]):
        self.db, self.key, self.order = db, (stage, fingerprint), order
        self._held: dict[str, str] = {}
        self._served = SEQUENTIAL
        self._asked: dict[str, int] = {}  # name -> times ``may_have`` was asked before its scan
        self._found: dict[str, bool] = {}  # name -> what its scan found

    def may_have(self, name: str) -> bool:
        """False when no stored text of the stage has the key ``name`` (``"name":`` appears in
        none of them: one scan of the stage's rows, remembered), asked from the
        ``SCAN_AFTER``-th time on; True before (the reader reads the text). Speed: a reader
        looking for a value another stage sets in every content (the split's ``augment`` of a
        full run) skips this stage's texts, and one looking in a few (a rerun's new members)
        does not scan a hundred thousand of them."""
        found = self._found.get(name)
        if found is None:
            asked = self._asked.get(name, 0)
            if asked < SCAN_AFTER:
                self._asked[name] = asked + 1
                return True
            found = self._found[name] = self.db.execute(
                "SELECT 1 FROM results WHERE stage=? AND fingerprint=? AND instr(vals, ?) > 0 LIMIT 1",
                (*self.key, f'"{name}":')).fetchone() is not None
        return found

    def rows_added(self) -> None:
        """Forget what ``may_have`` found: the stage's rows changed."""
        self._found.clear()

    def text(self, index: int) -> str:
        sha = self.order[index]
        t = self._held.get(sha)
        if t is None:
            if self._served >= SEQUENTIAL:
                self.prefetch(self.order[index:index + FETCH_CHUNK])
                t = self._held.get(sha)
            if t is None:
                row = self.db.execute("SELECT vals FROM results WHERE stage=? AND fingerprint=? AND sha256=?",
                                      (*self.key, sha)).fetchone()
                if row is None:
                    path = self.db.execute("PRAGMA database_list").fetchone()[2] or None
                    raise LedgerError(f"the stored values of {self.key[0]} for content {sha} are no "
                                      "longer in the state database (another process changed it "
                                      "during the run?); rerun", file=path)
                return row[0]  # a read past the held chunk: it served no read (``SEQUENTIAL``)
        self._served += 1
        return t

    def prefetch(self, shas: list[str]) -> None:
        """Hold the texts of ``shas`` (and let go of those held before)."""
        stage, fp = self.key
        self._held = dict(rows_of_contents(
            self.db, "SELECT sha256, vals FROM results WHERE stage=? AND fingerprint=?", (stage, fp), shas))
        self._served = 0


#: Reads a held chunk of values must have served for a miss to read the next chunk (fewer:
#: the reader jumps around, and a miss reads one row; such rows count for no chunk, so a
#: reader of scattered contents, as the split reading new members' values, reads no more chunks).
SEQUENTIAL = 16


#: Reads of a key in one stage's stored values before ``StoredValues.may_have`` scans them for
#: it (a scan reads every text of the stage: worth it for a reader of many contents only).
SCAN_AFTER = 2000


#: Keys per query when deferred arrays are read in bulk (SQLite allows 999 parameters in old builds).
FETCH_CHUNK = 500


#: Stored artifact rows of one name handed to the columns at a time (``artifact_columns``).
ARTIFACT_CHUNK = 4096


def _put_columns(cols: Any, name: str, at: list[int], rows: list[tuple], defer: tuple[str, ...]) -> None:
    """One chunk of stored rows (dtype, shape, data) of the artifact ``name`` into ``cols``,
    row ``at[k]`` for ``rows[k]``."""
    if not at:
        return
    if name in defer:
        cols.put_deferred_many(name, at, [(dtype, shape) for dtype, shape, _ in rows])
    elif rows[0][0] is not None:  # arrays (a name is stored as arrays or as scalars)
        cols.put_arrays(name, at, rows)
    elif name == SCALARS:
        cols.put_scalar_objects(at, json.loads("[" + ",".join(data for _, _, data in rows) + "]"))
    else:  # a scalar on its own row (earlier versions)
        for i, (_, _, data) in zip(at, rows):
            cols.put_scalar(i, name, json.loads(data))


class StoredArray:
    """A numpy array artifact left in the ledger until it is read (``artifacts_for(defer=)``):
    ``len()`` and ``shape`` come from the stored shape, ``load()`` reads the bytes; the ledger
    must still be open. A read array is not kept on the handle (memory: a 100,000-file run
    compares nearly every file in some candidate pair, and kept sets stayed for the whole
    stage walk); whoever reads it holds it as long as it needs it."""

    __slots__ = ("_rows", "sha256", "dtype", "_shape")

    def __init__(self, rows: _ArrayRows, sha256: str, dtype: str, shape: str | None):
        self._rows, self.sha256, self.dtype, self._shape = rows, sha256, dtype, shape

    @property
    def shape(self) -> tuple[int, ...]:
        return shape_of(self._shape)

    def __len__(self) -> int:
        dims = self.shape
        if not dims:
            raise TypeError("len() of a 0-d stored array")
        return dims[0]

    def load(self) -> Any:
        return load_arrays([self])[0]

    def __repr__(self) -> str:
        return f"StoredArray({self._rows.key[2]} of {self.sha256[:16]}, {self.dtype}, {self.shape})"


def load_arrays(values: list) -> list:
    """The arrays of ``values``: numpy arrays (or anything else) as they are, ``StoredArray``
    handles read from the ledger, those sharing a table in one query per ``FETCH_CHUNK`` (a
    handle listed twice is read once and gives one array)."""
    out = list(values)
    groups: dict[int, tuple[_ArrayRows, list[int]]] = {}
    for i, v in enumerate(out):
        if type(v) is StoredArray:
            groups.setdefault(id(v._rows), (v._rows, []))[1].append(i)
    for rows, where in groups.values():
        got = rows.fetch(sorted({out[i].sha256 for i in where}))
        read: dict[int, Any] = {}
        for i in where:
            v = out[i]
            arr = read.get(id(v))
            if arr is None:
                data = got.get(v.sha256)
                if data is None:
                    path = rows.db.execute("PRAGMA database_list").fetchone()[2] or None
                    raise LedgerError(f"the {rows.key[2]} artifact of {v.sha256} is no longer in "
                                      "the state database (another process changed it during "
                                      "the run?); rerun", file=path)
                arr = read[id(v)] = decode_array(v.dtype, v._shape, data)
            out[i] = arr
    return out


def iter_chunks(items: list, size: int) -> Iterator[list]:
    for i in range(0, len(items), size):
        yield items[i:i + size]


def rows_of_contents(db: sqlite3.Connection, select: str, params: tuple, shas: list[str]) -> Iterator[tuple]:
    """The rows of ``select`` (a query ending in its WHERE conditions, ``params`` theirs) whose
    ``sha256`` is one of ``shas``, in queries of ``FETCH_CHUNK`` keys."""
    for chunk in iter_chunks(shas, FETCH_CHUNK):
        yield from db.execute(f"{select} AND sha256 IN ({','.join('?' * len(chunk))})", (*params, *chunk))
