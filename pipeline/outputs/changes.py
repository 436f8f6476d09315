"""What a rerun changed against the last completed run: source files added, changed and
removed, contents whose verdict turned (kept now, dropped before, or the reverse) and kept
contents that landed in another part. The run's table prints it in one line and summary.json
keeps it (``changes_since_last_run``, with a few sources of each kind to ``explain``): a
verdict or a part that moves on a rerun is what a user comparing corpus versions must see (an
audit found a test song's file turning up in train with nothing saying so)."""
from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

#: Sources listed in summary.json for each kind of change (the counts are complete).
EXAMPLES = 20


@dataclass
class Changes:
    """Counts of changed source files, and the first source of each content whose verdict or
    part changed (``now_kept`` and ``now_dropped``: sources; ``moved``: (source, old part, new
    part))."""

    added: int = 0
    changed: int = 0
    removed: int = 0
    now_kept: list[tuple[str, str]] = field(default_factory=list)  # (source, part)
    now_dropped: list[str] = field(default_factory=list)
    moved: list[tuple[str, str, str]] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        """summary.json's ``changes_since_last_run``."""
        return {"files_added": self.added, "files_changed": self.changed, "files_removed": self.removed,
                "now_kept": len(self.now_kept), "now_dropped": len(self.now_dropped),
                "moved": len(self.moved),
                "examples": {"now_kept": [{"source": s, "split": p} for s, p in self.now_kept[:EXAMPLES]],
                             "now_dropped": self.now_dropped[:EXAMPLES],
                             "moved": [{"source": s, "from": a, "to": b} for s, a, b in self.moved[:EXAMPLES]]}}


def last_parts(recorded: Mapping[str, tuple[str, str]]) -> dict[str, str]:
    """Content (sha256) -> the part its outputs lay in after the last run (``recorded``: the
    ledger's outputs, path ``midi/<part>/<id>...`` -> (sha256, output fingerprint))."""
    return {sha: path.split("/")[1] for path, (sha, _) in recorded.items() if path.count("/") >= 2}


def changes_since(last_status: Mapping[str, str], last_part: Mapping[str, str], rep: Mapping[str, str],
                  status: Mapping[str, Any], part_of: Mapping[str, str], added: int, changed: int,
                  removed: int) -> Changes:
    """The changes of this run (``rep``: sha256 -> first source; ``status``: sha256 -> None when
    kept, else (stage, reason); ``part_of``: sha256 -> part of each kept content) against the
    last run's verdicts (``last_status``: sha256 -> 'kept' | 'dropped') and parts. Contents new
    to this run count only as files added."""
    out = Changes(added, changed, removed)
    for sha, source in rep.items():
        before = last_status.get(sha)
        if before is None:
            continue
        kept = status.get(sha) is None
        if kept and before == "dropped":
            out.now_kept.append((source, part_of.get(sha, "")))
        elif not kept and before == "kept":
            out.now_dropped.append(source)
        elif kept and sha in last_part and last_part[sha] != part_of.get(sha):
            out.moved.append((source, last_part[sha], part_of.get(sha, "")))
    return out


def change_lines(changes: Changes | None) -> list[str]:
    """The run table's line (none on a first run, or when nothing changed)."""
    if changes is None:
        return []
    c = changes
    if not (c.added or c.changed or c.removed or c.now_kept or c.now_dropped or c.moved):
        return []
    parts = [f"{c.added:,} added, {c.changed:,} changed, {c.removed:,} removed"]
    turned = [f"{len(c.now_kept):,} now kept" + _first(s for s, _ in c.now_kept),
              f"{len(c.now_dropped):,} now dropped" + _first(c.now_dropped),
              f"{len(c.moved):,} moved to another part" + _first(s for s, _, _ in c.moved)]
    return [f"since the last run: files {parts[0]}; " + ", ".join(turned)]


def _first(sources: Iterable[str]) -> str:
    first = next(iter(sources), None)
    return f" (e.g. {first})" if first is not None else ""
