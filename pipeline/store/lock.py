"""One run per output folder at a time: a lock file holding the owner's pid and host.

A second run on the same folder refuses with a message naming the holder. The lock is an
``flock`` on ``OUTPUT/.midisift.lock`` held for the whole run, so the kernel releases it when the
holder dies in any way (SIGKILL, power loss): a lock file left by a dead process is stale by
construction and is taken over, even when a new process got the dead one's pid. Where ``flock``
does not exist (Windows) the file is created exclusively and a stale one is recognized by its
pid no longer running on this host.

Taking the lock also sweeps the temporary files (``.NAME.XXXX.tmp``, see
``store.atomic.write_atomic``) that a killed run may have left: no other run can be writing them, and
they never carry a final name, so removing them loses nothing.
"""
from __future__ import annotations

import json
import os
import time
from pathlib import Path

from ..errors import LedgerError

try:
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None  # type: ignore[assignment]

LOCK_NAME = ".midisift.lock"
#: Folders (relative to OUTPUT) swept for temporaries of a dead run; midi/ and .staging/ are
#: cleaned by outputs.place.
SWEPT = (".", "splits")

_HELD_FDS: set[int] = set()


def _close_in_child() -> None:
    # A forked worker must not keep the run's lock alive after the run itself died.
    for fd in list(_HELD_FDS):
        try:
            os.close(fd)
        except OSError:
            pass
    _HELD_FDS.clear()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_close_in_child)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, ValueError):
        return pid > 0
    return True


def sweep_temporaries(out_dir: Path) -> list[Path]:
    """Remove ``.*.tmp`` files left by a killed run in OUTPUT and OUTPUT/splits; return them."""
    removed = []
    for sub in SWEPT:
        folder = Path(out_dir) / sub
        if not folder.is_dir():
            continue
        for p in folder.glob(".*.tmp"):
            if p.is_file() and not p.is_symlink():
                try:
                    p.unlink()
                    removed.append(p)
                except OSError:
                    pass
    return removed


class OutputLock:
    """Context manager holding ``OUTPUT/.midisift.lock`` for the duration of a run."""

    def __init__(self, out_dir: Path):
        self.path = Path(out_dir) / LOCK_NAME
        self.held = False
        self.fd: int | None = None
        self.took_over: dict | None = None  # the dead holder's record, when a stale lock was taken
        self.swept: list[Path] = []

    def __enter__(self) -> "OutputLock":
        me = {"pid": os.getpid(), "host": _hostname(), "since": time.time()}
        if fcntl is not None:
            self._take_flock(me)
        else:  # pragma: no cover - Windows
            self._take_exclusive(me)
        self.held = True
        self.swept = sweep_temporaries(self.path.parent)
        return self

    # -- flock (POSIX) ---------------------------------------------------------------------
    def _take_flock(self, me: dict) -> None:
        for _ in range(5):
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as e:
                raise LedgerError(f"cannot create the lock file ({e.strerror}); is the output folder "
                                  "writable?", file=str(self.path)) from None
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                holder = self._holder()
                os.close(fd)
                raise LedgerError(self._busy_message(holder), file=str(self.path.parent)) from None
            # the file may have been unlinked by its previous holder between open and flock
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(self.path))
            except OSError:
                same = False
            if not same:
                os.close(fd)
                continue
            # a record left in the file means its holder died without releasing (a clean
            # release unlinks the file): the lock was stale, whatever pid it names
            self.took_over = self._holder()
            try:
                os.ftruncate(fd, 0)
                os.write(fd, json.dumps(me).encode())
            except OSError as e:
                os.close(fd)
                raise LedgerError(f"cannot write the lock file ({e.strerror}); check free space",
                                  file=str(self.path)) from None
            self.fd = fd
            _HELD_FDS.add(fd)
            return
        raise LedgerError("could not take the lock (it kept changing hands); retry", file=str(self.path))

    # -- exclusive create (no flock) ---------------------------------------------------------
    def _take_exclusive(self, me: dict) -> None:  # pragma: no cover - Windows
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                holder = self._holder()
                if holder and holder.get("host") == me["host"] and not _alive(int(holder.get("pid", -1))):
                    self.took_over = holder
                    self.path.unlink(missing_ok=True)  # stale: its process is gone
                    continue
                raise LedgerError(self._busy_message(holder), file=str(self.path.parent)) from None
            except OSError as e:
                raise LedgerError(f"cannot create the lock file ({e.strerror}); is the output folder "
                                  "writable?", file=str(self.path)) from None
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
            return
        raise LedgerError("could not take the lock after removing a stale one; retry", file=str(self.path))

    def _busy_message(self, holder: dict | None) -> str:
        if holder:
            since = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(float(holder.get("since", 0))))
            who = f"pid {holder.get('pid')} on {holder.get('host')}, since {since}"
        else:
            who = "a process that has not written its pid yet"
        return (f"another run holds this output folder ({who}); wait for it to finish or stop it; "
                f"the lock file is {self.path}")

    def _holder(self) -> dict | None:
        try:
            data = json.loads(self.path.read_text())
        except (OSError, ValueError):
            return None
        return data if isinstance(data, dict) else None

    def __exit__(self, *exc: object) -> None:
        if not self.held:
            return
        self.held = False
        if self.fd is not None:
            # unlink while still holding the flock, so no waiter can lock the old inode
            self.path.unlink(missing_ok=True)
            _HELD_FDS.discard(self.fd)
            os.close(self.fd)
            self.fd = None
        else:  # pragma: no cover - Windows
            self.path.unlink(missing_ok=True)


def _hostname() -> str:
    """This machine's name (``socket.gethostname()`` without importing socket: the up-to-date
    check takes the lock and should cost little more than Python's start-up)."""
    if hasattr(os, "uname"):
        return os.uname().nodename
    import socket
    return socket.gethostname()
