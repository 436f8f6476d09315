"""Faults a run must survive: worker crash, hang, busy loop, unbounded allocation, a decoder
exception, kill -9 of the run at several points, disk full and an unwritable output folder.

Each fault is injected (the MIDISIFT_FAULT worker hook of pipeline.engine.executor, SIGKILL from a
driver script that wraps runner/outputs/ledger functions, monkeypatched OSError/sqlite errors)
and the run is checked against an uninterrupted run of the same corpus: nothing lost, manifest
and split lists byte-identical after recovery, no partial file under a final name.
"""
from __future__ import annotations

import errno
import json
import multiprocessing
import os
import signal
import sqlite3
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import pytest
import yaml

from pipeline import cli
from pipeline.outputs import render as rendering
from pipeline.outputs.files import STAGING
from pipeline.engine import runner
from pipeline.config import load_config
from pipeline.errors import LedgerError, OutputError
from pipeline.engine.executor import FAULT_ENV
from pipeline.store.ledger import Ledger
from pipeline.engine.runner import Runner
from pipeline.midi.decode import decode
from pipeline.tools.synth import main_synth

REPO = Path(__file__).resolve().parents[1]
COUNT = 160


@pytest.fixture(scope="module")
def corpus(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("corpus")
    main_synth(d, COUNT, seed=7)
    return d


@pytest.fixture(scope="module")
def config(tmp_path_factory) -> Path:
    """configs/default.yaml with short per-file limits (so a hang costs two seconds)."""
    raw = yaml.safe_load((REPO / "configs" / "default.yaml").read_text())
    for entry in raw["stages"]:
        if "validate" in entry:
            entry["validate"] = {**(entry["validate"] or {}), "timeout_s": 2.0, "max_memory_mb": 256}
    p = tmp_path_factory.mktemp("cfg") / "faults.yaml"
    p.write_text(yaml.safe_dump(raw))
    return p


def run(config: Path, inp: Path, out: Path, workers: int = 2, **flags):
    cfg = load_config(config, input=str(inp), output=str(out), workers=workers)
    return Runner(cfg, quiet=True, **flags).run()


def snapshot(out: Path) -> dict[str, bytes]:
    """The contract files compared byte for byte: manifest.jsonl and splits/*.txt."""
    files = {"manifest.jsonl": (out / "manifest.jsonl").read_bytes()}
    for p in sorted((out / "splits").glob("*.txt")):
        files[f"splits/{p.name}"] = p.read_bytes()
    return files


def manifest(out: Path) -> dict[str, dict]:
    return {r["source"]: r for r in map(json.loads, (out / "manifest.jsonl").read_text().splitlines())}


def assert_clean(out: Path) -> None:
    """No temporary or partial file left; every placed MIDI file decodes; lists match disk."""
    leftovers = [p for p in out.rglob("*") if p.name.endswith(".tmp") or ".staging" in p.parts]
    assert leftovers == []
    listed = set()
    for p in (out / "splits").glob("*.txt"):
        listed |= set(p.read_text().split())
    on_disk = {p.relative_to(out).as_posix() for p in (out / "midi").rglob("*.mid")}
    assert listed == on_disk
    for rel in on_disk:
        assert len(decode((out / rel).read_bytes()).notes) > 0


@pytest.fixture(scope="module")
def baseline(corpus, config, tmp_path_factory) -> dict[str, bytes]:
    out = tmp_path_factory.mktemp("baseline") / "out"
    run(config, corpus, out)
    assert_clean(out)
    return snapshot(out)


# --- worker faults ------------------------------------------------------------------------

FAULTS = {"crash": "decoder_crash", "abort": "decoder_crash", "exit": "decoder_crash",
          "raise": "decoder_crash", "hang": "timeout", "loop": "timeout", "alloc": "too_large"}


def test_worker_faults_cost_one_file_each_and_are_not_retried(corpus, config, baseline, tmp_path,
                                                              monkeypatch):
    out = tmp_path / "out"
    clean = {r["source"]: r for r in map(json.loads, baseline["manifest.jsonl"].decode().splitlines())}
    kept = sorted(s for s, r in clean.items() if r["status"] == "kept" and "\n" not in s)
    # one distinct kept file per fault kind, spread over the corpus
    victims = dict(zip(FAULTS, kept[::len(kept) // len(FAULTS)]))
    monkeypatch.setenv(FAULT_ENV, ";".join(f"{k}:{s}" for k, s in victims.items()))
    report = run(config, corpus, out)
    rows = manifest(out)
    assert sorted(rows) == sorted(clean)  # every input file has its one row
    assert report.files == len(clean)
    for kind, src in victims.items():
        r = rows[src]
        assert (r["status"], r["stage"], r["reason"]) == ("dropped", "validate", FAULTS[kind]), kind
        assert r["detail"]
    # only the victims (and byte-identical copies of them: work is done per content) faulted
    victim_shas = {rows[s]["sha256"] for s in victims.values()}
    assert ({s for s, r in rows.items() if r["reason"] in FAULTS.values()}
            == {s for s, r in rows.items() if r["sha256"] in victim_shas})
    # the printed report counts the faulted files as the manifest does
    assert (sum(n for (_, reason), n in report.dropped.items() if reason in FAULTS.values())
            == sum(1 for r in rows.values() if r["reason"] in FAULTS.values()))
    assert_clean(out)

    # a rerun does not retry them (the hook is still armed: a retry would fault again)
    again = run(config, corpus, out)
    assert again.computed == 0
    assert manifest(out) == rows

    # --retry-failed (hook off) recomputes the retryable ones: time, crash and memory-limit drops
    # (a too_large from a size cap is the file's own fault and is not retried)
    monkeypatch.delenv(FAULT_ENV)
    retried = run(config, corpus, out, retry_failed=True)
    retryable = list(FAULTS)
    assert retried.computed == len(retryable)
    rows = manifest(out)
    for kind in retryable:  # a real verdict now (dedup may keep the copy kept meanwhile)
        assert rows[victims[kind]]["reason"] not in FAULTS.values(), (kind, rows[victims[kind]])
        assert rows[victims[kind]]["stage"] != "validate", kind


def test_memory_error_inside_a_stage_is_too_large_not_stage_error(corpus, config, tmp_path,
                                                                    monkeypatch):
    # e.g. an analysis sizing an array by the file's last tick (found by the long fuzz run)
    from pipeline.stages.key_meter import KeyMeter
    real = KeyMeter.process

    def greedy(self, piece, ctx):  # inherited by the forked workers
        if ctx.source.endswith("5.mid"):
            raise MemoryError("Unable to allocate 24.0 GiB for an array")
        return real(self, piece, ctx)
    monkeypatch.setattr(KeyMeter, "process", greedy)
    run(config, corpus, tmp_path / "out")
    rows = manifest(tmp_path / "out")
    hit = [r for s, r in rows.items() if s.endswith("5.mid") and r["stage"] in ("validate", "key_meter")
           and r["reason"] not in ("not_midi", "truncated", "bad_chunk", "bad_event",
                                   "unsupported_format", "no_notes")]
    assert hit and all(r["reason"] == "too_large" and "max_memory_mb = 256 MB" in r["detail"]
                       and "in greedy" in r["detail"] for r in hit)
    assert not any(r["reason"] == "stage_error" for r in rows.values())


def test_one_and_two_workers_give_identical_outputs(corpus, config, baseline, tmp_path):
    out = tmp_path / "one"
    run(config, corpus, out, workers=1)
    assert snapshot(out) == baseline


# --- kill -9 of the run ---------------------------------------------------------------------

DRIVER = textwrap.dedent('''
    """Run the CLI, but SIGKILL this process at the N-th call of a chosen function."""
    import os, signal, sys
    from pipeline import cli
    from pipeline.outputs import files as outfiles, manifest, summary
    from pipeline.store import ledger
    from pipeline.engine import runner

    point, n = sys.argv[1].split(":")
    n, calls, me = int(n), [0], os.getpid()
    runner.BATCH = 256  # the batch size these kill points were laid out for (several batches)

    def hit():
        if os.getpid() == me:
            calls[0] += 1
            if calls[0] >= n:
                os.kill(me, signal.SIGKILL)

    def before(obj, name):
        orig = getattr(obj, name)
        def wrapper(*a, **k):
            hit()
            return orig(*a, **k)
        setattr(obj, name, wrapper)

    if point == "sources":        # inside the transaction that records the fingerprints
        before(ledger.Ledger, "put_sources")
    elif point == "in_batch":     # inside the N-th results transaction (results written, not committed)
        before(ledger.Ledger, "put_artifacts")
    elif point == "outcome":      # the parent received N outcomes (results not all committed)
        orig_run = runner.run_tasks
        def counting(*a, **k):
            for oc in orig_run(*a, **k):
                yield oc
                hit()
        runner.run_tasks = counting
    elif point == "place":        # the N-th normalized file being moved into midi/<part>/
        orig_place, orig_replace, armed = outfiles.place, os.replace, [False]
        def replace(src, dst):
            if armed[0]:
                hit()
            return orig_replace(src, dst)
        def place(*a, **k):
            armed[0] = True
            return orig_place(*a, **k)
        os.replace, outfiles.place = replace, place
    elif point == "write_all":    # just before the manifest is written
        before(manifest, "write_all")
    elif point == "write_atomic": # the N-th atomic write of manifest/splits/summary
        orig_all = manifest.write_all
        def write_all(*a, **k):
            before(manifest, "write_atomic")
            before(summary, "write_atomic")
            return orig_all(*a, **k)
        manifest.write_all = write_all
    elif point == "decisions":    # outputs written, the last ledger transaction not committed
        before(ledger.Ledger, "put_decisions")
    sys.exit(cli.main(sys.argv[2:]))
''')


def cli_run(driver: Path, point: str, config: Path, inp: Path, out: Path) -> subprocess.CompletedProcess:
    args = [sys.executable, str(driver), point, "run", str(config), "--input", str(inp),
            "--output", str(out), "--workers", "2", "--quiet"]
    return subprocess.run(args, capture_output=True, text=True, timeout=300, cwd=REPO)


def orphans(out: Path) -> list[int]:
    """Processes still running with this output folder on their command line."""
    found = []
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                if str(out).encode() in (d / "cmdline").read_bytes():
                    found.append(int(d.name))
            except OSError:
                pass
    return found


@pytest.fixture()
def driver(tmp_path) -> Path:
    p = tmp_path / "driver.py"
    p.write_text(DRIVER)
    return p


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="uses /proc and SIGKILL")
def test_kill_9_at_every_phase_then_rerun_is_lossless(corpus, config, baseline, driver, tmp_path):
    out = tmp_path / "out"
    # one output folder killed again and again, each time later in the run
    for point in ("sources:1", "in_batch:2", "outcome:15", "outcome:80", "place:20", "write_all:1",
                  "write_atomic:2", "decisions:1"):
        proc = cli_run(driver, point, config, corpus, out)
        assert proc.returncode == -signal.SIGKILL, (point, proc.returncode, proc.stderr[-2000:])
        assert (out / ".midisift.lock").exists()  # the dead run's lock is left behind
        # the workers died with their parent (PR_SET_PDEATHSIG): none lingers
        for _ in range(50):
            if not orphans(out):
                break
            time.sleep(0.1)
        assert orphans(out) == [], point
    proc = cli_run(driver, "none:0", config, corpus, out)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert snapshot(out) == baseline
    assert_clean(out)
    with Ledger(out / "state.sqlite") as led:
        assert led.db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="uses SIGKILL")
@pytest.mark.parametrize("point", ["write_atomic:2"])
def test_single_kill_then_rerun_is_lossless(corpus, config, baseline, driver, tmp_path, point):
    out = tmp_path / "out"
    assert cli_run(driver, point, config, corpus, out).returncode == -signal.SIGKILL
    if point == "write_atomic:2":  # the manifest is complete (renamed), the split lists not yet
        assert (out / "manifest.jsonl").read_bytes() == baseline["manifest.jsonl"]
        assert not (out / "splits").exists() or not list((out / "splits").glob("*.txt"))
    assert cli_run(driver, "none:0", config, corpus, out).returncode == 0
    assert snapshot(out) == baseline
    assert_clean(out)


# --- disk full and unwritable folders --------------------------------------------------------

def enospc(*_a, **_k):
    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


def test_disk_full_writing_the_manifest(corpus, config, baseline, tmp_path, monkeypatch):
    out = tmp_path / "out"
    real_replace = os.replace

    def replace(src, dst):
        if str(dst).endswith("manifest.jsonl"):
            enospc()
        return real_replace(src, dst)
    monkeypatch.setattr(os, "replace", replace)
    with pytest.raises(OutputError, match="No space left on device") as err:
        run(config, corpus, out)
    assert err.value.file == str(out / "manifest.jsonl")
    assert not (out / "manifest.jsonl").exists()
    assert not list(out.glob(".*.tmp"))  # the temporary was removed
    with Ledger(out / "state.sqlite") as led:
        assert led.last_run() is None  # the run is not recorded as complete
    monkeypatch.setattr(os, "replace", real_replace)
    run(config, corpus, out)
    assert snapshot(out) == baseline
    assert_clean(out)


def test_disk_full_in_the_ledger(corpus, config, baseline, tmp_path, monkeypatch):
    out = tmp_path / "out"
    calls = []
    monkeypatch.setattr(runner, "BATCH", 64)  # several results transactions on this small corpus

    def full(self, rows):
        calls.append(1)
        if len(calls) == 2:
            raise sqlite3.OperationalError("database or disk is full")
        return real(self, rows)
    real = Ledger.put_results
    monkeypatch.setattr(Ledger, "put_results", full)
    with pytest.raises(LedgerError, match="database or disk is full") as err:
        run(config, corpus, out)
    assert err.value.file == str(out / "state.sqlite")
    assert "check free space" in err.value.message
    assert not multiprocessing.active_children()  # the run's workers stopped with it
    monkeypatch.setattr(Ledger, "put_results", real)
    run(config, corpus, out)
    assert snapshot(out) == baseline


def test_disk_full_when_the_signatures_leave_memory(corpus, config, baseline, tmp_path, monkeypatch):
    """The corpus steps move the signature matrix to an unnamed file in the output folder
    (similarity/spilled.py); a full disk there is an OutputError naming that folder, and the
    rerun loses nothing."""
    out = tmp_path / "out"
    real = tempfile.TemporaryFile

    class Full:
        def __init__(self, *a, **k):
            self.f = real(*a, **k)
        write = staticmethod(enospc)

        def __getattr__(self, name):
            return getattr(self.f, name)

    monkeypatch.setattr(tempfile, "TemporaryFile", Full)
    with pytest.raises(OutputError, match="No space left on device") as err:
        run(config, corpus, out)
    assert err.value.file == str(out)
    assert "free space" in err.value.message
    assert not multiprocessing.active_children()
    monkeypatch.setattr(tempfile, "TemporaryFile", real)
    run(config, corpus, out)
    assert snapshot(out) == baseline
    assert_clean(out)


def test_disk_full_in_a_worker_rendering_outputs(corpus, config, baseline, tmp_path, monkeypatch):
    out = tmp_path / "out"
    real = rendering._write_staged  # how a worker writes a rendered file into the staging folder

    def write_staged(path, data, *a, **k):  # inherited by the forked workers
        if STAGING in Path(path).parts:
            raise OutputError("cannot write (No space left on device); check free space", file=str(path))
        return real(path, data, *a, **k)
    monkeypatch.setattr(rendering, "_write_staged", write_staged)
    with pytest.raises(OutputError, match="No space left") as err:
        run(config, corpus, out)
    assert STAGING in Path(err.value.file).parts
    monkeypatch.setattr(rendering, "_write_staged", real)
    run(config, corpus, out)
    assert snapshot(out) == baseline  # no file was dropped for the disk's fault


def test_output_folder_that_cannot_be_created(corpus, config, tmp_path, capsys):
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    code = cli.main(["run", str(config), "--input", str(corpus), "--output", str(blocker / "out"),
                     "--quiet"])
    err = capsys.readouterr().err
    # an output below a file is bad usage (README, Commands: exit 2, nothing written)
    assert code == 2
    assert str(blocker / "out") in err and "Traceback" not in err


def test_lock_file_that_cannot_be_created(corpus, config, tmp_path, monkeypatch):
    # chmod cannot make a folder unwritable for root (CI runs as root), so the refusal of the
    # file system is simulated where the run first writes: the lock file
    import pipeline.store.lock as lock

    def denied(path, *a, **k):
        raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(path))
    monkeypatch.setattr(lock.os, "open", denied)
    with pytest.raises(LedgerError, match="Permission denied.*writable") as err:
        run(config, corpus, tmp_path / "out")
    assert err.value.file.endswith(".midisift.lock")


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0,
                    reason="root ignores folder permissions")
def test_read_only_output_folder(corpus, config, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    out.chmod(0o500)
    try:
        with pytest.raises(LedgerError, match=str(out)):
            run(config, corpus, out)
    finally:
        out.chmod(0o700)


def hear_ctrl_c() -> None:
    """In a test's child process before it starts Python: SIGINT back to its default action.
    A suite started in the background by a non-interactive shell inherits SIGINT ignored (POSIX
    shell, "Signals": asynchronous commands ignore SIGINT), Python then leaves it ignored, and
    a run sent Ctrl-C would never hear it (the cause of this test's rare timeouts)."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)


@pytest.mark.parametrize("sig,status", [(signal.SIGINT, 130), (signal.SIGTERM, 143)])
def test_a_stopped_run_keeps_its_finished_work(corpus, tmp_path, sig, status):
    """Ctrl-C or SIGTERM mid-run: the results and rendered outputs that workers finished are
    saved, so the rerun computes only what was left (plus nothing else), and ends with the same
    outputs as an uninterrupted run. Exit status 128 + signal, as shells report (POSIX
    shell "Exit Status"; common practice for command-line tools)."""
    out = tmp_path / "out"
    config = REPO / "configs" / "default.yaml"  # timeout_s 60: no hang times out in the test
    # the files from f000100 on hang, so the run is still in its per-file pass when stopped
    # PYTHONFAULTHANDLER: a run that does not stop dumps its threads' stacks on SIGABRT below
    env = {**os.environ, FAULT_ENV: "hang:f0001", "PYTHONFAULTHANDLER": "1"}
    proc = subprocess.Popen([sys.executable, "-m", "pipeline.cli", "run", str(config), "--input",
                             str(corpus), "--output", str(out), "--quiet", "--workers", "2"],
                            cwd=REPO, env=env, stderr=subprocess.PIPE, text=True,
                            preexec_fn=hear_ctrl_c)
    db = out / "state.sqlite"
    staging = out / STAGING
    rendered = 0  # workers write their renders at once; the ledger is written every 2 s
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and rendered < COUNT // 4:
        time.sleep(0.1)
        rendered = len(list(staging.glob("*.mid"))) if staging.is_dir() else 0
    assert rendered >= COUNT // 4, "the run did not get going"
    time.sleep(0.5)  # the files in flight before the hanging ones come back
    proc.send_signal(sig)
    try:
        _, err = proc.communicate(timeout=60)
    except subprocess.TimeoutExpired:  # say where the run waits
        proc.send_signal(signal.SIGABRT)
        _, err = proc.communicate(timeout=30)
        pytest.fail(f"the run did not stop within 60 s of signal {sig}; its stacks:\n{err[-8000:]}")
    assert proc.returncode == status, err
    assert "finished work is saved" in err
    with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as con:
        saved = con.execute("SELECT count(*) FROM results WHERE stage='validate'").fetchone()[0]
    report = run(config, corpus, out)
    run(config, corpus, tmp_path / "uninterrupted")
    contents = report.computed + report.cached
    assert report.cached >= saved >= rendered
    assert report.computed <= contents - saved
    assert snapshot(out) == snapshot(tmp_path / "uninterrupted")
    assert_clean(out)

