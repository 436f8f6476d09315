"""Everything a run writes into the output folder, each file written atomically.

``manifest.jsonl``  one JSON object per input file (kept and dropped), sorted by source
``splits/<part>.txt`` one kept output path (relative to OUTPUT) per line, sorted
``midi/<part>/<id><suffix>.mid`` normalized kept files (suffix "" for the main output, e.g.
                    ".t+3" for an augmentation copy)
``summary.json``    counts per stage and reason, timings, options fingerprints, split ratios

Normalized files are rendered by the workers into ``.staging/`` and moved into place once the
split is known; files already in place with the same output fingerprint are reused (or moved
when their part changed). Anything under ``midi/`` that the run did not place is removed: the
output folder is ours.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Iterable

import numpy as np

from .errors import OutputError

STAGING = ".staging"
ENCODER_VERSION = 1
DEFAULT_PART = "all"

#: Manifest fields of the contract, in the order they are written; other measures follow sorted.
CONTRACT_FIELDS = (
    "id", "source", "sha256", "status", "stage", "reason", "detail",
    "tonic", "tonic_pc", "mode", "key_confidence", "meter", "meter_source", "transpose",
    "duration_s", "notes", "notes_per_s", "cluster", "duplicate_of", "similarity", "split", "output",
)


def write_atomic(path: Path, data: bytes | str, *, fsync: bool = True) -> None:
    """Write to a temporary name in the same folder, fsync, then rename over ``path``: readers
    see the old file or the new one, never a part. ``fsync=False`` for staged files, which the
    run flushes with one ``os.sync()`` before it records them."""
    path = Path(path)
    raw = data.encode("utf-8") if isinstance(data, str) else data
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        try:
            with os.fdopen(fd, "wb") as fh:
                fh.write(raw)
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


def output_fingerprint(stages: list) -> str:
    """What the normalized bytes depend on: the encoder version and the transpose options."""
    tr = next((s.fingerprint for s in stages if s.name == "transpose"), "none")
    return hashlib.sha256(f"encoder{ENCODER_VERSION}:{tr}".encode()).hexdigest()[:16]


def render(piece: Any, stage_plans: list, transpose_values: dict | None, staging: str, stem: str
           ) -> list[tuple[str, str]]:
    """Encode the normalized output(s) of one piece into the staging folder (worker side)."""
    from .encode import encode
    versions: list[tuple[str, Any, int]]
    tplan = next((p for p in stage_plans if p.name == "transpose"), None)
    if tplan is not None and transpose_values is not None:
        from .stages.transpose import Transpose
        versions = Transpose.output_notes(piece, transpose_values)
    else:
        versions = [("", piece.notes, 0)]
    staged = []
    folder = Path(staging)
    for suffix, notes, semitones in versions:
        dst = folder / f"{stem}{suffix}.mid"
        out_piece = piece if semitones == 0 else replace(
            piece, key_signatures=shift_key_signatures(piece.key_signatures, semitones))
        write_atomic(dst, encode(out_piece, notes), fsync=False)
        staged.append((suffix, str(dst)))
    return staged


def shift_key_signatures(keys: Any, semitones: int) -> Any:
    """Key-signature events of a piece transposed by ``semitones``, so a normalized file declares
    the key it is now in. A signature's major tonic is ``7 * sharps`` (mod 12) on the circle of
    fifths (minor shares its relative major's signature), so the new signature is
    ``sharps + 7 * semitones`` (mod 12), written in the range -5..+6 (F# major, not Gb)."""
    out = keys.copy()
    if len(out):
        s = (out["sharps"].astype(int) + 7 * semitones) % 12
        out["sharps"] = np.where(s > 6, s - 12, s)
    return out


def existing_outputs(ledger: Any, out_dir: Path, fp: str) -> dict[str, list[str]]:
    """sha256 -> output paths (relative to OUTPUT) already on disk with this fingerprint."""
    found: dict[str, list[str]] = {}
    for rel, (sha, ofp) in ledger.outputs().items():
        if ofp == fp and (out_dir / rel).is_file():
            found.setdefault(sha, []).append(rel)
    return found


@dataclass
class Placed:
    """Where the kept contents' outputs ended up."""

    parts: dict[str, list[str]] = field(default_factory=dict)  # part -> output paths
    main: dict[str, str] = field(default_factory=dict)  # sha -> main output path
    all_of: dict[str, list[str]] = field(default_factory=dict)  # sha -> every output path


def _suffix_of(rel: str) -> str:
    name = Path(rel).name
    return name[16:-4]


def place(ledger: Any, out_dir: Path, walk: Any, rep: dict[str, str], existing: dict[str, list[str]],
          fp: str) -> Placed:
    """Move staged/existing normalized files to ``midi/<part>/`` and drop everything else."""
    placed = Placed()
    rows = []
    from_staging = False
    made: set[Path] = set()
    for sha in rep:
        if walk.status.get(sha) is not None:
            continue
        part = walk.values[sha].get("split") or DEFAULT_PART
        sources: dict[str, Path] = {}
        for rel in existing.get(sha, []):
            sources[_suffix_of(rel)] = out_dir / rel
        for suffix, staged in walk.staged.get(sha, []):
            if suffix not in sources:
                sources[suffix] = Path(staged)
        paths = []
        for suffix in sorted(sources, key=lambda s: (s != "", s)):
            rel = f"midi/{part}/{sha[:16]}{suffix}.mid"
            dst = out_dir / rel
            src = sources[suffix]
            if src != dst:
                try:
                    if dst.parent not in made:
                        dst.parent.mkdir(parents=True, exist_ok=True)
                        made.add(dst.parent)
                    os.replace(src, dst)
                except OSError as e:
                    raise OutputError(f"cannot move a normalized file into place ({e.strerror})", file=str(dst)) from None
                from_staging = True
            paths.append(rel)
            rows.append((rel, sha, fp))
        if paths:
            placed.main[sha] = paths[0]
            placed.all_of[sha] = paths
            placed.parts.setdefault(part, []).extend(paths)
    if from_staging:
        os.sync()  # staged files were written without fsync; flush them once before recording them
    keep = {r[0] for r in rows}
    midi = out_dir / "midi"
    if midi.is_dir():
        _prune(midi, "midi", keep)
    shutil.rmtree(out_dir / STAGING, ignore_errors=True)
    recorded = ledger.outputs()
    if recorded != {rel: (sha, ofp) for rel, sha, ofp in rows}:  # unchanged: nothing to write
        with ledger.batch():
            ledger.forget_outputs(list(recorded))
            ledger.put_outputs(rows)
    for part in placed.parts:
        placed.parts[part].sort()
    return placed


def _prune(folder: Path, rel: str, keep: set[str]) -> bool:
    """Remove every file below ``folder`` whose path relative to OUTPUT (``rel`` is the
    folder's) is not in ``keep``, then the folders left empty; True if ``folder`` is now empty.
    Symlinks are removed like files and never followed (as ``Path.rglob`` does not)."""
    empty = True
    with os.scandir(folder) as it:
        entries = sorted(it, key=lambda e: e.name)
    for e in entries:
        path = f"{rel}/{e.name}"
        if e.is_dir(follow_symlinks=False):
            if _prune(Path(e.path), path, keep):
                os.rmdir(e.path)
            else:
                empty = False
        elif path in keep:
            empty = False
        else:
            os.unlink(e.path)
    return empty


def _kept_detail(trail: list, part: str | None) -> str:
    stages = ", ".join(s["stage"] for s in trail)
    where = f"; placed in {part}" if part else ""
    return f"kept: passed {stages}{where}"


def manifest_row(f: Any, walk: Any, placed: Placed) -> dict[str, Any]:
    """The manifest object of one source file."""
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
    return row


def build_manifest(files: list, rep: dict, walk: Any, placed: Placed, stages: list
                   ) -> tuple[list[dict], dict[str, Any]]:
    """Manifest rows sorted by source, plus kept/dropped counts."""
    rows = [manifest_row(f, walk, placed) for f in files]
    rows.sort(key=lambda r: r["source"])
    dropped: dict[tuple[str, str], int] = {}
    kept = 0
    for r in rows:
        if r["status"] == "kept":
            kept += 1
        else:
            key = (r["stage"], r["reason"])
            dropped[key] = dropped.get(key, 0) + 1
    return rows, {"kept": kept, "dropped_by": dropped}


def build_summary(rows: list[dict], walk: Any, stages: list, timings: dict, computed: int, reused: int,
                  placed: Placed, cfg: Any) -> dict[str, Any]:
    """summary.json: counts per stage and reason, split counts and ratios, timings, fingerprints."""
    per_stage: dict[str, dict[str, Any]] = {}
    reached: dict[str, int] = {s.name: 0 for s in stages}
    for r in rows:
        for step in walk.trail_of(r["source"], r["sha256"]):
            reached[step["stage"]] = reached.get(step["stage"], 0) + 1
    for s in stages:
        per_stage[s.name] = {"reached": reached.get(s.name, 0), "dropped": {}}
    for r in rows:
        if r["status"] == "dropped":
            d = per_stage.setdefault(r["stage"], {"reached": 0, "dropped": {}})["dropped"]
            d[r["reason"]] = d.get(r["reason"], 0) + 1
    kept_rows = [r for r in rows if r["status"] == "kept"]
    part_counts: dict[str, int] = {}
    for r in kept_rows:
        part_counts[r["split"]] = part_counts.get(r["split"], 0) + 1
    total_kept = max(1, len(kept_rows))
    split_stage = next((s for s in stages if s.name == "split"), None)
    split_info = {"files": part_counts,
                  "outputs": {p: len(v) for p, v in sorted(placed.parts.items())},
                  "ratios": {p: round(n / total_kept, 6) for p, n in sorted(part_counts.items())}}
    if split_stage is not None:
        split_info["targets"] = split_stage.opts.get("ratios")
        split_info.update(walk.states.get("split", {}).get("summary", {}) and
                          {"stage": walk.states["split"]["summary"]})
    counts = {"files": len(rows), "kept": len(kept_rows), "dropped": len(rows) - len(kept_rows),
              "contents": len({r["sha256"] for r in rows}), "computed": computed, "reused": reused}
    return {
        "counts": counts,
        "stages": per_stage,
        "split": split_info,
        "notes": walk.notes,
        "timings_s": {k: round(v, 4) for k, v in timings.items()},
        "fingerprints": {s.name: s.fingerprint for s in stages},
        "options": {s.name: s.opts for s in stages},
        "input": str(cfg.input), "output": str(cfg.output),
    }


def _jsonl(rows: Iterable[dict]) -> str:
    return "".join(json.dumps(r, ensure_ascii=False, separators=(", ", ": "), default=_default) + "\n" for r in rows)


def _default(value: Any) -> Any:
    try:
        import numpy as np
        if isinstance(value, np.generic):
            return value.item()
        if isinstance(value, np.ndarray):
            return value.tolist()
    except ImportError:  # pragma: no cover
        pass
    raise TypeError(f"not JSON-serialisable: {type(value).__name__}")


def write_all(out_dir: Path, rows: list[dict], placed: Placed, summary: dict) -> None:
    """Write manifest, split lists and summary (each atomically; stale split lists removed)."""
    write_atomic(out_dir / "manifest.jsonl", _jsonl(rows))
    splits = out_dir / "splits"
    splits.mkdir(parents=True, exist_ok=True)
    wanted = {f"{p}.txt" for p in placed.parts}
    for p in splits.glob("*.txt"):
        if p.name not in wanted:
            p.unlink()
    for part, paths in sorted(placed.parts.items()):
        write_atomic(splits / f"{part}.txt", "".join(p + "\n" for p in sorted(paths)))
    write_summary(out_dir, summary)


def write_summary(out_dir: Path, summary: dict) -> None:
    """Write summary.json (atomically)."""
    write_atomic(out_dir / "summary.json", json.dumps(summary, indent=2, sort_keys=True, default=_default) + "\n")
