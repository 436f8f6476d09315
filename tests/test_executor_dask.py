"""The Dask executor (pipeline/executor_dask.py) against the local executor, on a real
``distributed.LocalCluster`` of 2 worker processes bound to 127.0.0.1 (one cluster for the module).

The reference is the local executor (pipeline/executor.py) on the same corpus and config: a run
through the cluster must write the same bytes (manifest, split lists, normalized MIDI, the
decision trails in the ledger). Corpora are made by ``midisift synth``.
"""
from __future__ import annotations

import io
import os
import re
import socket
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

distributed = pytest.importorskip("distributed")
import dask  # noqa: E402

from pipeline.engine import executor_dask  # noqa: E402
from pipeline.cli import main  # noqa: E402
from pipeline.config import parse_config  # noqa: E402
from pipeline.errors import ConfigError, ConfigErrors  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
#: Written by every run, never compared: timings (summary.json, report.html) and the ledger
#: itself (its decisions table is compared row by row).
NOT_COMPARED = {"state.sqlite", "state.sqlite-wal", "state.sqlite-shm", "summary.json", "report.html"}


@pytest.fixture(scope="module")
def cluster():
    # allowed-failures 0: a task whose worker dies is given up at once (the default, 3, would
    # kill up to four workers per chunk in the killed-worker test; same path, more restarts)
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                      host="127.0.0.1", dashboard_address=None,
                                      silence_logs=40) as cl:
            with distributed.Client(cl, set_as_default=False) as client:
                yield cl.scheduler_address, client


@pytest.fixture(scope="module")
def corpus(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("dask") / "corpus"
    assert main(["synth", str(folder), "--count", "200", "--seed", "11"]) == 0
    return folder


def _config(tmp: Path, **validate: object) -> Path:
    opts = {"max_bytes": 16000000, "max_events": 2000000, **validate}
    text = (ROOT / "configs" / "default.yaml").read_text().replace(
        "validate:   {max_bytes: 16000000, max_events: 2000000}",
        "validate:   {" + ", ".join(f"{k}: {v}" for k, v in opts.items()) + "}")
    assert text != (ROOT / "configs" / "default.yaml").read_text() or not validate
    path = tmp / "config.yaml"
    path.write_text(text)
    return path


def _run(config: Path, inp: Path, out: Path, *extra: str) -> int:
    return main(["run", str(config), "--input", str(inp), "--output", str(out), "--quiet",
                 "--workers", "2", *extra])


def _files(out: Path) -> dict[str, bytes]:
    return {str(p.relative_to(out)): p.read_bytes() for p in sorted(out.rglob("*"))
            if p.is_file() and p.name not in NOT_COMPARED}


def _decisions(out: Path) -> list[tuple]:
    with sqlite3.connect(out / "state.sqlite") as db:
        return db.execute("SELECT * FROM decisions ORDER BY 1").fetchall()


def _assert_same(a: Path, b: Path) -> None:
    fa, fb = _files(a), _files(b)
    assert sorted(fa) == sorted(fb)
    assert [k for k in fa if fa[k] != fb[k]] == []
    assert _decisions(a) == _decisions(b)


def _manifest(out: Path) -> dict[str, dict]:
    import json
    rows = [json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines() if line]
    return {r["source"]: r for r in rows}


def _set_worker_env(client, name: str, value: str | None) -> None:
    """Set (or, with None, remove) an environment variable in every Dask worker process."""
    def setenv(name: str, value: str | None) -> None:  # a local function: pickled by value
        import os
        if value is None:
            os.environ.pop(name, None)
        else:
            os.environ[name] = value
    client.run(setenv, name, value)


class _Terminal(io.StringIO):
    """stderr as a terminal, so the runner draws its progress bars into it."""

    def isatty(self) -> bool:
        return True


def _bars(config: Path, inp: Path, out: Path, executor: str | None) -> list[tuple[str, str, str]]:
    """Run; the bars that ended at 100%, as (name, count, total)."""
    from pipeline.config import load_config
    from pipeline.engine.runner import Runner
    cfg = load_config(config, input=str(inp), output=str(out), workers="2", executor=executor)
    err, old = _Terminal(), sys.stderr
    sys.stderr = err
    try:
        Runner(cfg).run()
    finally:
        sys.stderr = old
    # (bar name, count, total) of each bar drawn at 100%; a bar redrawn at its end counts once
    return sorted(set(re.findall(r"([A-Za-z_]+(?: \(corpus\))?)\s*: 100%\|[^|]*\| (\d+)/(\d+)",
                                 err.getvalue())))


def test_a_cluster_run_writes_the_same_bytes_and_bars_as_a_local_run(cluster, corpus, tmp_path):
    address, _ = cluster
    config = _config(tmp_path)
    local = _bars(config, corpus, tmp_path / "local", None)
    remote = _bars(config, corpus, tmp_path / "dask", address)
    _assert_same(tmp_path / "local", tmp_path / "dask")
    assert len(list((tmp_path / "dask" / "midi").rglob("*.mid"))) > 50  # outputs were rendered
    # every bar of the local run ends the same way (name, 100%, count) through the cluster
    names = [b[0] for b in local]
    assert remote == local and {"validate", "dedup", "dedup (corpus)"} <= set(names), (local, remote)


def test_faults_in_a_file_map_as_locally(cluster, corpus, tmp_path, monkeypatch):
    """A file whose process crashes (SIGSEGV) -> decoder_crash, one that hangs -> timeout,
    one that allocates without bound -> too_large: the same verdicts and sentences."""
    address, client = cluster
    files = sorted(p.relative_to(corpus).as_posix() for p in corpus.rglob("*.mid"))
    crash, hang, alloc = files[3], files[50], files[120]
    hook = f"crash:{crash};hang:{hang};alloc:{alloc}"
    config = _config(tmp_path, timeout_s=2, max_memory_mb=256)
    monkeypatch.setenv("MIDISIFT_FAULT", hook)
    _set_worker_env(client, "MIDISIFT_FAULT", hook)
    try:
        assert _run(config, corpus, tmp_path / "local") == 0
        assert _run(config, corpus, tmp_path / "dask", "--executor", address) == 0
    finally:
        _set_worker_env(client, "MIDISIFT_FAULT", None)
    rows = _manifest(tmp_path / "dask")
    assert rows[crash]["reason"] == "decoder_crash"
    assert rows[hang]["reason"] == "timeout"
    assert rows[alloc]["reason"] == "too_large"
    _assert_same(tmp_path / "local", tmp_path / "dask")


def test_an_incremental_rerun_through_the_cluster(cluster, tmp_path):
    address, _ = cluster
    inp = tmp_path / "in"
    assert main(["synth", str(inp), "--count", "80", "--seed", "12"]) == 0
    config = _config(tmp_path)
    assert _run(config, inp, tmp_path / "local") == 0
    assert _run(config, inp, tmp_path / "dask", "--executor", address) == 0
    assert main(["synth", str(inp / "more"), "--count", "6", "--seed", "13"]) == 0
    from pipeline.config import load_config
    from pipeline.engine.runner import Runner
    assert _run(config, inp, tmp_path / "local") == 0
    cfg = load_config(config, input=str(inp), output=str(tmp_path / "dask"), executor=address)
    report = Runner(cfg, quiet=True).run()
    assert report.computed == 6  # only the new files went to the cluster
    _assert_same(tmp_path / "local", tmp_path / "dask")


def test_an_unreachable_scheduler_stops_the_run_before_anything_is_written(
        corpus, tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(executor_dask, "CONNECT_TIMEOUT_S", 1.0)
    with socket.socket() as s:  # a port of this machine on which nothing listens
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    out = tmp_path / "out"
    assert _run(_config(tmp_path), corpus, out, "--executor", f"tcp://127.0.0.1:{port}") == 1
    assert "cannot reach the Dask scheduler" in capsys.readouterr().err
    assert not out.exists()


def test_an_address_where_another_service_answers_is_an_error_in_bounded_time(
        corpus, tmp_path, monkeypatch, capsys):
    """Found by an audit: at the port of an HTTP server ``distributed.Client`` waited without
    end, its own timeout notwithstanding. Here a standard-library HTTP server answers."""
    import http.server
    import threading
    import time
    monkeypatch.setattr(executor_dask, "CONNECT_TIMEOUT_S", 1.0)
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), http.server.BaseHTTPRequestHandler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        out = tmp_path / "out"
        start = time.monotonic()
        assert _run(_config(tmp_path), corpus, out, "--executor",
                    f"tcp://127.0.0.1:{server.server_address[1]}") == 1
        assert time.monotonic() - start < 30  # bounded: 1 s and the margin, far below any hang
        err = capsys.readouterr().err
        assert "cannot reach the Dask scheduler" in err and "another service" in err
        assert not out.exists()
    finally:
        server.shutdown()  # the handler threads (waiting on the client) are daemons
        server.server_close()


def test_a_workers_address_is_refused_as_not_a_scheduler(cluster, corpus, tmp_path, capsys):
    """Found by an audit: a Dask worker's address ended in two tracebacks of Dask's own."""
    _, client = cluster
    worker = sorted(client.scheduler_info()["workers"])[0]
    out = tmp_path / "out"
    assert _run(_config(tmp_path), corpus, out, "--executor", worker) == 1
    err = capsys.readouterr().err
    assert "answers, but not as a Dask scheduler" in err and "not a worker's" in err and "Traceback" not in err
    assert not out.exists()


def test_workers_of_another_version_are_refused(cluster, corpus, tmp_path, capsys):
    address, client = cluster

    def set_version(v: str) -> None:
        import pipeline
        pipeline.__version__ = v

    import pipeline
    client.run(set_version, "0.0.0-other")
    try:
        out = tmp_path / "out"
        assert _run(_config(tmp_path), corpus, out, "--executor", address) == 1
    finally:
        client.run(set_version, pipeline.__version__)
    err = capsys.readouterr().err
    assert "another midisift version" in err and "0.0.0-other" in err
    assert not out.exists()


def test_the_shared_folder_check_names_what_a_worker_does_not_see(tmp_path):
    """The function each worker runs for ``check_shared`` (here in this process)."""
    probe = tmp_path / "probe"
    probe.write_text("token")
    assert executor_dask._worker_sees(str(tmp_path), str(probe), "token") == ""
    assert "no folder" in executor_dask._worker_sees(str(tmp_path / "elsewhere"), str(probe), "token")
    assert "other content" in executor_dask._worker_sees(str(tmp_path), str(probe), "another")
    assert "cannot read" in executor_dask._worker_sees(str(tmp_path), str(tmp_path / "gone"), "token")


def test_the_shared_folder_check_reads_input_files_as_the_client_does(tmp_path):
    """Found by an audit: a worker given an empty folder, or a stale copy of the input under the
    same path, passed a check of the folder alone, and the run dropped most of the corpus as
    unreadable or changed during the run. A few input files must hold the client's bytes."""
    inp = tmp_path / "in"
    for rel in ("a/1.mid", "a/2.MID", "b/3.midi", "b/4.mid", "b/notes.txt", "c/5.mid"):
        (inp / rel).parent.mkdir(parents=True, exist_ok=True)
        (inp / rel).write_bytes(rel.encode())
    samples = executor_dask.input_samples(str(inp))
    # the first and last MIDI file of each folder in sorted walk order, up to SAMPLE_FILES
    assert [Path(p).relative_to(inp).as_posix() for p, _ in samples] == ["a/1.mid", "a/2.MID", "b/3.midi", "b/4.mid"]
    probe = tmp_path / "probe"
    probe.write_text("token")
    assert executor_dask._worker_sees(str(inp), str(probe), "token", samples) == ""
    (inp / "b" / "3.midi").write_bytes(b"other bytes")  # a stale copy on the worker
    why = executor_dask._worker_sees(str(inp), str(probe), "token", samples)
    assert "3.midi" in why and "holds other bytes" in why and socket.gethostname() in why
    (inp / "a" / "1.mid").unlink()  # an empty folder of that name on the worker
    assert "cannot read the input file" in executor_dask._worker_sees(str(inp), str(probe), "token", samples)


def test_a_failed_shared_folder_check_leaves_no_output_folder(cluster, corpus, tmp_path, monkeypatch, capsys):
    """Found by an audit: the output folder was made before the check, and left empty."""
    address, _ = cluster

    def not_shared(self, input_folder: str, output_folder: str) -> None:
        raise executor_dask.MidisiftError("Dask workers do not share this machine's folders (test)",
                                          location=self.address)

    monkeypatch.setattr(executor_dask.DaskExecutor, "check_shared", not_shared)
    out = tmp_path / "new" / "out"
    assert _run(_config(tmp_path), corpus, out, "--executor", address) == 1
    assert "do not share" in capsys.readouterr().err and not out.exists()


def test_executor_values_are_checked_with_the_other_config_errors():
    base = {"input": "in", "output": "out", "stages": ["validate"]}
    assert parse_config({**base, "executor": "tcp://127.0.0.1:8786"}).executor == "tcp://127.0.0.1:8786"
    assert parse_config(base).executor == "local"
    for bad in ("dask", "tcp://host", "tcp://host:0", "tcp://host:70000", "http://h:1", 5):
        with pytest.raises(ConfigError, match="executor must be 'local' or a Dask scheduler"):
            parse_config({**base, "executor": bad})
    with pytest.raises(ConfigErrors) as e:
        parse_config({**base, "executor": "tcp://x", "workers": 0})
    assert {p.location for p in e.value.problems} == {"executor", "workers"}


def test_a_local_run_does_not_import_dask(tmp_path):
    code = ("import sys; from pipeline.cli import main; "
            f"rc = main(['run', {str(ROOT / 'configs' / 'default.yaml')!r}, '--input', "
            f"{str(ROOT / 'sample_corpus')!r}, '--output', {str(tmp_path / 'o')!r}, '--quiet', "
            "'--workers', '1']); "
            "print(rc, sorted(m for m in ('dask', 'distributed', 'pipeline.engine.executor_dask') "
            "if m in sys.modules))")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=tmp_path)
    assert proc.stdout.split("\n")[-2] == "0 []", proc.stdout + proc.stderr


def test_a_dask_worker_killed_mid_run(cluster, corpus, tmp_path, monkeypatch):
    """A Dask worker process that dies (here: SIGKILL by the module's test hook, before the
    chunk holding one file) loses its chunk; the chunk is retried file by file, and the file
    whose own retry kills a worker again is a decoder_crash. Every other row is the local run's.
    (Last in the module: workers restarted meanwhile still carry the hook until it is cleared.)"""
    address, client = cluster
    files = sorted(p.relative_to(corpus).as_posix() for p in corpus.rglob("*.mid"))
    victim = files[77]
    config = _config(tmp_path)
    assert _run(config, corpus, tmp_path / "local") == 0
    monkeypatch.setenv(executor_dask.WORKER_FAULT_ENV, victim)  # for workers the nannies restart
    _set_worker_env(client, executor_dask.WORKER_FAULT_ENV, victim)
    try:
        assert _run(config, corpus, tmp_path / "dask", "--executor", address) == 0
    finally:
        monkeypatch.delenv(executor_dask.WORKER_FAULT_ENV)
        client.wait_for_workers(2, timeout=60)
        _set_worker_env(client, executor_dask.WORKER_FAULT_ENV, None)
    local, dask_rows = _manifest(tmp_path / "local"), _manifest(tmp_path / "dask")
    assert dask_rows[victim]["reason"] == "decoder_crash"
    assert "died again when the file was retried alone" in dask_rows[victim]["detail"]
    assert local[victim]["status"] == "kept" or local[victim]["reason"] != "decoder_crash"
    # the per-file measures of every other content are the local run's (dedup and split may
    # decide differently around the missing file, and its byte-identical copies share its verdict)
    keys = ("sha256", "title", "tonic", "mode", "key_confidence", "meter", "meter_source",
            "transpose", "duration_s", "notes")
    others = [s for s in files if local[s]["sha256"] != local[victim]["sha256"]]
    assert len(others) >= len(files) - 3
    for src in others:
        assert {k: local[src][k] for k in keys} == {k: dask_rows[src][k] for k in keys}, (src, dask_rows[src]['reason'], dask_rows[src]['detail'])
