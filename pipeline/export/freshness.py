"""Whether an export still describes its output folder.

An export holds the normalized files of one state of its output folder: a later run may add,
drop or move files between parts (and an export read then would hand test material to a
training loop, or files removed from the input). ``output_state`` names that state.
``midisift export`` records it in export.json (``output_state``); the loader refuses an export
whose recorded state is not the folder's, and ``midisift run`` names the exports it left
behind. The state is what the exported arrays depend on: the split lists' bytes (which
normalized file is in which part; a file's name holds its content's id) and the output key
(summary.json's ``counts.output_key``: what the normalized bytes depend on beyond their
sources, the encoder and the options of the stages that shape the outputs). A run that only
adds a file it drops, or changes a filter limit that drops nothing, leaves an export current.
"""
from __future__ import annotations

import hashlib
from pathlib import Path

from ..store.atomic import read_json_object

#: What the loader and the run advise for an export that no longer describes its folder.
REEXPORT = "rerun `midisift export {out} --format {fmt}` (it keeps the arrays of unchanged files)"


def output_state(out_dir: Path) -> str | None:
    """The state of a finished output folder that an export depends on (module docstring);
    None when the folder has no summary.json (an export folder moved away from its output
    folder cannot be checked)."""
    summary = read_json_object(out_dir / "summary.json")
    if summary is None:
        return None
    h = hashlib.sha256(f"output {(summary.get('counts') or {}).get('output_key')}".encode())
    splits = out_dir / "splits"
    for path in sorted(splits.glob("*.txt")) if splits.is_dir() else ():
        h.update(b"\0" + path.name.encode("utf-8", "surrogateescape") + b"\0" + path.read_bytes())
    return h.hexdigest()[:16]


def output_folder_of(export_folder: Path) -> Path | None:
    """The output folder an ``OUTPUT/export/<format>/`` folder belongs to, or None when the
    folder does not lie there."""
    return export_folder.parent.parent if export_folder.parent.name == "export" else None


def stale_exports(out_dir: Path) -> list[str]:
    """A line for each export under ``out_dir/export/`` whose recorded state is not the
    folder's (after a run changed it)."""
    folder = out_dir / "export"
    if not folder.is_dir():
        return []
    now = output_state(out_dir)
    lines = []
    for meta_path in sorted(folder.glob("*/export.json")):
        meta = read_json_object(meta_path) or {}
        if meta.get("output_state") != now:
            fmt = meta_path.parent.name
            lines.append(f"export: {meta_path.parent} describes an earlier state of this folder "
                         f"(this run changed which normalized files are in which part, or how they "
                         f"are written); its loader refuses it until you "
                         + REEXPORT.format(out=out_dir, fmt=fmt))
    return lines
