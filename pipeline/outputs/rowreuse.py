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
manifest the ledger does not know, and every row is rebuilt), and each reused line must start
with its file's id and source. Lines are streamed from the old manifest in source order, never
held all at once.
"""
from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Container
from pathlib import Path
from typing import Any, Iterator

from ..store.codec import thresholds_json

STATE = "_rows"  # the ledger state entry: base key and the manifest's size and mtime
#: What ``STATE`` holds: 2 adds the run that wrote it (``run``), which lets a rerun take the
#: digest of a settled row as it is (``RowReuse.settle``); an older entry still reuses lines.
STATE_VERSION = 2


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
        self.recomputed = recomputed
        self.run = run  # this run's id (``Ledger.start_run``)
        self.old: dict[str, str] = {}
        self._order: list[str] = []
        #: the page's facts of the old manifest (``page.Facts.to_state``), when it is trusted
        self.facts: dict[str, Any] | None = None
        #: contents whose rows may differ from the last run's (``settle``); None: any row may
        self._unsettled: set[str] | None = None
        saved = ledger.state_for(STATE)
        if saved.get("base") != base or saved.get("manifest") != _stat(self.manifest):
            return  # another config, another version, or a manifest the ledger does not know
        old = ledger.row_digests()
        if len(old) != saved.get("rows"):
            return
        self.old = old
        self.facts = saved.get("facts")
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

    def gone(self, present: Container[str]) -> list[str]:
        """Sources of the last run that this run does not have."""
        return [s for s in self.old if s not in present]

    def state_of(self, rows: int, facts: dict[str, Any]) -> dict[str, Any]:
        """This run's base key, row count, manifest stat and page facts, for the ledger's
        ``STATE`` entry (recorded in the run's last transaction, after the manifest is written)."""
        return {"base": self.base, "rows": rows, "manifest": _stat(self.manifest), "facts": facts,
                "version": STATE_VERSION, "run": self.run}


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


def _stat(path: Path) -> list[int] | None:
    try:
        st = os.stat(path)
    except OSError:
        return None
    return [st.st_size, st.st_mtime_ns]
