"""Atomic file writes: a reader sees the old file or the new one, never a part; and the read of
a JSON object file so written (``read_json_object``)."""
from __future__ import annotations

import functools
import hashlib
import json
import os
import tempfile
from pathlib import Path
from typing import Any, Iterable

from ..errors import OutputError


@functools.cache
def _file_mode() -> int:
    """The mode a plain ``open()`` gives a new file: 0o666 less the process's umask (read once;
    os.umask can only be read by setting it). ``mkstemp`` would leave 0o600."""
    mask = os.umask(0o022)
    os.umask(mask)
    return 0o666 & ~mask


def _checked(write: Any, check: Any) -> Any:
    """``write``, feeding ``check`` what it writes."""
    def both(data: bytes) -> None:
        check.update(data)
        write(data)
    return both


def write_atomic(path: Path, data: bytes | str | Iterable[str | bytes], *, fsync: bool = True,
                 check: Any = None) -> None:
    """Write to a temporary name in the same folder, fsync, then rename over ``path``: readers
    see the old file or the new one, never a part. ``data`` may be an iterable of text or
    bytes chunks (streamed: the manifest of a million files is never one string in memory).
    ``fsync=False`` skips the flush where the file may be lost to a power cut (the up-to-date
    summary). ``check.update(bytes)`` (a hashlib object, say) is fed the bytes written."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        try:
            if hasattr(os, "fchmod"):
                os.fchmod(fd, _file_mode())  # follow the umask like any tool's output
            with os.fdopen(fd, "wb") as fh:
                write = fh.write if check is None else _checked(fh.write, check)
                if isinstance(data, (bytes, bytearray, memoryview)):
                    write(data)
                elif isinstance(data, str):
                    write(data.encode("utf-8"))
                else:
                    buf: list[str] = []
                    size = 0
                    for chunk in data:
                        if type(chunk) is bytes:
                            write("".join(buf).encode("utf-8"))
                            write(chunk)
                            buf, size = [], 0
                            continue
                        buf.append(chunk)
                        size += len(chunk)
                        if size >= 1 << 20:
                            write("".join(buf).encode("utf-8"))
                            buf, size = [], 0
                    write("".join(buf).encode("utf-8"))
                if fsync:
                    fh.flush()
                    os.fsync(fh.fileno())
            os.replace(tmp, path)
        except BaseException:
            try:
                os.unlink(tmp)
            except OSError:
                pass
            raise
    except OSError as e:
        raise OutputError(f"cannot write ({e.strerror}); check free space and permissions of the output folder",
                          file=str(path)) from None


def read_json_object(path: Path) -> dict | None:
    """A JSON object file's contents; None when it is missing, unreadable or not an object."""
    try:
        data = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def file_sha256(path: str | Path) -> str:
    """The sha256 (hex) of a file's bytes, read in 1 MiB blocks (OSError when it cannot be read)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(1 << 20):
            h.update(block)
    return h.hexdigest()
