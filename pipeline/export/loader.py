"""Reading an export folder back: ``(key, array)`` pairs of one part, one shard open at a time.

    from pipeline.export import open_export
    ex = open_export("out/demo", "pianoroll")        # or the folder out/demo/export/pianoroll
    for key, roll in ex.iter_part("train"):          # key: the file's id (+ a copy's suffix)
        print(key, roll.shape)                       # (frames, pitches) uint8 velocities

``np.load`` of an ``.npz`` reads an array only when it is asked for, so memory holds one
piece's array at a time (plus the index, a few hundred bytes a piece). Every array served is
checked against its index line (shape and dtype): a shard that is not the one the index
describes is an error naming it, never a silently wrong array. An export made before its output
folder's last run is refused (``freshness``): that run may have moved files between parts.
"""
from __future__ import annotations

import json
import zipfile
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from ..errors import MidisiftError, UsageError
from .build import FORMATS, LAYOUT, array_matches
from .freshness import REEXPORT, output_folder_of, output_state

DRUMS_SUFFIX = ".drums"
RERUN = "rerun `midisift export` to write it again"


class ExportFolder:
    """An ``OUTPUT/export/<format>/`` folder: its index, options and (events) vocabulary."""

    def __init__(self, folder: Path | str, *, stale_ok: bool = False):
        self.folder = Path(folder)
        index = self.folder / "index.jsonl"
        if not index.is_file():
            raise UsageError("not an export folder (no index.jsonl); run `midisift export` first",
                             file=str(self.folder))
        with open(index, encoding="utf-8") as fh:
            self.entries: list[dict[str, Any]] = [json.loads(line) for line in fh if line.strip()]
        meta = self._json("export.json")
        if meta is None:
            raise MidisiftError(f"export.json is missing beside index.jsonl (an export was stopped before "
                                f"writing it); {RERUN}", file=str(self.folder))
        self.meta: dict[str, Any] = meta
        self.vocabulary: dict[str, Any] | None = self._json("vocabulary.json")
        self._check_consistent()
        if not stale_ok:
            self._check_current()
        self._by_key = {e["key"]: e for e in self.entries}

    def _json(self, name: str) -> dict[str, Any] | None:
        path = self.folder / name
        if not path.is_file():
            return None
        try:
            return json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as e:
            raise MidisiftError(f"cannot read {name} ({e}); {RERUN}", file=str(path)) from None

    def _check_consistent(self) -> None:
        """The index, export.json and vocabulary.json are of one export, in the current layout."""
        if self.meta.get("layout") != LAYOUT:
            raise UsageError(f"this export was written by an older midisift (layout {self.meta.get('layout', 1)}, "
                             f"now {LAYOUT}) and cannot be checked against its shards; {RERUN}",
                             file=str(self.folder))
        fp = self.meta.get("fingerprint")
        others = {e.get("fingerprint") for e in self.entries} - {fp}
        if self.vocabulary is not None and self.vocabulary.get("fingerprint") != fp:
            others.add(self.vocabulary.get("fingerprint"))
        if others:
            raise MidisiftError("index.jsonl, export.json and vocabulary.json are of different exports (an "
                                f"export was stopped while it replaced them); {RERUN}", file=str(self.folder))

    def _check_current(self) -> None:
        """The export describes its output folder as the folder's last run left it
        (``freshness``): a run since may have moved files between parts or removed them."""
        out_dir = output_folder_of(self.folder)
        if out_dir is None or not (out_dir / "summary.json").is_file():
            return  # an export moved away from its output folder: nothing to hold it against
        if self.meta.get("output_state") != output_state(out_dir):
            why = ("was written by a midisift before 0.4.8, which did not record the run it was made from"
                   if "output_state" not in self.meta else
                   "was made before the output folder's last run, which may have added, removed or "
                   "moved files between parts")
            raise MidisiftError(f"this export {why}; "
                                + REEXPORT.format(out=out_dir, fmt=self.meta.get("format", self.folder.name))
                                + ", or open it with stale_ok=True to read it as it is", file=str(self.folder))

    @property
    def format(self) -> str:
        return self.meta.get("format", self.folder.name)

    @property
    def options(self) -> dict[str, Any]:
        return self.meta.get("options", {})

    @property
    def parts(self) -> list[str]:
        """Every configured part in the config's order, empty ones included (export.json)."""
        listed = list(self.meta.get("parts") or ())
        return listed + [p for p in dict.fromkeys(e["part"] for e in self.entries) if p not in listed]

    def __len__(self) -> int:
        return len(self.entries)

    def iter_part(self, part: str | None = None, *, drums: bool = False) -> Iterator[tuple[str, np.ndarray]]:
        """``(key, array)`` for every piece of ``part`` (every part when None), in index order;
        ``drums=True`` gives the drum arrays instead (an export made with ``--drums apart``).
        A configured part with no piece gives nothing; an unknown part is a UsageError."""
        if part is not None and part not in self.parts:
            raise UsageError(f"no part {part!r} in this export; parts: {', '.join(self.parts) or 'none'}",
                             file=str(self.folder))
        chosen = [e for e in self.entries if part is None or e["part"] == part]
        if drums and chosen and "drums_key" not in chosen[0]:
            raise UsageError("this export has no drum arrays (made without --drums apart)", file=str(self.folder))
        by_file: dict[str, list[dict]] = {}
        for e in chosen:
            by_file.setdefault(e["file"], []).append(e)
        for shard, group in by_file.items():
            with self._open(shard) as z:
                for e in group:
                    yield (e["key"], self._array(z, shard, e, drums))

    def load(self, key: str) -> np.ndarray:
        """One piece's array by its key; ``<key>.drums`` gives its drum array (``--drums apart``)."""
        e = self._by_key.get(key)
        drums = False
        if e is None and key.endswith(DRUMS_SUFFIX):
            e = self._by_key.get(key[:-len(DRUMS_SUFFIX)])
            drums = True
            if e is not None and "drums_key" not in e:
                raise UsageError("this export has no drum arrays (made without --drums apart)",
                                 file=str(self.folder))
        if e is None:
            raise KeyError(key)
        with self._open(e["file"]) as z:
            return self._array(z, e["file"], e, drums)

    def _open(self, shard: str) -> Any:
        path = self.folder / shard
        try:
            return np.load(path)
        except FileNotFoundError:
            raise MidisiftError(f"a shard index.jsonl names is missing; {RERUN}", file=str(path)) from None
        except (OSError, ValueError, zipfile.BadZipFile) as e:
            raise MidisiftError(f"cannot read this shard ({e}); {RERUN}", file=str(path)) from None

    def _array(self, z: Any, shard: str, e: dict[str, Any], drums: bool) -> np.ndarray:
        """The array of index line ``e`` from the open shard, checked against the line."""
        name = e["drums_key"] if drums else e["key"]
        shape = e["drums_shape"] if drums else e["shape"]
        where = str(self.folder / shard)
        try:
            arr = z[name]
        except KeyError:
            raise MidisiftError(f"the shard has no array {name!r}, which index.jsonl places there; {RERUN}",
                                file=where) from None
        except (OSError, ValueError, zipfile.BadZipFile) as err:  # ``e`` is the index line
            raise MidisiftError(f"cannot read array {name!r} ({err}); {RERUN}", file=where) from None
        if not array_matches(arr, e, drums=drums):
            raise MidisiftError(f"array {name!r} is {list(arr.shape)} {arr.dtype} where index.jsonl says "
                                f"{list(shape)} {e['dtype']}: the shard is not the one the index describes; "
                                f"{RERUN}", file=where)
        return arr


def open_export(path: Path | str, format: str | None = None, *, stale_ok: bool = False) -> ExportFolder:
    """Open an export: ``path`` is the format folder itself, or the output folder with
    ``format`` ("pianoroll" or "events"); a folder holding another format is a UsageError.
    An export made before its output folder's last run is refused (``freshness``) unless
    ``stale_ok``."""
    path = Path(path)
    if format is not None and format not in FORMATS:
        raise UsageError(f"unknown format {format!r}; use one of: {', '.join(FORMATS)}")
    if format is not None and not (path / "index.jsonl").is_file():
        path = path / "export" / format
    ex = ExportFolder(path, stale_ok=stale_ok)
    if format is not None and ex.format != format:
        raise UsageError(f"this export is of format {ex.format!r}, not {format!r}; open "
                         f"{path.parent / format} or run `midisift export --format {format}`", file=str(path))
    return ex
