"""One run per output folder at a time: a lock file holding the owner's pid and host.

A second run on the same folder refuses with a message naming the holder. A lock left by a
process that no longer exists (killed run, power loss) is detected as stale and taken over.
"""
from __future__ import annotations

import json
import os
import socket
import time
from pathlib import Path

from .errors import LedgerError

LOCK_NAME = ".midisift.lock"


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class OutputLock:
    """Context manager holding ``OUTPUT/.midisift.lock`` for the duration of a run."""

    def __init__(self, out_dir: Path):
        self.path = Path(out_dir) / LOCK_NAME
        self.held = False

    def __enter__(self) -> "OutputLock":
        me = {"pid": os.getpid(), "host": socket.gethostname(), "since": time.time()}
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                holder = self._holder()
                if holder and holder.get("host") == me["host"] and not _alive(int(holder.get("pid", -1))):
                    self.path.unlink(missing_ok=True)  # stale: its process is gone
                    continue
                who = f"pid {holder.get('pid')} on {holder.get('host')}" if holder else "an unknown process"
                raise LedgerError(
                    f"another run holds this output folder ({who}); wait for it to finish, or delete "
                    f"{self.path} if you are sure it is gone", file=str(self.path.parent)) from None
            except OSError as e:
                raise LedgerError(f"cannot create the lock file ({e.strerror}); is the output folder writable?",
                                  file=str(self.path)) from None
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
            self.held = True
            return self
        raise LedgerError("could not take the lock after removing a stale one; retry", file=str(self.path))

    def _holder(self) -> dict | None:
        try:
            return json.loads(self.path.read_text())
        except (OSError, ValueError):
            return None

    def __exit__(self, *exc: object) -> None:
        if self.held:
            self.path.unlink(missing_ok=True)
            self.held = False
