"""Unnamed temporary files that hold arrays out of memory while a corpus step runs.

The full searches (``similarity.spilled.SpilledColumns``) and a spilled artifact column
(``store.columns``) write a matrix's bytes to a file in the run's own folder and read parts of
it back with ``os.pread``: the file's pages stay in the page cache, not in the process.
"""
from __future__ import annotations

import os
import tempfile
from typing import IO, Iterable

from ..errors import OutputError


def spill_file(chunks: Iterable[bytes | tuple[int, bytes]], folder: str | os.PathLike | None) -> IO[bytes]:
    """An unnamed temporary file in ``folder`` (else the system's temporary folder) holding the
    ``chunks`` one after the other (a chunk ``(offset, data)``: ``data`` at that offset); a
    failed write (a full disk) is an ``OutputError`` naming the folder, the file is gone with it."""
    f = tempfile.TemporaryFile(dir=folder)
    try:
        for chunk in chunks:
            if isinstance(chunk, tuple):
                f.seek(chunk[0])
                chunk = chunk[1]
            f.write(chunk)
        f.flush()
    except OSError as e:
        f.close()
        where = os.fspath(folder) if folder is not None else tempfile.gettempdir()
        raise OutputError(f"cannot write the signatures to a temporary file ({e.strerror}): the "
                          "corpus steps move them out of memory there; free space on that disk "
                          "and rerun (finished work is kept)", file=where) from None
    except BaseException:  # e.g. blocks of the wrong shape: the file goes with the error
        f.close()
        raise
    return f


def read_spilled(f: IO[bytes], size: int, offset: int, what: str) -> bytes:
    """``size`` bytes at ``offset`` of a spill file (``os.pread``: no shared file position);
    a short read, which only a damaged file gives, is an ``OSError`` saying ``what`` was read."""
    data = os.pread(f.fileno(), size, offset)
    if len(data) != size:
        raise OSError(f"{f.name}: {what} of spilled signatures read {len(data)} of {size} bytes")
    return data
