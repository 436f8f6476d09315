"""manifest.jsonl (one JSON object per input file, kept and dropped, sorted by source) and the
split lists (``splits/<part>.txt``: one kept output path, relative to OUTPUT, per line, sorted)."""
from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator

from ..store.codec import json_default
from ..store.atomic import write_atomic
from .files import DEFAULT_PART, Placed
from .rowreuse import OldLines
from .summary import write_summary

#: Manifest fields of the contract, in the order they are written; other measures follow sorted.
CONTRACT_FIELDS = (
    "id", "source", "title", "sha256", "status", "stage", "reason", "detail",
    "tonic", "tonic_pc", "mode", "key_confidence", "meter", "meter_source", "transpose",
    "duration_s", "notes", "notes_per_s", "cluster", "duplicate_of", "similarity", "split", "output",
)


def _kept_detail(trail: list, part: str | None) -> str:
    """The detail of a kept file: the stages it passed and its part, and why a stage held
    its work back (transpose below ``min_key_confidence``: ``not transposed: key ...``)."""
    stages = ", ".join(s["stage"] for s in trail)
    where = f"; placed in {part}" if part else ""
    held = "".join(f"; {s['detail']}" for s in trail
                   if (s.get("values") or {}).get("transpose_held_back") and s.get("detail"))
    return f"kept: passed {stages}{where}{held}"


def source_fields(rel: str, file_title: Any, metadata: Any) -> dict[str, Any]:
    """The fields of a source path rather than of its content: the metadata table's columns
    and ``title`` (the table's title, else the file's own track name, else the file name's
    stem)."""
    row = dict(metadata.of(rel)) if metadata is not None else {}
    stem = rel.rsplit("/", 1)[-1].rsplit(".", 1)[0]
    row["title"] = row.get("title") or file_title or stem
    return row


def manifest_row(f: Any, walk: Any, placed: Placed) -> tuple[dict[str, Any], list]:
    """The manifest object of one source file, and the trail it was made from."""
    sha = f.sha256
    trail = walk.trail_of(f.rel, sha)
    final = walk.final(f.rel, sha)
    vals: dict[str, Any] = {}
    for step in trail:
        vals.update(step.get("values", {}))
    row: dict[str, Any] = {k: None for k in CONTRACT_FIELDS}
    extras = {k: v for k, v in vals.items() if k not in row}
    row.update({k: v for k, v in vals.items() if k in row})
    row.update(id=sha[:16], source=f.rel, sha256=sha)
    extras.pop("file_title", None)
    for k, v in source_fields(f.rel, vals.get("file_title"), walk.metadata).items():
        (row if k in row else extras)[k] = v
    if final is None:
        part = vals.get("split") or DEFAULT_PART
        row.update(status="kept", stage=None, reason=None, detail=_kept_detail(trail, part),
                   split=part, output=placed.main.get(sha))
        outs = placed.all_of.get(sha, [])
        if len(outs) > 1:
            extras["outputs"] = outs
    else:
        last = trail[-1] if trail else {}
        row.update(status="dropped", stage=final[0], reason=final[1], detail=last.get("detail"),
                   split=None, output=None)
    for k in sorted(extras):
        row[k] = extras[k]
    return row, trail


def manifest_rows(files: Any, walk: Any, placed: Placed,
                  on_trail: Callable[[Any, dict, list, str | None], None] | None = None,
                  reuse: Any = None, corpus_positions: tuple[int, ...] = (),
                  prefetch: Callable[[list[str]], None] | None = None,
                  on_unused: Callable[[str], None] | None = None) -> Iterator[dict[str, Any] | str | OldLines]:
    """Manifest rows in source order (``files``, a ``SourceTable``, is sorted by source), one
    at a time; ``on_trail(file, row, trail, digest)`` sees each built row's trail as it passes
    (the runner records the decisions in the same pass). With ``reuse`` (a
    ``rowreuse.RowReuse``) a source whose row digest is unchanged gets its old manifest line (a
    str) instead, or a stretch of such lines copied as they are (an ``OldLines``, when the rows
    that may change are known: ``RowReuse.stretches``), and ``on_trail`` is not called for it:
    its trail is already recorded. ``prefetch(sha256s)`` is told, ``ROWS_AHEAD`` files at a
    time, which contents' rows are about to be built (the runner reads their stored values in a
    few queries). ``on_unused(line)`` sees every line of the old manifest that is not reused
    (its source is gone or its row is built again)."""
    steps = reuse.stretches(files) if reuse is not None and reuse.usable else None
    if steps is None:
        yield from _ahead(_walked(files, walk, placed, reuse, corpus_positions, on_unused),
                          walk, placed, on_trail, prefetch)
        return
    with reuse.opened() as old:  # open while the stretches it gives are written
        yield from _ahead(_planned(steps, files, walk, placed, reuse, old, corpus_positions, on_unused),
                          walk, placed, on_trail, prefetch)


def _ahead(decided: Iterator[Any], walk: Any, placed: Placed, on_trail: Callable | None,
           prefetch: Callable[[list[str]], None] | None) -> Iterator[dict[str, Any] | str | OldLines]:
    """The rows of the decisions, ``ROWS_AHEAD`` files' decisions taken before their rows are
    built (``prefetch``)."""
    ahead: list[Any] = []
    looked = 0
    for item in decided:
        ahead.append(item)
        if type(item) is tuple:
            looked += 1
            if looked == ROWS_AHEAD:
                yield from _rows_of(ahead, walk, placed, on_trail, prefetch)
                ahead, looked = [], 0
    yield from _rows_of(ahead, walk, placed, on_trail, prefetch)


def _rows_of(ahead: list[Any], walk: Any, placed: Placed, on_trail: Callable | None,
             prefetch: Callable[[list[str]], None] | None) -> Iterator[dict[str, Any] | str | OldLines]:
    """The rows of ``ahead``'s decisions: (file, digest, reused line or None) tuples, the line
    or a row built; stretches of old lines as they are."""
    if prefetch is not None:
        prefetch([it[0].sha256 for it in ahead if type(it) is tuple and it[2] is None])
    for item in ahead:
        if type(item) is not tuple:
            yield item
            continue
        f, digest, line = item
        if line is not None:
            yield line
            continue
        row, trail = manifest_row(f, walk, placed)
        if on_trail is not None:
            on_trail(f, row, trail, digest)
        yield row


def _walked(files: Any, walk: Any, placed: Placed, reuse: Any, corpus_positions: tuple[int, ...],
            on_unused: Callable[[str], None] | None) -> Iterator[tuple[Any, str | None, str | None]]:
    """(file, row digest, its old line if reused) of every file, the old manifest read along
    (each reused line must start with its file's id and source)."""
    old_lines = reuse.lines() if reuse is not None and reuse.usable else None
    pending = next(old_lines, None) if old_lines is not None else None
    for start in range(0, len(files), ROWS_AHEAD):
        for f in files[start:start + ROWS_AHEAD]:
            digest = reuse.digest(f, walk, placed, corpus_positions) if reuse is not None else None
            line = None
            if old_lines is not None and reuse.old.get(f.rel) == digest:
                while pending is not None and pending[0] < f.rel:
                    if on_unused is not None:
                        on_unused(pending[1])
                    pending = next(old_lines, None)
                if pending is not None and pending[0] == f.rel and reuse.reusable(f, digest, pending[1]):
                    line = pending[1]
                    pending = next(old_lines, None)
            yield f, digest, line
    if on_unused is not None:
        while pending is not None:
            on_unused(pending[1])
            pending = next(old_lines, None)


def _planned(steps: list[tuple[str, int, int]], files: Any, walk: Any, placed: Placed, reuse: Any,
             old_manifest: Any, corpus_positions: tuple[int, ...],
             on_unused: Callable[[str], None] | None) -> Iterator[tuple[Any, str | None, str | None] | OldLines]:
    """The decisions of ``RowReuse.stretches``' steps over ``old_manifest``
    (``rowreuse.OldManifest``): a stretch of old lines as it is, or (file, row digest, its old
    line if reused) of a file whose row may change."""
    for kind, a, b in steps:
        if kind == "copy":
            yield old_manifest.stretch(a, b)
        elif kind == "gone":
            if on_unused is not None:
                on_unused(old_manifest.line(a))
        else:
            f = files[a]
            digest = reuse.digest(f, walk, placed, corpus_positions)
            line = None
            if b >= 0:
                old = old_manifest.line(b)
                if reuse.reusable(f, digest, old):
                    line = old
                elif on_unused is not None:
                    on_unused(old)
            yield f, digest, line


#: Files whose rows are decided before they are built (``manifest_rows``' ``prefetch``).
ROWS_AHEAD = 500


def _jsonl(rows: Iterable[dict | str | OldLines]) -> Iterator[str | bytes]:
    """JSON lines of the rows; a str is a line reused as it is (it ends in a newline), an
    ``OldLines`` a stretch of them, copied as bytes."""
    dumps = json.dumps
    for r in rows:
        if type(r) is str:
            yield r
        elif type(r) is OldLines:
            yield from r.chunks()
        else:
            yield dumps(r, ensure_ascii=False, separators=(", ", ": "), default=json_default) + "\n"


def write_all(out_dir: Path, rows: Iterable[dict | str | OldLines], placed: Placed,
              summary_of: Callable[[], dict], configured: Iterable[str] = (),
              check: Any = None) -> dict:
    """Write the manifest (streamed from ``rows``), the split lists, then the summary that
    ``summary_of`` builds once the rows are counted; each file atomically, stale split lists
    removed. ``check`` (a ``rowreuse.ManifestCheck``) is fed the manifest's bytes. Returns the
    summary."""
    write_atomic(out_dir / "manifest.jsonl", _jsonl(rows), check=check)
    splits = out_dir / "splits"
    splits.mkdir(parents=True, exist_ok=True)
    lists = {part: [] for part in configured} | placed.parts  # an empty part gets its empty list
    wanted = {f"{p}.txt" for p in lists}
    for p in splits.glob("*.txt"):
        if p.name not in wanted:
            p.unlink()
    for part, paths in sorted(lists.items()):
        write_atomic(splits / f"{part}.txt", "".join(p + "\n" for p in sorted(paths)))
    summary = summary_of()
    write_summary(out_dir, summary)
    return summary
