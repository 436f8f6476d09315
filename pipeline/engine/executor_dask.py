"""Runs the per-file tasks on a Dask cluster (``executor: tcp://HOST:PORT``).

Imported only when a run names a scheduler: a local run never imports dask.

The work unit sent to the cluster is a *chunk* of tasks. On the Dask worker, a chunk runs
through the same supervised pool as a local run (``executor.run_tasks`` with one forked child
process per chunk), so every per-file fault maps exactly as locally, with the same sentences:

- a file whose child process dies (a crash in the decoder) -> ``decoder_crash``;
- a file over ``timeout_s`` -> ``timeout`` (its child is killed; the Dask worker lives on);
- a file over ``max_memory_mb`` -> ``too_large``: the limit is the child's address space
  (RLIMIT_AS) above its size when forked from the Dask worker, as locally. It is per file and
  independent of Dask's own ``--memory-limit`` of a worker (which watches the worker process,
  not its children).

A Dask worker process that dies (killed, out of memory at the host, a node lost) loses its
chunks; the scheduler hands them to other workers (its ``allowed-failures`` rule, 3 by
default). A chunk the scheduler gives up on (``KilledWorker``) is retried file by file, each
file alone on the cluster (nothing else in flight, so a worker that dies then died on that
file), and a file whose lone retry kills a worker again is a ``decoder_crash``: a worker that
dies on a file gives ``decoder_crash`` for that file after one retry.

Workers read the input files and write the normalized outputs by path: the input and output
folders must be the same paths on every worker (a shared filesystem). Relative paths are taken
from the client's working folder, which must exist on the workers too. ``connect`` checks that
the scheduler answers and that every worker runs this midisift version; ``check_shared`` checks
that each worker sees the input folder, a few of its files with the client's bytes, and a file
the client just wrote in the output folder.
"""
from __future__ import annotations

import math
import os
import secrets
import signal
import socket
import threading
from collections import deque
from typing import Any, Callable, Iterable, Iterator, TypeVar

from .. import __version__
from ..errors import MidisiftError
from .executor import Fault, Limits, run_tasks

T = TypeVar("T")
R = TypeVar("R")

#: Seconds to reach the scheduler, and to wait for its first worker.
CONNECT_TIMEOUT_S = 10.0
WORKERS_TIMEOUT_S = 30.0
#: Most tasks in one chunk; fewer when a run has few tasks per worker thread (so every thread
#: gets several chunks and the last ones finish together).
CHUNK_MAX = 200
#: Chunks in flight per worker thread: the client submits more as chunks finish, so neither
#: the client nor the scheduler holds a future per chunk of a ten-million-file run.
IN_FLIGHT_PER_THREAD = 3
#: Test hook of this module (off unless set in a Dask worker's environment): the Dask worker
#: process kills itself (SIGKILL) before running a chunk that holds a task whose ``source``
#: contains this text. Used by tests/test_executor_dask.py; never in production.
WORKER_FAULT_ENV = "MIDISIFT_DASK_FAULT"


def _dask_missing() -> MidisiftError:
    return MidisiftError("the Dask executor needs dask.distributed, which is not installed; "
                         "install it with: pip install 'midisift[dask]' (or '.[dask]' from the "
                         "source folder)")


class DaskExecutor:
    """A connection to a Dask scheduler that runs per-file tasks like ``executor.run_tasks``."""

    def __init__(self, address: str, client: Any):
        self.address = address
        self.client = client

    # set-up -------------------------------------------------------------------------------
    @classmethod
    def connect(cls, address: str) -> "DaskExecutor":
        """Reach the scheduler, wait for a worker, check every worker's midisift version.
        Raises ``MidisiftError`` (exit 1) naming the address when any of it fails."""
        try:
            from distributed import Client
        except ImportError:
            raise _dask_missing() from None
        try:
            client = _client_within(Client, address, CONNECT_TIMEOUT_S)
        except (OSError, TimeoutError) as e:
            raise MidisiftError(f"cannot reach the Dask scheduler ({type(e).__name__}: {e}); start "
                                "one with 'dask scheduler' and workers with 'dask worker ADDRESS', "
                                "or check the address and the firewall", location=address) from None
        except Exception as e:  # noqa: BLE001 - e.g. a Dask worker's address, which answers otherwise
            raise _not_a_scheduler(address, e) from None
        ex = cls(address, client)
        try:
            client.wait_for_workers(1, timeout=WORKERS_TIMEOUT_S)
            ex.check_versions()
        except (OSError, TimeoutError):
            ex.close()
            raise MidisiftError(f"the Dask scheduler has no workers after {WORKERS_TIMEOUT_S:g} s; "
                                "start some with 'dask worker ADDRESS'", location=address) from None
        except MidisiftError:
            ex.close()
            raise
        except Exception as e:  # noqa: BLE001 - as above
            ex.close()
            raise _not_a_scheduler(address, e) from None
        return ex

    def check_versions(self) -> None:
        """Every worker must import this midisift version (a worker with another version would
        compute other results under the same cache keys)."""
        seen = self.client.run(_worker_version)
        other = {addr: v for addr, v in seen.items() if v != __version__}
        if other:
            listed = ", ".join(f"{a} runs {v}" for a, v in sorted(other.items())[:5])
            raise MidisiftError(f"Dask workers run another midisift version than this client "
                                f"({__version__}): {listed}; install the same version on every "
                                "worker and restart them", location=self.address)

    def check_shared(self, input_folder: str, output_folder: str) -> None:
        """Every worker must see the input folder and the output folder as this process does:
        a probe file written here must be read back, with the same content, by each worker, and
        a few input files must hold there the bytes they hold here (an audit: a worker given an
        empty folder, or a stale copy, at the input path passed a check of the folder alone,
        and the run dropped three quarters of the corpus as unreadable or changed)."""
        token = secrets.token_hex(16)
        output_folder = os.path.abspath(output_folder)
        samples = input_samples(os.path.abspath(input_folder))
        probe = os.path.join(output_folder, f".midisift-probe-{token}")
        with open(probe, "w", encoding="ascii") as fh:
            fh.write(token)
        try:
            seen = self.client.run(_worker_sees, os.path.abspath(input_folder), probe, token, samples)
        finally:
            os.unlink(probe)
        bad = {addr: why for addr, why in seen.items() if why}
        if bad:
            listed = "; ".join(f"{a}: {w}" for a, w in sorted(bad.items())[:5])
            raise MidisiftError(f"Dask workers do not share this machine's folders ({listed}); "
                                "the input and output folders must be the same paths on every "
                                "worker (a shared filesystem)", location=self.address)

    def threads(self) -> int:
        """Worker threads of the cluster now (each runs one chunk at a time)."""
        info = self.client.scheduler_info(n_workers=-1) if _takes_n_workers(self.client) \
            else self.client.scheduler_info()
        return max(1, sum(w.get("nthreads", 1) for w in info.get("workers", {}).values()))

    def close(self) -> None:
        try:
            self.client.close()
        except Exception:  # noqa: BLE001 - closing a broken connection must not hide the real error
            pass

    # running ------------------------------------------------------------------------------
    def run_tasks(self, fn: Callable[[T], R], tasks: Iterable[T], *, limits: Limits,
                  on_fault: Callable[[T, Fault], R]) -> Iterator[R]:
        """Yield one outcome per task, in completion order, as ``executor.run_tasks`` does."""
        from distributed import as_completed
        tasks = list(tasks)
        if not tasks:
            return
        threads = self.threads()
        size = max(1, min(CHUNK_MAX, math.ceil(len(tasks) / (threads * 4))))
        pending = deque(tasks[i:i + size] for i in range(0, len(tasks), size))
        window = threads * IN_FLIGHT_PER_THREAD
        retries: deque = deque()  # tasks of chunks lost with their worker, each retried alone
        cwd = os.getcwd()
        in_flight: dict[Any, tuple[list, bool]] = {}  # future -> (its tasks, a lone retry)
        done = as_completed([], loop=self.client.loop)

        def submit(chunk: list, retry: bool) -> None:
            fut = self.client.submit(_run_chunk, fn, chunk, limits, on_fault, cwd, __version__,
                                     pure=False)
            in_flight[fut] = (chunk, retry)
            done.add(fut)

        def refill() -> None:
            # a retry runs when nothing else does, so a worker that dies then died on its file
            if retries:
                if not in_flight:
                    submit([retries.popleft()], True)
                return
            while pending and len(in_flight) < window:
                submit(pending.popleft(), False)

        refill()
        try:
            for fut in done:
                chunk, retry = in_flight.pop(fut)
                status = fut.status
                if status != "finished":
                    exc = fut.exception() if status == "error" else None
                    fut.release()
                    if exc is None and status in ("lost", "pending"):
                        # its result was on a worker that died after the chunk finished (the
                        # scheduler would compute it again): the chunk is sent again
                        submit(chunk, retry)
                        continue
                    if exc is None:
                        raise MidisiftError(f"a Dask task was {status} (the scheduler restarted "
                                            "or lost it); rerun to continue", location=self.address)
                    if not _killed_worker(exc):
                        raise MidisiftError(f"a Dask task failed: {type(exc).__name__}: {exc}",
                                            location=self.address)
                    if retry:  # the file's own retry killed a worker again
                        yield on_fault(chunk[0], Fault(
                            "decoder_crash", "the Dask worker process running this file died, "
                            "and died again when the file was retried alone; rerun with "
                            "--retry-failed to try again"))
                    else:
                        retries.extend(chunk)
                    refill()
                    continue
                kind, payload = fut.result()
                fut.release()
                if kind == "version":
                    raise MidisiftError(f"a Dask worker runs midisift {payload}, this client "
                                        f"{__version__}; install the same version on every worker",
                                        location=self.address)
                if kind == "abort":  # an error of the environment, as executor.run_tasks raises it
                    from . import errors
                    name, reason, file, location = payload
                    raise getattr(errors, name, MidisiftError)(reason, file=file, location=location)
                refill()
                yield from payload
        finally:
            for fut in list(in_flight):
                fut.cancel()
            in_flight.clear()


def _not_a_scheduler(address: str, e: BaseException) -> MidisiftError:
    return MidisiftError(f"the address answers, but not as a Dask scheduler ({type(e).__name__}: {e}); "
                         "give the scheduler's address ('dask scheduler' prints it, tcp://HOST:8786 "
                         "by default), not a worker's", location=address)


#: Seconds a connection may take beyond ``CONNECT_TIMEOUT_S`` before it is given up.
CONNECT_MARGIN_S = 2.0


def _client_within(client_class: Any, address: str, seconds: float) -> Any:
    """``client_class(address)`` (a ``distributed.Client``), made in a thread of its own and
    given up after ``seconds`` plus ``CONNECT_MARGIN_S`` (an audit: an address where another
    service answers, an HTTP server, kept ``Client`` waiting without end, its own timeout
    notwithstanding); a ``TimeoutError`` then, or the error the connection raised."""
    box: dict[str, Any] = {}

    def connect() -> None:
        try:
            box["client"] = client_class(address, timeout=f"{seconds}s", set_as_default=False)
        except BaseException as e:  # noqa: BLE001 - handed to the caller's thread
            box["error"] = e

    thread = threading.Thread(target=connect, name="midisift-dask-connect", daemon=True)
    thread.start()
    thread.join(seconds + CONNECT_MARGIN_S)
    if thread.is_alive():
        raise TimeoutError(f"no answer as a Dask scheduler within {seconds + CONNECT_MARGIN_S:g} s "
                           "(is another service listening there?)")
    if "error" in box:
        raise box["error"]
    return box["client"]


def _takes_n_workers(client: Any) -> bool:
    import inspect
    return "n_workers" in inspect.signature(client.scheduler_info).parameters


def _killed_worker(exc: BaseException | None) -> bool:
    try:
        from distributed.scheduler import KilledWorker
    except ImportError:  # pragma: no cover
        return False
    return isinstance(exc, KilledWorker)


# ---------------------------------------------------------------------------------------------
# the Dask worker side

def _worker_version() -> str:
    from .. import __version__ as v
    return v


#: Input files whose bytes every worker must read as the client does (``input_samples``).
SAMPLE_FILES = 4


def input_samples(input_folder: str, count: int = SAMPLE_FILES) -> list[tuple[str, str]]:
    """(path, sha256) of up to ``count`` input files: the first and the last MIDI file of each
    folder in walk order (folders sorted) until ``count`` are found, without listing the whole
    tree (the run lists it next)."""
    from ..store.atomic import file_sha256
    from .sources import MIDI_SUFFIXES
    found: list[str] = []
    for root, dirs, files in os.walk(input_folder):
        dirs.sort()
        midi = sorted(f for f in files if f.lower().endswith(MIDI_SUFFIXES))
        found += [os.path.join(root, f) for f in (midi[:1] + midi[-1:] if len(midi) > 1 else midi)]
        if len(found) >= count:
            break
    out = []
    for path in found[:count]:
        try:
            out.append((path, file_sha256(path)))
        except OSError:  # unreadable here too: the run says so for that file
            continue
    return out


def _worker_sees(input_folder: str, probe: str, token: str, samples: list[tuple[str, str]] = ()) -> str:
    """'' when this worker sees the input folder, reads ``token`` from ``probe`` and each of
    ``samples`` (path, sha256) with the client's bytes; else why."""
    host = socket.gethostname()
    if not os.path.isdir(input_folder):
        return f"no folder {input_folder} on host {host}"
    from ..store.atomic import file_sha256
    for path, digest in samples:
        try:
            if file_sha256(path) != digest:
                return f"{path} on host {host} holds other bytes than on the client (a copy of the input folder?)"
        except OSError as e:
            return f"cannot read the input file {path} on host {host} ({e.strerror})"
    try:
        with open(probe, encoding="ascii") as fh:
            if fh.read() != token:
                return f"{probe} on host {host} holds other content (another folder of that name)"
    except OSError as e:
        return f"cannot read {probe} on host {host} ({e.strerror})"
    return ""


class _InFolder:
    """``fn`` run from the client's working folder (relative task paths resolve as there).
    Called only in the forked child, so the Dask worker's own working folder is untouched."""

    def __init__(self, cwd: str, fn: Callable):
        self.cwd, self.fn = cwd, fn
        self.moved = False

    def __call__(self, task: Any) -> Any:
        if not self.moved:
            os.chdir(self.cwd)
            self.moved = True
        return self.fn(task)


def _run_chunk(fn: Callable, chunk: list, limits: Limits, on_fault: Callable, cwd: str,
               version: str) -> tuple[str, Any]:
    """One chunk on a Dask worker: ('ok', outcomes), ('version', this worker's version) or
    ('abort', (error class, reason, file, location)) for an error of the environment."""
    from .. import __version__ as mine
    if mine != version:
        return "version", mine
    fault = os.environ.get(WORKER_FAULT_ENV)
    if fault and any(fault in str(getattr(t, "source", t)) for t in chunk):
        os.kill(os.getpid(), signal.SIGKILL)
    import multiprocessing
    # A Dask worker under a nanny is a daemonic process, which multiprocessing forbids to start
    # children (they could outlive it). Ours cannot: each dies with its parent (PR_SET_PDEATHSIG
    # in executor._worker_main) and is stopped when the chunk ends.
    me = multiprocessing.current_process()
    if me.daemon:
        me.daemon = False
    _warm(chunk)
    from ..errors import DecodeError
    try:
        return "ok", list(run_tasks(_InFolder(cwd, fn), chunk, 1, limits=limits, on_fault=on_fault))
    except MidisiftError as e:
        if isinstance(e, DecodeError):
            raise
        return "abort", (type(e).__name__, e.reason, e.file, e.location)


def _warm(chunk: list) -> None:
    """Import the stage modules a chunk needs in the Dask worker before its child is forked,
    so each child inherits them instead of importing them again."""
    from ..stages import stage_class
    for t in chunk[:1]:
        for plan in getattr(t, "stages", ()):
            stage_class(plan.name)
