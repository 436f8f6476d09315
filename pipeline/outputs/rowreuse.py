"""Reuse of the last run's manifest lines and decision trails for the files whose rows did not
change, so a rerun after adding a few files rewrites little beyond them.

A row (and the trail ``explain`` shows) is made from: the source and its sha256, whether it is a
byte-identical copy and of which source, the per-file stage results of its content, its
corpus-stage results, and where its outputs were placed. Per-file results are a pure function of
the content and the stage fingerprints (``base``, hashed with the output fingerprint and the
package version), so the row digest hashes the rest; contents whose per-file results were
computed in this run (new, or retried with ``--retry-failed``) are never reused.

The old manifest is trusted only when its size and mtime are the ones recorded by the last
completed run (a run killed between writing the manifest and committing the ledger leaves a
manifest the ledger does not know, and every row is rebuilt). When its CRC-32 is also the
recorded one and the settled rows are known (``RowReuse.settle``), the rerun copies the
stretches of unchanged lines as bytes and looks only at the rows that may change
(``RowReuse.stretches``); otherwise it walks every row, and each reused line must start with its
file's id and source. Lines are streamed from the old manifest in source order, never held all
at once.
"""
from __future__ import annotations

import hashlib
import json
import os
import zlib
from collections.abc import Container
from pathlib import Path
from typing import Any, Iterator

from ..store.codec import thresholds_json

STATE = "_rows"  # the ledger state entry: base key and the manifest's size and mtime
#: What ``STATE`` holds: 2 adds the run that wrote it (``run``), which lets a rerun take the
#: digest of a settled row as it is (``RowReuse.settle``); an older entry still reuses lines.
STATE_VERSION = 2
#: The old manifest is scanned and copied this many bytes at a time.
READ_CHUNK = 1 << 22
#: Above this share of rows that may change, the rows are walked one by one rather than planned
#: (``RowReuse.stretches``): each looked-at row's old line is then a read of its own.
LOOKED_AT_MOST = 0.5


def row_digest(f: Any, walk: Any, placed: Any, corpus_positions: tuple[int, ...]) -> str:
    """Digest of what one source's manifest row and trail are made from, beyond its content's
    per-file results (see the module docstring)."""
    sha = f.sha256
    n = walk.reached(sha)
    parts = [f.rel, sha, str(n), walk.rep.get(sha, "") if walk.is_byte_copy(f.rel, sha) else ""]
    for i in corpus_positions:
        if i < n:
            r = walk.step(i, sha)  # in stored form: a record read back and one computed now hash alike
            parts.append(f"{r.kept}\0{r.reason}\0{r.detail}\0{r.values_json()}\0"
                         f"{thresholds_json(r.thresholds)}")
    parts.append(repr(placed.all_of.get(sha)))
    return hashlib.blake2b("\0".join(parts).encode("utf-8", "surrogateescape"), digest_size=12).hexdigest()


class RowReuse:
    """The last run's rows, as far as they can be trusted, for one rerun."""

    def __init__(self, ledger: Any, out_dir: Path, base: str, recomputed: Container[str],
                 run: int = 0):
        self.manifest = Path(out_dir) / "manifest.jsonl"
        self.base = base
        self.recomputed = recomputed  # iterating it gives its contents (``stretches``)
        self.run = run  # this run's id (``Ledger.start_run``)
        self.old: dict[str, str] = {}
        self._order: list[str] = []
        #: the page's facts of the old manifest (``page.Facts.to_state``), when it is trusted
        self.facts: dict[str, Any] | None = None
        #: contents whose rows may differ from the last run's (``settle``); None: any row may
        self._unsettled: set[str] | None = None
        self._gone: list[int] | None = None  # positions in ``_order`` of sources gone (``_gone_lines``)
        self._crc32: int | None = None  # the old manifest's, as the last run recorded it
        self._ends: Any = None  # its lines' end offsets, once ``stretches`` planned the rows
        saved = ledger.state_for(STATE)
        if saved.get("base") != base or saved.get("manifest") != file_stat(self.manifest):
            return  # another config, another version, or a manifest the ledger does not know
        old = ledger.row_digests()
        if len(old) != saved.get("rows"):
            return
        self.old = old
        self.facts = saved.get("facts")
        self._crc32 = saved.get("crc32")
        self._order = sorted(old)  # the manifest's line order (sources sorted as discover does)
        # the sources and outputs tables are those the digests were made beside only when every
        # run started since the one that wrote them completed (a completed run either wrote
        # them again or changed nothing); a stopped run may have written either table
        last = saved.get("run") if saved.get("version") == STATE_VERSION else None
        self._trusted_tables = type(last) is int and ledger.runs_unfinished(last, run) == 0

    @property
    def usable(self) -> bool:
        """Whether any old row can be reused (else every row and trail is written anew)."""
        return bool(self.old)

    def lines(self) -> Iterator[tuple[str, str]]:
        """(source, line) of the old manifest in order; stops at the first line out of place."""
        try:
            with open(self.manifest, encoding="utf-8", newline="\n") as fh:
                for source, line in zip(self._order, fh):
                    yield source, line
        except (OSError, UnicodeDecodeError):
            return

    def settle(self, unsettled: set[str] | None) -> None:
        """Take the last run's digest, without computing it, for a source whose content is not
        in ``unsettled``: the caller lists there every content that was computed, or whose
        sources (which one represents it), corpus-stage records (a new record rather than the
        last run's, as it is) or placed outputs (against the outputs table) changed in this run,
        or that holds a verdict of this run only. Every other part of a row digest is then what
        the last run hashed (its per-file results are fixed by ``base``). None: compute all."""
        if self.old and self._trusted_tables and unsettled is not None:
            self._unsettled = unsettled

    def digest(self, f: Any, walk: Any, placed: Any, corpus_positions: tuple[int, ...]) -> str:
        """The source's row digest: the last run's for a settled row (``settle``), else made."""
        if self._unsettled is not None and f.sha256 not in self._unsettled:
            old = self.old.get(f.rel)
            if old is not None:
                return old
        return row_digest(f, walk, placed, corpus_positions)

    def gone(self, files: Any) -> list[str]:
        """Sources of the last run that this run does not have (``files``: the run's
        ``SourceTable``), in source order."""
        return [self._order[k] for k in self._gone_lines(files)]

    def _gone_lines(self, files: Any) -> list[int]:
        """The old manifest's lines (positions in ``_order``) whose source is gone; found once."""
        if self._gone is None:
            present = files.path_set()
            self._gone = [k for k, s in enumerate(self._order) if s not in present]
        return self._gone

    def stretches(self, files: Any) -> list[tuple[str, int, int]] | None:
        """The new manifest as steps over the old one, or None when it cannot be planned so
        (then every row is walked). Steps, in source order: ``("copy", a, b)`` the old lines
        ``a`` to ``b`` (exclusive) as they are; ``("file", i, k)`` file ``i`` of ``files``,
        whose row may change (its content is not settled, or was computed in this run), with
        its old line ``k`` (-1: a new source); ``("gone", k, 0)`` old line ``k``, whose source is
        gone. Planned only when the rows are settled (``settle``) and the old manifest is the
        one the last run wrote, byte for byte (its CRC-32, ``_line_ends``): the other rows are
        then those the last run wrote; and only when at most ``LOOKED_AT_MOST`` of the files
        are looked at. Every file whose content is not listed is known to the last run (a new
        source's content is unsettled); the two sides' counts are checked."""
        if self._unsettled is None or self._crc32 is None:
            return None
        order, m, n = self._order, len(self._order), len(files)
        look = files.indices_of(self._unsettled.union(self.recomputed))
        if len(look) > n * LOOKED_AT_MOST:
            return None  # speed: the walk reads the old manifest in one pass
        gone = self._gone_lines(files)
        steps: list[tuple[str, int, int]] = []
        fi = oi = 0  # the next file, the next old line

        def aligned(count: int) -> bool:
            """The next ``count`` files are the next ``count`` old lines' sources, unchanged."""
            nonlocal fi, oi
            if count < 0 or fi + count > n or oi + count > m:
                return False
            if count:
                if files.rel(fi) != order[oi] or files.rel(fi + count - 1) != order[oi + count - 1]:
                    return False
                steps.append(("copy", oi, oi + count))
                fi, oi = fi + count, oi + count
            return True

        g = 0
        for i in [*look, n]:  # n: the end, after the last gone sources
            rel = files.rel(i) if i < n else None
            while g < len(gone) and (rel is None or order[gone[g]] < rel):
                if not aligned(gone[g] - oi):
                    return None
                steps.append(("gone", oi, 0))
                oi, g = oi + 1, g + 1
            if not aligned(i - fi):
                return None
            if rel is not None:
                k = oi if oi < m and order[oi] == rel else -1
                steps.append(("file", i, k))
                fi, oi = fi + 1, oi + (k >= 0)
        if fi != n or oi != m:
            return None
        self._ends = self._line_ends()
        return steps if self._ends is not None else None

    def _line_ends(self) -> Any:
        """The end offset of each line of the old manifest (a numpy array), or None when its
        CRC-32 is not the one recorded or its lines are not the last run's rows."""
        import numpy as np
        ends, crc, size = [], 0, 0
        try:
            with open(self.manifest, "rb") as fh:
                while chunk := fh.read(READ_CHUNK):
                    crc = zlib.crc32(chunk, crc)
                    ends.append(np.flatnonzero(np.frombuffer(chunk, np.uint8) == 10) + (size + 1))
                    size += len(chunk)
        except OSError:
            return None
        found = np.concatenate(ends) if ends else np.zeros(0, np.int64)
        if crc != self._crc32 or len(found) != len(self._order) or not len(found) or int(found[-1]) != size:
            return None
        return found

    def reusable(self, f: Any, digest: str | None, line: str) -> bool:
        """Whether the old ``line`` is the source's row as it would be built: its digest is
        unchanged, its content's per-file results were not computed in this run, and the line
        starts with its id and source."""
        return (self.old.get(f.rel) == digest and f.sha256 not in self.recomputed
                and line.startswith(line_prefix(f)))

    def opened(self) -> "OldManifest":
        """The old manifest open for reading its lines by number (after ``stretches`` planned
        the rows; use as a context manager)."""
        return OldManifest(self.manifest, self._ends)

    def state_of(self, rows: int, facts: dict[str, Any], crc32: int | None) -> dict[str, Any]:
        """This run's base key, row count, manifest stat, CRC-32 (``ManifestCheck``) and page
        facts, for the ledger's ``STATE`` entry (recorded in the run's last transaction, after
        the manifest is written)."""
        return {"base": self.base, "rows": rows, "manifest": file_stat(self.manifest), "facts": facts,
                "version": STATE_VERSION, "run": self.run, "crc32": crc32}


class OldManifest:
    """The last run's manifest open for reading (one handle for the whole rerun), its lines by
    number (``ends``: each line's end offset, ``RowReuse._line_ends``)."""

    def __init__(self, path: Path, ends: Any):
        self.path, self._ends = path, ends
        self._fh = open(path, "rb")

    def __enter__(self) -> "OldManifest":
        return self

    def __exit__(self, *exc: Any) -> None:
        self._fh.close()

    def line(self, k: int) -> str:
        """Line ``k`` (it ends in a newline)."""
        return b"".join(self.read(int(self._ends[k - 1]) if k else 0, int(self._ends[k]))).decode("utf-8")

    def stretch(self, a: int, b: int) -> "OldLines":
        """Lines ``a`` to ``b`` (exclusive), to be copied as they are."""
        return OldLines(self, int(self._ends[a - 1]) if a else 0, int(self._ends[b - 1]), b - a)

    def read(self, start: int, end: int) -> Iterator[bytes]:
        """Bytes ``start`` to ``end``, ``READ_CHUNK`` at a time."""
        self._fh.seek(start)
        left = end - start
        while left > 0:
            chunk = self._fh.read(min(READ_CHUNK, left))
            if not chunk:
                raise OSError(f"{self.path} ended before byte {end}")
            left -= len(chunk)
            yield chunk


class OldLines:
    """A stretch of the last run's manifest reused as it is: ``count`` lines, bytes ``start``
    to ``end`` of the file, written by copying the bytes (``chunks``)."""

    __slots__ = ("source", "start", "end", "count")

    def __init__(self, source: OldManifest, start: int, end: int, count: int):
        self.source, self.start, self.end, self.count = source, start, end, count

    def chunks(self) -> Iterator[bytes]:
        """The stretch's bytes, ``READ_CHUNK`` at a time."""
        return self.source.read(self.start, self.end)

    def lines(self) -> Iterator[str]:
        """The stretch's lines (each ends in a newline), one at a time."""
        rest = b""
        for chunk in self.chunks():
            *whole, rest = (rest + chunk).split(b"\n")
            for line in whole:
                yield line.decode("utf-8") + "\n"


class ManifestCheck:
    """The CRC-32 of the bytes written (``update``, as hashlib's objects take them): recorded
    with the rows, it tells a rerun that the manifest is still the one this run wrote."""

    def __init__(self) -> None:
        self.value = 0

    def update(self, data: bytes) -> None:
        self.value = zlib.crc32(data, self.value)


def line_prefix(f: Any) -> str:
    """How a manifest line of this source starts (the id and source fields come first, written
    by ``json.dumps(..., ensure_ascii=False)``, which escapes only quotes, backslashes and
    control characters: a printable path without the first two is written as it is)."""
    rel = f.rel
    if rel.isprintable() and '"' not in rel and "\\" not in rel:
        source = '"' + rel + '"'
    else:
        source = json.dumps(rel, ensure_ascii=False)
    return '{"id": "' + f.sha256[:16] + '", "source": ' + source + ", "


def file_stat(path: Path) -> list[int] | None:
    """[size, mtime_ns] of a file as the rows' state records it, None when it cannot be read."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return [st.st_size, st.st_mtime_ns]
