"""Runs per-file tasks in supervised worker processes, so one bad file never stops a run.

The contract between the runner and a worker is plain data: a task in, an outcome out (dicts,
strings and numpy arrays; no database handle, no shared memory, no global settings), so another
engine (e.g. a distributed one) can take the same tasks.

The pool is small and watched. Each of N worker processes (fork on Linux, spawn elsewhere) is
fed tasks over its own pipe, at most ``PREFETCH`` queued, several in one message once half of
them are answered, and computes them in order, replying to each task on its own; a task's
clock starts when the reply to the one before it arrives. The parent waits on the pipes
and the process sentinels with a timeout equal to the nearest deadline, and turns every way a
task can go wrong into a ``Fault`` for that task instead of an exception:

=================  ===========================================================================
``timeout``        the task ran longer than ``Limits.timeout_s``: the worker is killed
``too_large``      the task raised ``MemoryError`` under the worker's address-space limit
                   (``Limits.max_memory_mb`` above the worker's size at start, RLIMIT_AS)
``decoder_crash``  the worker died (a signal such as SIGSEGV from a C extension, ``os._exit``)
                   or the task raised an unexpected exception (the innermost frame is named)
=================  ===========================================================================

A dead or killed worker is replaced by a fresh one, the tasks queued behind the failed one are
sent again, and the run goes on. ``on_fault(task, fault)`` turns a fault into the caller's
outcome type (the runner caches it as a drop, which is what stops a bad file from being retried
on every rerun). Errors of the environment (``OutputError``, ``LedgerError``: disk full, an
unwritable folder) are not the file's fault: they stop the run with their message in the parent.

Workers hold no database handle: a forked worker first turns every regular file it inherited
open (the parent's SQLite files) into /dev/null, and it only runs ``fn`` and
leaves through ``os._exit``, so no SQLite finalizer runs in it. Workers also drop their copy of
the run's lock (``pipeline.store.lock``), ignore SIGINT (the parent handles Ctrl-C and stops them), and
on Linux die with the parent (``PR_SET_PDEATHSIG``), so a killed run leaves no worker behind.
The results are the same for 1 and N workers: each task is computed alone, in a fresh state.
"""
from __future__ import annotations

import contextlib
import gc
import math
import multiprocessing as mp
import os
import select
import selectors
import signal
import stat
import sys
import time
import traceback
from collections import deque
from dataclasses import dataclass
from multiprocessing.connection import Connection
from typing import Any, Callable, Iterable, Iterator, TypeVar

T = TypeVar("T")
R = TypeVar("R")

#: Most tasks queued per worker (one running, the others waiting in its pipe), so workers
#: keep busy while the parent commits a batch (DEVELOPERS.md, Bench notes). A worker's queue is
#: topped up once it is down to half of this, all the missing tasks in one message: one pickle
#: of the stage plans the tasks share, and one write, for several tasks.
PREFETCH = 8
#: Seconds given to a worker to leave after its pipe is closed, before it is killed.
_GRACE_S = 2.0
#: Longest wait for replies. A signal whose low-level handler ran outside the wait (in another
#: thread, or just before the wait began) does not end it, and Python acts on the signal only
#: once the main thread runs again: so Ctrl-C is acted on within this, not at a task's timeout.
_LONGEST_WAIT_S = 1.0


@dataclass(frozen=True)
class Limits:
    """Per-task limits: wall-clock seconds and memory (MB) above the worker's size at start;
    the defaults set none. ``owner`` names where a user sets them (a stage), for the sentences."""

    timeout_s: float = math.inf
    max_memory_mb: int | None = None
    owner: str = ""

    def option(self, name: str) -> str:
        """How the config names one of the limits, e.g. ``validate.timeout_s``."""
        return f"{self.owner}.{name}" if self.owner else name


@dataclass(frozen=True)
class Fault:
    """Why a task produced no result: a reason code and one sentence naming the limit or signal."""

    reason: str  # "timeout" | "too_large" | "decoder_crash"
    detail: str


#: Test hook (read once per worker, off unless set): ``MIDISIFT_FAULT="kind:text[;kind:text]"``
#: makes a worker misbehave on every task whose ``source`` contains ``text``. Kinds: ``crash``
#: (SIGSEGV, as a faulty C extension), ``abort`` (SIGABRT), ``exit`` (``os._exit(70)``),
#: ``hang`` (sleeps), ``loop`` (busy loop), ``alloc`` (allocates without bound), ``raise``
#: (RuntimeError). Used by tests/test_faults.py and for demonstrations; never in production.
FAULT_ENV = "MIDISIFT_FAULT"
FAULT_KINDS = ("crash", "abort", "exit", "hang", "loop", "alloc", "raise")


def parse_fault_hook(value: str) -> tuple[tuple[str, str], ...]:
    """``"crash:a.mid;hang:b"`` -> (("crash", "a.mid"), ("hang", "b")); bad kinds are errors."""
    plan = []
    for part in filter(None, (p.strip() for p in value.split(";"))):
        kind, _, text = part.partition(":")
        if kind not in FAULT_KINDS or not text:
            raise ValueError(f"{FAULT_ENV} entries look like 'kind:text' with kind one of "
                             f"{', '.join(FAULT_KINDS)}; got {part!r}")
        plan.append((kind, text))
    return tuple(plan)


def _inject_fault(kind: str) -> None:
    if kind == "crash":
        os.kill(os.getpid(), signal.SIGSEGV)
    elif kind == "abort":
        os.abort()
    elif kind == "exit":
        os._exit(70)
    elif kind == "hang":
        while True:
            time.sleep(3600)
    elif kind == "loop":
        while True:
            pass
    elif kind == "alloc":
        import numpy as np
        hoard = []
        while True:  # address space grows without touching pages: fast, and as unbounded
            hoard.append(np.empty(64 << 20, np.uint8))
    raise RuntimeError("fault injected by the MIDISIFT_FAULT test hook")


def _context() -> mp.context.BaseContext:
    # fork is cheapest on Linux and workers touch nothing but their task; elsewhere spawn.
    return mp.get_context("fork" if sys.platform.startswith("linux") else "spawn")


def run_tasks(fn: Callable[[T], R], tasks: Iterable[T], workers: int, *,
              limits: Limits | None = None,
              on_fault: Callable[[T, Fault], R] | None = None) -> Iterator[R]:
    """Yield one outcome per task, in completion order: ``fn(task)`` or ``on_fault(task, fault)``.

    Every task runs in a worker process (also for ``workers=1``), so a hang or a crash costs
    one task, never the run. Without ``on_fault`` a fault raises ``RuntimeError``.
    """
    tasks = list(tasks)
    if not tasks:
        return
    try:
        parse_fault_hook(os.environ.get(FAULT_ENV, ""))  # a bad test hook fails here, not per worker
    except ValueError as e:
        from ..errors import UsageError
        raise UsageError(str(e)) from None
    pool = _Pool(fn, max(1, min(workers, len(tasks))), limits or Limits())
    try:
        for task, value in pool.run(tasks):
            if isinstance(value, Fault):
                if on_fault is None:
                    raise RuntimeError(f"{value.reason}: {value.detail}")
                yield on_fault(task, value)
            else:
                yield value
    finally:
        pool.close()


# ---------------------------------------------------------------------------------------------
# the worker side

def _set_memory_limit(max_memory_mb: int) -> None:
    """RLIMIT_AS = this process's current address space + ``max_memory_mb`` (Linux/Unix)."""
    try:
        import resource
    except ImportError:  # pragma: no cover - not on Windows
        return
    try:
        with open("/proc/self/statm") as fh:
            base = int(fh.read().split()[0]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError):
        return  # no /proc: no memory limit rather than a wrong one
    cap = base + max_memory_mb * 1024 * 1024
    soft, hard = resource.getrlimit(resource.RLIMIT_AS)
    if hard != resource.RLIM_INFINITY:
        cap = min(cap, hard)
    try:
        resource.setrlimit(resource.RLIMIT_AS, (cap, hard))
    except (ValueError, OSError):
        pass


def _die_with_parent() -> None:
    """Linux: the kernel sends SIGKILL to this worker when its parent dies (kill -9 of a run)."""
    if not sys.platform.startswith("linux"):
        return
    try:
        import ctypes
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, int(signal.SIGKILL))  # PR_SET_PDEATHSIG = 1
    except (OSError, AttributeError):  # pragma: no cover
        pass


def _release_inherited_files() -> None:
    """A forked worker lets go of the regular files it inherited open (the parent's SQLite
    database with its WAL and shared-memory files): each descriptor above stderr that names a
    regular file becomes /dev/null.

    Replaced rather than closed: the parent's objects that owned them (the SQLite connection)
    still exist in the worker's copy of memory, and the numbers stay taken, so nothing the
    worker opens later can be reached through such an object. Pipes and sockets are left alone:
    one of them is the write end whose closing tells the parent this worker ended. A spawned
    worker (not Linux) inherits no such files."""
    if not sys.platform.startswith("linux"):
        return
    try:
        fds = [int(name) for name in os.listdir("/proc/self/fd")]
    except OSError:  # pragma: no cover - no /proc
        return
    null = -1
    try:
        for fd in fds:
            if fd <= 2:
                continue
            try:
                mode = os.fstat(fd).st_mode  # (the listing's own descriptor is closed by now)
            except OSError:
                continue
            if stat.S_ISREG(mode):
                if null < 0:
                    null = os.open(os.devnull, os.O_RDWR)
                os.dup2(null, fd, inheritable=False)
    finally:
        if null >= 0:
            os.close(null)


def _where(exc: BaseException) -> str:
    """'file.py:123 in func' of the innermost frame of an exception."""
    tb = traceback.extract_tb(exc.__traceback__)
    if not tb:
        return "unknown location"
    f = tb[-1]
    return f"{os.path.basename(f.filename)}:{f.lineno} in {f.name}"


@contextlib.contextmanager
def _stop_signals_held() -> Iterator[None]:
    """SIGINT and SIGTERM blocked in this thread while the block runs, then delivered."""
    if not hasattr(signal, "pthread_sigmask"):
        yield
        return
    held = signal.pthread_sigmask(signal.SIG_BLOCK, _STOP_SIGNALS)
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, held)


_STOP_SIGNALS = {signal.SIGINT, signal.SIGTERM}


def _worker_main(conn: Connection, parent_pid: int, fn: Callable, limits: Limits) -> None:
    """Loop: receive a list of (seq, task), send (seq, kind, payload) for each task in
    order, until the pipe closes."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
    signal.signal(signal.SIGTERM, signal.SIG_DFL)  # not the parent's handler, inherited by fork
    if hasattr(signal, "pthread_sigmask"):  # started while the parent held them (``_spawn``)
        signal.pthread_sigmask(signal.SIG_UNBLOCK, _STOP_SIGNALS)
    _release_inherited_files()
    # a worker collects its own cyclic garbage, whatever the parent's collector was doing when
    # it forked (the runner turns it off while it builds its records)
    gc.enable()
    import faulthandler
    faulthandler.disable()  # a crash is reported as a fault of its task, not as a stack dump
    _die_with_parent()
    if os.getppid() != parent_pid:  # the parent died before PDEATHSIG was set
        os._exit(0)
    faults = parse_fault_hook(os.environ.get(FAULT_ENV, ""))
    if limits.max_memory_mb is not None:
        _set_memory_limit(limits.max_memory_mb)
    while True:
        try:
            msg = conn.recv()
        except (EOFError, OSError):
            break
        if msg is None:
            break
        for seq, task in msg:
            if not _answer(conn, fn, faults, seq, task):
                os._exit(0)
    os._exit(0)


def _answer(conn: Connection, fn: Callable, faults: tuple[tuple[str, str], ...], seq: int,
            task: Any) -> bool:
    """Compute one task and send its reply; False when the worker must stop (its pipe is
    gone, or it ran out of memory: the heap may be fragmented or half-built)."""
    try:
        if faults:
            label = str(getattr(task, "source", task))
            for kind, text in faults:
                if text in label:
                    _inject_fault(kind)
        reply = (seq, "ok", fn(task))
    except MemoryError as exc:  # the hoard is freed when this handler ends, before the send
        try:
            reply = (seq, "memory", _where(exc))
        except MemoryError:
            reply = (seq, "memory", None)
    except Exception as exc:  # noqa: BLE001 - any escape is this task's fault, reported
        from ..errors import DecodeError, MidisiftError
        if isinstance(exc, MidisiftError) and not isinstance(exc, DecodeError):
            reply = (seq, "abort", (type(exc).__name__, exc.reason, exc.file, exc.location))
        else:
            reply = (seq, "error", f"{type(exc).__name__}: {exc} (at {_where(exc)})")
    try:
        conn.send(reply)
    except MemoryError:
        conn.send((seq, "memory", None))
    except (OSError, ValueError):
        return False
    except Exception as exc:  # e.g. a result that cannot be pickled
        conn.send((seq, "error", f"the result could not be sent back: {type(exc).__name__}: {exc}"))
    return reply[1] != "memory"


# ---------------------------------------------------------------------------------------------
# the parent side

class _Worker:
    def __init__(self, ctx: mp.context.BaseContext, fn: Callable, limits: Limits):
        parent, child = ctx.Pipe(duplex=True)
        self.conn = parent
        self.proc = ctx.Process(target=_worker_main, args=(child, os.getpid(), fn, limits),
                                daemon=True)
        self.proc.start()
        child.close()
        self.queue: deque[tuple[int, Any]] = deque()  # (seq, task) sent, not yet answered
        self.started = time.monotonic()  # when the head of the queue began
        # speed: Connection.poll() builds a selector on every call; one poller, made once
        # (where the platform has poll(2); elsewhere Connection.poll is used)
        self._poller = select.poll() if hasattr(select, "poll") else None
        if self._poller is not None:
            self._poller.register(self.conn.fileno(), select.POLLIN)

    def has_reply(self) -> bool:
        """Whether the worker's pipe has something to read (or is closed), without waiting."""
        if self._poller is None:
            return self.conn.poll()
        return bool(self._poller.poll(0))

    def send(self, items: list[tuple[int, Any]]) -> None:
        """Queue (seq, task) pairs and send them in one message (speed: the stage plans the
        tasks share are pickled once, DEVELOPERS.md, Bench notes)."""
        if not self.queue:
            self.started = time.monotonic()
        self.queue.extend(items)
        try:
            self.conn.send(items)
        except (OSError, ValueError):
            pass  # the worker just died: its sentinel is ready and _drain requeues these tasks

    def stop(self, kill: bool) -> None:
        if kill:
            self.proc.kill()
        else:
            try:
                self.conn.send(None)
            except (OSError, ValueError):
                pass
        self.proc.join(_GRACE_S)
        if self.proc.is_alive():
            self.proc.kill()
            self.proc.join()
        self.conn.close()


def _signal_name(code: int | None) -> str:
    if code is None:
        return "ended"
    if code < 0:
        try:
            sig = signal.Signals(-code)
            desc = signal.strsignal(sig) or sig.name
            return f"was killed by signal {sig.name} ({desc.lower()})"
        except ValueError:
            return f"was killed by signal {-code}"
    return f"exited with status {code}"


class _Pool:
    """N supervised workers; ``run`` yields (task, result or Fault) pairs."""

    def __init__(self, fn: Callable, n: int, limits: Limits):
        self.fn, self.n, self.limits = fn, n, limits
        self.ctx = _context()
        self.workers: list[_Worker] = []
        # speed: one selector for the whole run, each worker's pipe and sentinel registered
        # once (``multiprocessing.connection.wait`` builds a selector on every call, a few
        # times per file)
        self.selector = selectors.DefaultSelector()

    def _spawn(self) -> _Worker:
        # Ctrl-C and SIGTERM wait until the worker is started and listed: Python discards an
        # exception raised in its at-fork handlers, so a signal landing in them was lost (an
        # audit: 1 run in 30 stopped early ran on and exited 0); held, it is acted on below,
        # where the listed worker is stopped with the others
        with _stop_signals_held():
            w = _Worker(self.ctx, self.fn, self.limits)
            self.workers.append(w)
            self.selector.register(w.conn, selectors.EVENT_READ, w)
            self.selector.register(w.proc.sentinel, selectors.EVENT_READ, w)
        return w

    def _retire(self, w: _Worker, kill: bool) -> list[tuple[int, Any]]:
        """Stop a worker; return the tasks it had not answered (its head excluded by callers)."""
        self.workers.remove(w)
        for handle in (w.conn, w.proc.sentinel):
            try:
                self.selector.unregister(handle)
            except KeyError:  # a Ctrl-C came between listing the worker and registering it
                pass
        w.stop(kill)
        return list(w.queue)

    def run(self, tasks: list) -> Iterator[tuple[Any, Any]]:
        todo: deque[tuple[int, Any]] = deque(enumerate(tasks))
        remaining = len(tasks)
        depth = max(1, min(PREFETCH, -(-remaining // (2 * self.n))))  # small runs: spread evenly
        lim = self.limits
        for _ in range(self.n):
            self._spawn()
        while remaining:
            # keep every worker fed (fresh workers replace failed ones here)
            while len(self.workers) < self.n and todo:
                self._spawn()
            for w in self.workers:
                if todo and len(w.queue) <= depth // 2:
                    w.send([todo.popleft() for _ in range(min(len(todo), depth - len(w.queue)))])
            now = time.monotonic()
            busy = [w for w in self.workers if w.queue]
            nearest = min(w.started + lim.timeout_s for w in busy) - now
            wait = min(_LONGEST_WAIT_S, max(0.0, nearest))
            ready = {key.data for key, _ in self.selector.select(wait)}
            for w in [w for w in self.workers if w in ready]:
                if not w.queue:  # nothing asked of it: only its death can wake us; replace it
                    if not w.proc.is_alive():
                        self._retire(w, kill=True)
                    continue
                for item in self._drain(w, todo):
                    remaining -= 1
                    yield item
            now = time.monotonic()
            for w in list(self.workers):
                if w.queue and now - w.started > lim.timeout_s and not w.has_reply():
                    # (a reply that arrived while the caller was busy is read first, not a timeout)
                    (seq, task), *rest = self._retire(w, kill=True)
                    todo.extendleft(reversed(rest))
                    remaining -= 1
                    yield task, Fault("timeout", f"processing took longer than the per-file limit "
                                      f"timeout_s = {lim.timeout_s:g} s, so the worker was stopped; "
                                      f"raise {lim.option('timeout_s')} or rerun with --retry-failed")

    def _drain(self, w: _Worker, todo: deque) -> Iterator[tuple[Any, Any]]:
        """Read every reply a worker has sent; handle its death. Yields (task, value)."""
        while w.queue:
            try:
                if not w.has_reply():
                    if w.proc.is_alive():
                        return
                    raise EOFError
                seq, kind, payload = w.conn.recv()
            except (EOFError, OSError):
                (seq, task), *rest = self._retire(w, kill=True)
                todo.extendleft(reversed(rest))
                yield task, Fault("decoder_crash", f"the worker process {_signal_name(w.proc.exitcode)} "
                                  "while processing this file (a crash in the decoder or a C "
                                  "extension); rerun with --retry-failed to try again")
                return
            hseq, task = w.queue.popleft()
            w.started = time.monotonic()
            assert hseq == seq, "worker replies out of order"
            if kind == "ok":
                yield task, payload
            elif kind == "memory":
                rest = self._retire(w, kill=False)
                todo.extendleft(reversed(rest))
                where = f" (at {payload})" if payload else ""
                yield task, Fault("too_large", f"processing needed more memory than the per-file "
                                  f"limit max_memory_mb = {self.limits.max_memory_mb} MB{where}; "
                                  f"raise {self.limits.option('max_memory_mb')} if such files are wanted")
                return
            elif kind == "error":
                yield task, Fault("decoder_crash", f"processing raised {payload}; this is a bug "
                                  "worth reporting with the file")
            else:  # "abort": an error of the environment, not of this file
                from .. import errors
                name, reason, file, location = payload
                cls = getattr(errors, name, errors.MidisiftError)
                raise cls(reason, file=file, location=location)

    def close(self) -> None:
        for w in list(self.workers):
            self._retire(w, kill=bool(w.queue))
        self.selector.close()
