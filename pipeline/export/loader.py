"""Reading an export folder back: ``(key, array)`` pairs of one part, one shard open at a time.

    from pipeline.export import open_export
    ex = open_export("out/demo", "pianoroll")        # or the folder out/demo/export/pianoroll
    for key, roll in ex.iter_part("train"):          # key: the file's id (+ a copy's suffix)
        print(key, roll.shape)                       # (frames, pitches) uint8 velocities

``np.load`` of an ``.npz`` reads an array only when it is asked for, so memory holds one
piece's array at a time (plus the index, a few hundred bytes a piece).
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from ..errors import UsageError


class ExportFolder:
    """An ``OUTPUT/export/<format>/`` folder: its index, options and (events) vocabulary."""

    def __init__(self, folder: Path | str):
        self.folder = Path(folder)
        index = self.folder / "index.jsonl"
        if not index.is_file():
            raise UsageError("not an export folder (no index.jsonl); run `midisift export` first",
                             file=str(self.folder))
        with open(index, encoding="utf-8") as fh:
            self.entries: list[dict[str, Any]] = [json.loads(line) for line in fh if line.strip()]
        meta = self.folder / "export.json"
        self.meta: dict[str, Any] = json.loads(meta.read_text(encoding="utf-8")) if meta.is_file() else {}
        vocab = self.folder / "vocabulary.json"
        self.vocabulary: dict[str, Any] | None = (json.loads(vocab.read_text(encoding="utf-8"))
                                                  if vocab.is_file() else None)

    @property
    def format(self) -> str:
        return self.meta.get("format", self.folder.name)

    @property
    def options(self) -> dict[str, Any]:
        return self.meta.get("options", {})

    @property
    def parts(self) -> list[str]:
        """The parts in index order (the config's order)."""
        return list(dict.fromkeys(e["part"] for e in self.entries))

    def __len__(self) -> int:
        return len(self.entries)

    def iter_part(self, part: str | None = None, *, drums: bool = False) -> Iterator[tuple[str, np.ndarray]]:
        """``(key, array)`` for every piece of ``part`` (every part when None), in index order;
        ``drums=True`` gives the drum arrays instead (an export made with ``--drums apart``)."""
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
            with np.load(self.folder / shard) as z:
                for e in group:
                    yield e["key"], z[e["drums_key"] if drums else e["key"]]

    def load(self, key: str) -> np.ndarray:
        """One piece's array by its key."""
        for e in self.entries:
            if e["key"] == key:
                with np.load(self.folder / e["file"]) as z:
                    return z[key]
        raise KeyError(key)


def open_export(path: Path | str, format: str | None = None) -> ExportFolder:
    """Open an export: ``path`` is the format folder itself, or the output folder with
    ``format`` ("pianoroll" or "events")."""
    path = Path(path)
    if format is not None and not (path / "index.jsonl").is_file():
        path = path / "export" / format
    return ExportFolder(path)
