"""What a rerun changed against the last completed run: source files added, changed and
removed, files whose verdict turned (kept now, dropped before, or the reverse) and kept files
that landed in another part. The run's table prints it in one line and summary.json keeps it
(``changes_since_last_run``, with the first sources of each kind to ``explain``): a verdict or
a part that moves on a rerun is what a user comparing corpus versions must see (an audit found
a test song's file turning up in train with nothing saying so).

Verdicts are compared file by file (source path): a file's verdict in the last run (the
ledger's decisions) against its row in this one. An audit found them compared by content, so a
kept file edited in place into an empty or drum-only one was a new content, and the rerun said
"0 now dropped"."""
from __future__ import annotations

import heapq
import itertools
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

#: Sources listed in summary.json for each kind of change (the counts are complete).
EXAMPLES = 20
#: The kinds of change that name files, in the order the table, summary.json and page give them.
FILE_KINDS = ("files_added", "files_changed", "files_removed")
TURN_KINDS = ("now_kept", "now_dropped", "moved")


@dataclass
class Changes:
    """Counts of the files added, changed and removed, and of the files whose verdict or part
    turned, with the first sources of each kind (``examples``, in source order: ``now_kept``
    (source, part), ``now_dropped`` source, ``moved`` (source, old part, new part), the file
    kinds sources)."""

    added: int = 0
    changed: int = 0
    removed: int = 0
    turned: dict[str, int] = field(default_factory=lambda: dict.fromkeys(TURN_KINDS, 0))
    examples: dict[str, list[Any]] = field(
        default_factory=lambda: {k: [] for k in FILE_KINDS + TURN_KINDS})

    def note(self, kind: str, example: Any) -> None:
        """One more file of a kind of turn (``TURN_KINDS``)."""
        self.turned[kind] += 1
        if len(self.examples[kind]) < EXAMPLES:
            self.examples[kind].append(example)

    def verdict(self, source: str, before: tuple[str | None, str] | None, part: str | None,
                last_part: Mapping[str, str]) -> None:
        """Compare one file's row of this run (``part``: its part when kept, else None) with
        its verdict in the last run (``before``: (sha256, 'kept' | 'dropped'), None for a file
        the last run did not have: it counts only as added); ``last_part``: sha256 -> the part
        of each content the last run kept. Rows come in source order."""
        if before is None:
            return
        sha, status = before
        if part is None:
            if status == "kept":
                self.note("now_dropped", source)
        elif status != "kept":
            self.note("now_kept", (source, part))
        else:
            old = last_part.get(sha or "")
            if old is not None and old != part:
                self.note("moved", (source, old, part))

    def as_dict(self) -> dict[str, Any]:
        """summary.json's ``changes_since_last_run``."""
        ex = self.examples
        return {"files_added": self.added, "files_changed": self.changed, "files_removed": self.removed,
                **self.turned,
                "examples": {**{k: list(ex[k]) for k in FILE_KINDS},
                             "now_kept": [{"source": s, "split": p} for s, p in ex["now_kept"]],
                             "now_dropped": list(ex["now_dropped"]),
                             "moved": [{"source": s, "from": a, "to": b} for s, a, b in ex["moved"]]}}


def file_changes(added: Iterable[str], changed: Iterable[str], removed: Iterable[str]) -> Changes:
    """The changes with the files added, changed and removed (their sources, in any order)
    counted, and the first of each by source kept as examples."""
    out = Changes()
    for kind, sources in zip(FILE_KINDS, (added, changed, removed)):
        tally = itertools.count()  # memory: the sources streamed and counted, not listed
        out.examples[kind] = heapq.nsmallest(EXAMPLES, (s for s, _ in zip(sources, tally)))
        setattr(out, kind[len("files_"):], next(tally))
    return out


def last_parts(recorded: Mapping[str, tuple[str, str]]) -> dict[str, str]:
    """Content (sha256) -> the part its outputs lay in after the last run (``recorded``: the
    ledger's outputs, path ``midi/<part>/<id>...`` -> (sha256, output fingerprint))."""
    parts: dict[str, str] = {}
    names: dict[str, str] = {}  # memory: one string per part, kept through the manifest's pass
    for path, (sha, _) in recorded.items():
        if path.count("/") >= 2:
            part = path.split("/")[1]
            parts[sha] = names.setdefault(part, part)
    return parts


def change_lines(changes: Changes | None) -> list[str]:
    """The run table's line (none on a first run, or when nothing changed)."""
    if changes is None:
        return []
    c = changes
    if not (c.added or c.changed or c.removed or any(c.turned.values())):
        return []
    parts = [f"{c.added:,} added, {c.changed:,} changed, {c.removed:,} removed"]
    ex = c.examples
    turned = [f"{c.turned['now_kept']:,} now kept" + _first(s for s, _ in ex["now_kept"]),
              f"{c.turned['now_dropped']:,} now dropped" + _first(ex["now_dropped"]),
              f"{c.turned['moved']:,} moved to another part" + _first(s for s, _, _ in ex["moved"])]
    return [f"since the last run: files {parts[0]}; " + ", ".join(turned)]


def _first(sources: Iterable[str]) -> str:
    first = next(iter(sources), None)
    return f" (e.g. {first})" if first is not None else ""
