"""Safety: inputs are never modified, one run per output folder, no escape from the input or the
output folder, awkward file names work, configs are safe YAML with checked values, nothing is
unpickled from disk."""
from __future__ import annotations

import json
import multiprocessing as mp
import os
import re
import signal
import sqlite3
import time
from pathlib import Path

import pytest

from pipeline import cli
from pipeline.config import load_config, parse_config
from pipeline.errors import ConfigError, LedgerError, UsageError
from pipeline.store.ledger import SCHEMA_VERSION, Ledger
from pipeline.store.lock import LOCK_NAME, OutputLock
from pipeline.engine.runner import Runner, discover
from pipeline.tools.synth import main_synth

REPO = Path(__file__).resolve().parents[1]
CONFIG = REPO / "configs" / "default.yaml"

#: Awkward but legal POSIX file names: spaces, unicode (NFC and NFD), a newline, leading
#: dashes, shell metacharacters, a name that looks like a path traversal once joined.
AWKWARD = ["with space.mid", "ünïcødé 日本.mid", "Cafe\u0301.mid", "line\nbreak.mid", "-rf.mid",
           "--help.mid", "$(touch pwned).mid", "..mid", "a;b|c&.MID"]


def run(inp: Path, out: Path, workers: int = 2, **flags):
    cfg = load_config(CONFIG, input=str(inp), output=str(out), workers=workers)
    return Runner(cfg, quiet=True, **flags).run()


def tree_state(root: Path) -> dict[str, tuple[bytes, int, int]]:
    """path -> (bytes, mtime_ns, mode) of every file (symlinks by their own stat)."""
    state = {}
    for dirpath, dirs, files in os.walk(root):
        for name in files + dirs:
            p = Path(dirpath) / name
            st = p.lstat()
            data = p.read_bytes() if p.is_file() and not p.is_symlink() else os.fsencode(
                os.readlink(p)) if p.is_symlink() else b""
            state[str(p.relative_to(root))] = (data, st.st_mtime_ns, st.st_mode)
    return state


@pytest.fixture(scope="module")
def awkward_corpus(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("input")
    main_synth(root / "synth", 40, seed=3)
    src = sorted((root / "synth").rglob("*.mid"))
    for name, s in zip(AWKWARD, src):
        (root / name).write_bytes(s.read_bytes())
    os.symlink(str(src[-1]), root / "inside_link.mid")  # inside the input folder: followed
    outside = tmp_path_factory.mktemp("elsewhere") / "secret.mid"
    outside.write_bytes(src[-2].read_bytes())
    os.symlink(str(outside), root / "outside_link.mid")  # points outside: not followed
    os.symlink("loop_b.mid", root / "loop_a.mid")
    os.symlink("loop_a.mid", root / "loop_b.mid")
    os.symlink("/nonexistent/dangling.mid", root / "dangling.mid")
    (root / "notes.txt").write_text("not a MIDI file, not ours")
    (root / os.fsdecode(b"latin1 caf\xe9.mid")).write_bytes(src[-3].read_bytes())
    return root


def test_inputs_untouched_and_awkward_names_work(awkward_corpus, tmp_path):
    before = tree_state(awkward_corpus)
    out = tmp_path / "out"
    report = run(awkward_corpus, out)
    run(awkward_corpus, out)  # and a rerun
    assert tree_state(awkward_corpus) == before  # bytes, mtimes and modes identical
    rows = {r["source"]: r for r in map(json.loads, (out / "manifest.jsonl").read_text().splitlines())}
    for name in AWKWARD:
        assert name in rows, name
    assert "inside_link.mid" in rows
    for skipped in ("outside_link.mid", "loop_a.mid", "dangling.mid"):
        assert skipped not in rows
    assert not any("caf" in s and "latin1" in s for s in rows)
    notes = "\n".join(report.notes)
    assert "outside_link.mid pointing outside the input folder" in notes
    assert "not valid UTF-8" in notes and "loop_a.mid" in notes
    # output names come from content ids only
    for p in out.rglob("*"):
        rel = p.relative_to(out).as_posix()
        assert re.fullmatch(r"(manifest\.jsonl|summary\.json|report\.html|state\.sqlite(-wal|-shm)?|splits|"
                            r"splits/\w+\.txt|midi|midi/\w+|midi/\w+/[0-9a-f]{16}(\.[\w+-]+)?\.mid)",
                            rel), rel


def test_skipped_entries_are_in_the_summary_and_explained(tmp_path):
    """An audit found that entries skipped with a note left no trace in the output folder (the
    note is printed only, and not with --quiet; explain said "no such file"). summary.json now
    lists them, and explain names why, a nothing-changed rerun included."""
    from pipeline.audit.explain import explain
    inp = tmp_path / "in"
    main_synth(inp / "synth", 6, seed=3)
    os.symlink("/nonexistent/dangling.mid", inp / "dangling.mid")
    os.symlink("synth", inp / "again")
    os.mkfifo(inp / "fifo.mid")
    out = tmp_path / "out"
    for _ in range(2):  # the second run finds nothing changed
        run(inp, out)
        summary = json.loads((out / "summary.json").read_text())
        listed = {e["source"]: e["why"] for e in summary["skipped"]["listed"]}
        assert summary["skipped"]["count"] == 3 and set(listed) == {"dangling.mid", "again/", "fifo.mid"}
        assert "pointing outside the input folder" in listed["dangling.mid"]
        text = explain(out, "dangling.mid")
        assert "skipped when the last run listed the input folder" in text and listed["dangling.mid"] in text
        text = explain(out, str(inp / "again" / "x.mid"))
        assert "(it lies in again/)" in text and "links to folders are not followed" in text
        assert json.loads(explain(out, "fifo.mid", as_json=True)) == [
            {"source": "fifo.mid", "status": "skipped", "why": "not a regular file (a FIFO)"}]
    assert summary.get("unchanged_since_last_run")
    with pytest.raises(UsageError, match="no such file"):
        explain(out, "never_there.mid")


def test_explain_says_why_a_file_of_the_input_has_no_row(tmp_path):
    """Found by an audit: a MIDI file saved as other.smf got the words of a path that does not
    exist ("no such file in the last run"). explain tells, from the input folder as it is now, a
    file not listed because of its name, one added since the run, a folder, and a path that is
    nowhere; a file removed since the run still has its trail, with a note."""
    from pipeline.audit.explain import explain
    inp = tmp_path / "in"
    main_synth(inp / "synth", 6, seed=3)
    first, second = sorted((inp / "synth").rglob("*.mid"))[:2]
    (inp / "other.smf").write_bytes(first.read_bytes())
    out = tmp_path / "out"
    run(inp, out)
    rows = [json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines()]
    assert "other.smf" not in {r["source"] for r in rows}
    with pytest.raises(UsageError, match=r"not read: the run lists only the files named \.mid \.midi \.kar "
                                         r"\.rmi \(in any case\), and this one ends in \.smf"):
        explain(out, "other.smf")
    (inp / "new.MID").write_bytes(first.read_bytes())
    with pytest.raises(UsageError, match="it was added or renamed since"):
        explain(out, str(inp / "new.MID"))
    with pytest.raises(UsageError, match=r"a folder of the input \(synth/\)"):
        explain(out, "synth")
    with pytest.raises(UsageError, match="no such file in the last run, nor in its input folder now"):
        explain(out, "never_there.mid")
    gone = second.relative_to(inp).as_posix()
    assert "no longer in the input folder" not in explain(out, gone)
    second.unlink()
    assert "note     no longer in the input folder (removed or renamed since the last run)" in explain(out, gone)


def test_output_inside_input_is_not_searched(tmp_path):
    inp = tmp_path / "in"
    main_synth(inp, 20, seed=5)
    before = tree_state(inp)
    out = inp / "derived" / "out"
    n_inputs = sum(1 for p in inp.rglob("*") if p.suffix.lower() in (".mid", ".midi", ".kar", ".rmi"))
    first = run(inp, out)
    assert any((out / "midi").rglob("*.mid"))
    second = run(inp, out)  # its own outputs are not picked up as inputs
    assert first.files == second.files == n_inputs
    assert any("lies inside the input folder; it is not searched" in n for n in first.notes)
    rows = [json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines()]
    assert not any(r["source"].startswith("derived/") for r in rows)
    after = tree_state(inp)
    assert {k: v for k, v in after.items() if not k.startswith("derived")} == before


@pytest.mark.parametrize("where", ["same", "parent"])
def test_output_that_is_or_contains_the_input_is_refused(tmp_path, where):
    inp = tmp_path / "music" / "in"
    main_synth(inp, 5, seed=5)
    before = tree_state(inp)
    out = inp if where == "same" else inp.parent
    with pytest.raises(UsageError, match="is, or contains, the input folder"):
        discover(inp, out)
    with pytest.raises(UsageError):
        run(inp, out)
    assert {k: v for k, v in tree_state(inp).items() if k in before} == before
    assert not (inp / "midi").exists() and not (inp / "manifest.jsonl").exists()


# --- one run per output folder ------------------------------------------------------------

def _hold(out: str, ready, release) -> None:
    with OutputLock(Path(out)):
        ready.set()
        release.wait(30)


def test_second_run_refuses_naming_the_holder(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    ctx = mp.get_context("fork")
    ready, release = ctx.Event(), ctx.Event()
    holder = ctx.Process(target=_hold, args=(str(out), ready, release))
    holder.start()
    try:
        assert ready.wait(20)
        inp = tmp_path / "in"
        main_synth(inp, 3, seed=1)
        with pytest.raises(LedgerError, match=f"another run holds this output folder \\(pid {holder.pid} on "):
            run(inp, out)
    finally:
        release.set()
        holder.join(20)
    with OutputLock(out) as lock:  # free again once the holder is done
        assert lock.took_over is None


def test_stale_lock_of_a_killed_run_is_taken_over(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    ctx = mp.get_context("fork")
    ready, release = ctx.Event(), ctx.Event()
    holder = ctx.Process(target=_hold, args=(str(out), ready, release))
    holder.start()
    assert ready.wait(20)
    os.kill(holder.pid, signal.SIGKILL)
    holder.join(20)
    assert (out / LOCK_NAME).exists()
    (out / ".manifest.jsonl.abc123.tmp").write_text("half a manifest")  # left by the dead run
    with OutputLock(out) as lock:
        assert lock.took_over["pid"] == holder.pid
        assert [p.name for p in lock.swept] == [".manifest.jsonl.abc123.tmp"]


def test_lock_recorded_with_our_own_pid_is_stale(tmp_path):
    # after a kill -9 the new run may get the dead run's pid: a pid check alone would refuse
    out = tmp_path / "out"
    out.mkdir()
    (out / LOCK_NAME).write_text(json.dumps({"pid": os.getpid(), "host": os.uname().nodename,
                                             "since": time.time()}))
    with OutputLock(out):
        pass


def test_forked_worker_does_not_keep_the_lock(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    lock = OutputLock(out).__enter__()
    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:  # a worker outliving its run (the at-fork handler has run by now)
        os.write(w, b"x")
        time.sleep(10)
        os._exit(0)
    os.read(r, 1)
    try:
        os.close(lock.fd)  # the run dies without cleaning up (as with SIGKILL)
        with OutputLock(out) as again:
            assert again.took_over["pid"] == os.getpid()
    finally:
        os.kill(pid, signal.SIGKILL)
        os.waitpid(pid, 0)


# --- configs ----------------------------------------------------------------------------

def test_yaml_tags_are_not_executed(tmp_path):
    marker = tmp_path / "pwned"
    cfg = tmp_path / "evil.yaml"
    cfg.write_text(f"input: !!python/object/apply:os.system ['touch {marker}']\noutput: out\n"
                   "stages: [validate]\n")
    assert cli.main(["run", str(cfg)]) == 2
    assert not marker.exists()


BASE = {"input": "in", "output": "out", "workers": 2,
        "stages": [{"validate": {}}, {"dedup": {}}, {"split": {}}]}


@pytest.mark.parametrize("path,value,match", [
    (("workers",), 0, "workers"),
    (("workers",), -3, "workers"),
    (("stages", 0, "validate", "timeout_s"), 0, "timeout_s"),
    (("stages", 0, "validate", "timeout_s"), -1.5, "timeout_s"),
    (("stages", 0, "validate", "timeout_s"), float("inf"), "timeout_s"),
    (("stages", 0, "validate", "max_memory_mb"), 0, "max_memory_mb"),
    (("stages", 0, "validate", "max_bytes"), -1, "max_bytes"),
    (("stages", 1, "dedup", "threshold"), 1.5, "threshold"),
    (("stages", 1, "dedup", "threshold"), -0.2, "threshold"),
    (("stages", 2, "split", "ratios"), {"train": 1.2, "test": -0.2}, "ratios"),
    (("stages", 2, "split", "ratios"), {"../../etc": 0.5, "test": 0.5}, "ratios"),
])
def test_absurd_values_are_errors(path, value, match):
    raw = json.loads(json.dumps(BASE))
    node = raw
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value
    with pytest.raises(ConfigError, match=match):
        parse_config(raw)


def test_reliability_options_have_safe_defaults():
    cfg = parse_config(json.loads(json.dumps(BASE)))
    opts = cfg.stages[0].options
    assert opts["timeout_s"] == 60.0 and opts["max_memory_mb"] == 2048


# --- nothing unpickled from disk --------------------------------------------------------------

UNSAFE = re.compile(r"pickle\.loads?\(|cPickle|shelve|marshal\.loads?\(|yaml\.load\(|"
                    r"yaml\.unsafe_load|full_load|allow_pickle\s*=\s*True|joblib|dill")


def test_no_unpickling_or_unsafe_yaml_in_the_package():
    hits = []
    for p in sorted((REPO / "pipeline").rglob("*.py")):
        for i, line in enumerate(p.read_text().splitlines(), 1):
            if UNSAFE.search(line.split("#")[0]):
                hits.append(f"{p.relative_to(REPO)}:{i}: {line.strip()}")
    assert hits == []


def test_object_arrays_in_the_ledger_are_refused(tmp_path):
    # a tampered artifact row claiming dtype object must not turn into Python objects
    with Ledger(tmp_path / "state.sqlite") as led:
        with led.batch():
            led.db.execute("INSERT INTO artifacts VALUES (?,?,?,?,?,?,?)",
                           ("ab" * 32, "dedup", "fp", "sig", "|O", "[1]", b"\x00" * 8))
        with pytest.raises((ValueError, TypeError)):
            led.artifacts_for("dedup", "fp")
        with pytest.raises((ValueError, TypeError)):  # nor into a column (store/columns.py)
            led.artifact_columns("dedup", "fp", ["ab" * 32])
    assert sqlite3.connect(tmp_path / "state.sqlite").execute("SELECT count(*) FROM artifacts").fetchone() == (1,)


def test_deferred_artifact_arrays_read_back_as_the_eager_ones(tmp_path, monkeypatch):
    # artifacts_for(defer=...) leaves an array in the ledger until load_arrays reads it: the
    # bytes, dtype and shape must be those of the eager read (numpy's own array equality is
    # the reference), reads are batched across FETCH_CHUNK, and plain arrays pass through
    import numpy as np

    from pipeline.store import ledger as ledger_mod
    from pipeline.store.ledger import StoredArray, load_arrays
    monkeypatch.setattr(ledger_mod, "FETCH_CHUNK", 3)  # several queries for 7 keys
    rng = np.random.default_rng(0)
    items = {"%064x" % k: {"shingles": rng.integers(0, 2**63, size=k, dtype=np.uint64),
                           "signature": rng.integers(0, 2**32, size=4, dtype=np.uint32), "notes": k}
             for k in range(7)}
    with Ledger(tmp_path / "state.sqlite") as led:
        with led.batch():
            led.put_artifacts([(sha, "dedup", "fp", it) for sha, it in items.items()])
        eager = led.artifacts_for("dedup", "fp")
        lazy = led.artifacts_for("dedup", "fp", defer=("shingles",))
        shas = sorted(items)
        assert all(type(lazy[sha]["shingles"]) is StoredArray for sha in shas)
        assert [len(lazy[sha]["shingles"]) for sha in shas] == list(range(7))
        assert all(type(lazy[sha]["signature"]) is np.ndarray and lazy[sha]["notes"] == items[sha]["notes"]
                   for sha in shas)
        plain = np.arange(3, dtype=np.uint64)
        mixed = [lazy[sha]["shingles"] for sha in reversed(shas)] + [plain, lazy[shas[2]]["shingles"]]
        got = load_arrays(mixed)
        want = [eager[sha]["shingles"] for sha in reversed(shas)] + [plain, eager[shas[2]]["shingles"]]
        for g, w in zip(got, want):
            assert g.dtype == np.uint64 and g.shape == w.shape and np.array_equal(g, w)
        assert got[-2] is plain
        assert np.array_equal(lazy[shas[5]]["shingles"].load(), items[shas[5]]["shingles"])
        # a handle listed twice in one call is read once; a read array is not kept on the
        # handle (memory: the caller holds it while it needs it); a row removed behind a
        # handle is an error naming the database
        handle = lazy[shas[4]]["shingles"]
        twice = load_arrays([handle, handle])
        assert twice[0] is twice[1]
        first, second = handle.load(), handle.load()
        assert first is not second and np.array_equal(first, second)
        lazy = led.artifacts_for("dedup", "fp", defer=("shingles",))
        with led.batch():
            for table in ("artifacts", "artifact_data"):  # its row, and its bytes when large
                led.db.execute(f"DELETE FROM {table} WHERE sha256=? AND name='shingles'", (shas[4],))
        with pytest.raises(LedgerError, match="state.sqlite: the shingles artifact of " + shas[4]):
            load_arrays([lazy[shas[4]]["shingles"]])


def test_artifact_scalars_read_back_as_the_json_module_reads_them(tmp_path):
    # scalars are stored as one JSON object per file and stage, or (rows written by earlier
    # versions) one row each, read with shortcuts for plain strings and numbers: both must read
    # what json.loads reads (Python's json module is the reference), type included
    import json
    import math

    from pipeline.store.codec import SCALARS
    values = ["abc", 'a"b', "a\\b", "é", "", "\u2028", "tab\there", "del\x7f",
              0, -3, -2**70, 10**20, 1.5, -0.0, 1e-7, 1e300,
              float("inf"), float("-inf"), float("nan"), True, False, None, [1, 2.5], {"a": 1}]
    items = {f"v{i}": v for i, v in enumerate(values)}
    with Ledger(tmp_path / "state.sqlite") as led:
        with led.batch():
            led.put_artifacts([("ab" * 32, "dedup", "fp", items)])
            led.db.executemany("INSERT INTO artifacts VALUES (?,?,?,?,?,?,?)",
                               [("cd" * 32, "dedup", "fp", k, None, None, json.dumps(v))
                                for k, v in items.items()])
        packed = led.db.execute("SELECT name, data FROM artifacts WHERE sha256=?", ("ab" * 32,)).fetchall()
        got = led.artifacts_for("dedup", "fp")
    assert [name for name, _ in packed] == [SCALARS]
    for sha in ("ab" * 32, "cd" * 32):
        for k, v in items.items():
            want = json.loads(json.dumps(v))
            if isinstance(v, float) and math.isnan(v):
                assert math.isnan(got[sha][k])
                continue
            assert got[sha][k] == want and type(got[sha][k]) is type(want), (sha, v)


# the version-1 tables, as that version created them (sha256 first in both keys)
_V1_TABLES = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
INSERT INTO meta VALUES ('schema', '1');
CREATE TABLE results (
    sha256 TEXT NOT NULL, stage TEXT NOT NULL, fingerprint TEXT NOT NULL,
    kept INTEGER NOT NULL, reason TEXT, detail TEXT NOT NULL,
    vals TEXT NOT NULL, thresholds TEXT NOT NULL,
    PRIMARY KEY (sha256, stage, fingerprint)) WITHOUT ROWID;
CREATE TABLE artifacts (
    sha256 TEXT NOT NULL, stage TEXT NOT NULL, fingerprint TEXT NOT NULL, name TEXT NOT NULL,
    dtype TEXT, shape TEXT, data BLOB,
    PRIMARY KEY (sha256, stage, fingerprint, name)) WITHOUT ROWID;
"""


def _key_order(db: sqlite3.Connection, table: str) -> list[str]:
    # PRAGMA table_info's pk column is the column's 1-based position in the primary key
    # (SQLite documentation, "PRAGMA table_info")
    cols = [(pk, name) for _, name, _, _, _, pk in db.execute(f"PRAGMA table_info({table})") if pk]
    return [name for _, name in sorted(cols)]


def _plan(db: sqlite3.Connection, sql: str) -> str:
    return " ".join(str(r[-1]) for r in db.execute("EXPLAIN QUERY PLAN " + sql, ("s", "f")))


def test_a_version_1_ledger_is_migrated_and_reads_one_stage_as_a_range(tmp_path):
    path = tmp_path / "state.sqlite"
    old = sqlite3.connect(path)
    old.executescript(_V1_TABLES)
    rows = [("%064x" % i, stage, "fp", i % 2, None if i % 2 else "too_short", f"d{i}",
             json.dumps({"i": i}), "{}") for i in range(50) for stage in ("validate", "filter")]
    old.executemany("INSERT INTO results VALUES (?,?,?,?,?,?,?,?)", rows)
    old.execute("INSERT INTO artifacts VALUES (?,?,?,?,?,?,?)", ("%064x" % 3, "dedup", "fp", "~scalars",
                                                                 None, None, '{"notes": 7}'))
    old.commit()
    assert "SCAN" in _plan(old, "SELECT sha256 FROM results WHERE stage=? AND fingerprint=?")
    old.close()
    with Ledger(path) as led:
        got = led.results_for("filter", "fp")
        arts = led.artifacts_for("dedup", "fp")
        db = led.db
        assert db.execute("SELECT value FROM meta WHERE key='schema'").fetchone() == (str(SCHEMA_VERSION),)
        assert _key_order(db, "results") == ["stage", "fingerprint", "sha256"]
        assert _key_order(db, "artifacts") == ["stage", "fingerprint", "sha256", "name"]
        for sql in ("SELECT sha256 FROM results WHERE stage=? AND fingerprint=?",
                    "SELECT sha256 FROM artifacts WHERE stage=? AND fingerprint=?"):
            plan = _plan(db, sql)
            assert "SEARCH" in plan and "PRIMARY KEY" in plan and "SCAN" not in plan, plan
        assert db.execute("SELECT count(*) FROM results").fetchone() == (100,)
    assert sorted(got) == ["%064x" % i for i in range(50)]
    assert got["%064x" % 4] == {"kept": False, "reason": "too_short", "detail": "d4",
                                "values": {"i": 4}, "thresholds": {}}
    assert arts == {"%064x" % 3: {"notes": 7}}
    with Ledger(path) as led:  # opening again changes nothing
        assert led.db.execute("SELECT count(*) FROM results").fetchone() == (100,)


def test_a_ledger_of_a_newer_version_is_refused(tmp_path):
    path = tmp_path / "state.sqlite"
    with Ledger(path):
        pass
    db = sqlite3.connect(path)
    db.execute("UPDATE meta SET value=? WHERE key='schema'", (str(SCHEMA_VERSION + 1),))
    db.commit()
    db.close()
    with pytest.raises(LedgerError, match=f"state schema version {SCHEMA_VERSION + 1} is not {SCHEMA_VERSION}"):
        Ledger(path)


def as_version_2(path: Path) -> None:
    """Turn a ledger into the version-2 layout: every array's bytes in its artifacts row, no
    artifact_data table (what version 2 of ledger.py wrote)."""
    db = sqlite3.connect(path)
    with db:
        db.execute("UPDATE artifacts AS a SET data=(SELECT d.data FROM artifact_data AS d WHERE "
                   "d.stage=a.stage AND d.fingerprint=a.fingerprint AND d.sha256=a.sha256 AND "
                   "d.name=a.name) WHERE a.data IS NULL")
        db.execute("DROP TABLE artifact_data")
        db.execute("UPDATE meta SET value='2' WHERE key='schema'")
    db.close()


def test_a_version_2_ledger_is_migrated_with_every_artifact_kept(tmp_path):
    import numpy as np

    from pipeline.store.ledger import INLINE_BYTES, load_arrays
    path = tmp_path / "state.sqlite"
    rng = np.random.default_rng(5)
    items = {"%064x" % i: {"shingles": np.sort(rng.integers(0, 2**63, size=20 * i, dtype=np.uint64)),
                           "signature": rng.integers(0, 2**32, size=128, dtype=np.uint32),
                           "notes": i} for i in range(12)}
    order = sorted(items)
    with Ledger(path) as led:
        with led.batch():
            led.put_artifacts([(sha, "dedup", "fp", it) for sha, it in items.items()])
    as_version_2(path)
    db = sqlite3.connect(path)
    assert db.execute("SELECT count(*) FROM artifacts WHERE data IS NULL").fetchone() == (0,)
    db.close()
    with Ledger(path) as led:
        db = led.db
        assert db.execute("SELECT value FROM meta WHERE key='schema'").fetchone() == (str(SCHEMA_VERSION),)
        # a signature (128 x 4 bytes) stays in its row, a shingle set of more bytes moves
        moved = {sha for (sha,) in db.execute("SELECT sha256 FROM artifact_data WHERE name='shingles'")}
        assert moved == {sha for sha, it in items.items() if it["shingles"].nbytes > INLINE_BYTES}
        assert 0 < len(moved) < len(items)
        assert db.execute("SELECT count(*) FROM artifacts WHERE data IS NULL").fetchone() == (len(moved),)
        eager = led.artifacts_for("dedup", "fp")
        lazy = led.artifacts_for("dedup", "fp", defer=("shingles",))
        cols = led.artifact_columns("dedup", "fp", order, defer=("shingles",))
        handles = [cols.row(i)["shingles"] for i in range(len(order))]
        loaded = load_arrays([lazy[sha]["shingles"] for sha in order] + handles)
        plain = led.artifact_columns("dedup", "fp", order)
        for k, sha in enumerate(order):
            want = items[sha]
            for got in (eager[sha]["shingles"], loaded[k], loaded[len(order) + k], plain.row(k)["shingles"]):
                assert np.array_equal(got, want["shingles"]) and got.dtype == want["shingles"].dtype
            assert np.array_equal(eager[sha]["signature"], want["signature"])
            assert np.array_equal(cols.row(k)["signature"], want["signature"])
            assert eager[sha]["notes"] == cols.row(k)["notes"] == want["notes"]
    with Ledger(path) as led:  # opening again changes nothing
        assert led.db.execute("SELECT count(*) FROM artifact_data").fetchone() == (len(moved),)


def test_a_version_3_ledger_gets_the_run_columns_table_and_keeps_its_rows(tmp_path):
    # version 4 adds run_columns only: a version-3 ledger (without it) is read as it is, and a
    # run opening it creates the table empty, so its first rerun reads every stored result
    path = tmp_path / "state.sqlite"
    with Ledger(path) as led:
        with led.batch():
            led.put_results([("%064x" % 1, "filter", "fp", {"kept": True, "reason": None, "detail": "",
                                                            "values": {}, "thresholds": {}})])
    db = sqlite3.connect(path)
    with db:
        db.execute("DROP TABLE run_columns")
        db.execute("UPDATE meta SET value='3' WHERE key='schema'")
    db.close()
    with Ledger(path, read_only=True) as led:  # explain and leakage read it as it is
        assert list(led.results_for("filter", "fp")) == ["%064x" % 1]
    with Ledger(path) as led:
        assert led.db.execute("SELECT value FROM meta WHERE key='schema'").fetchone() == (str(SCHEMA_VERSION),)
        assert led.db.execute("SELECT count(*) FROM run_columns").fetchone() == (0,)
        assert list(led.results_for("filter", "fp")) == ["%064x" % 1]
        assert led.run_columns(1, {"%064x" % 1: 0}) is None
