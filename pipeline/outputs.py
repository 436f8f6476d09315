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

import functools
import hashlib
import json
import os
import shutil
import tempfile
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator

from .errors import OutputError

STAGING = ".staging"
ENCODER_VERSION = 2
DEFAULT_PART = "all"

#: Manifest fields of the contract, in the order they are written; other measures follow sorted.
CONTRACT_FIELDS = (
    "id", "source", "title", "sha256", "status", "stage", "reason", "detail",
    "tonic", "tonic_pc", "mode", "key_confidence", "meter", "meter_source", "transpose",
    "duration_s", "notes", "notes_per_s", "cluster", "duplicate_of", "similarity", "split", "output",
)


@functools.cache
def _file_mode() -> int:
    """The mode a plain ``open()`` gives a new file: 0o666 less the process's umask (read once;
    os.umask can only be read by setting it). ``mkstemp`` would leave 0o600."""
    mask = os.umask(0o022)
    os.umask(mask)
    return 0o666 & ~mask


def write_atomic(path: Path, data: bytes | str | Iterable[str], *, fsync: bool = True) -> None:
    """Write to a temporary name in the same folder, fsync, then rename over ``path``: readers
    see the old file or the new one, never a part. ``data`` may be an iterable of text chunks
    (streamed: the manifest of a million files is never one string in memory). ``fsync=False``
    skips the flush where the file may be lost to a power cut (the up-to-date summary)."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        try:
            if hasattr(os, "fchmod"):
                os.fchmod(fd, _file_mode())  # follow the umask like any tool's output
            with os.fdopen(fd, "wb") as fh:
                if isinstance(data, (bytes, bytearray, memoryview)):
                    fh.write(data)
                elif isinstance(data, str):
                    fh.write(data.encode("utf-8"))
                else:
                    buf: list[str] = []
                    size = 0
                    for chunk in data:
                        buf.append(chunk)
                        size += len(chunk)
                        if size >= 1 << 20:
                            fh.write("".join(buf).encode("utf-8"))
                            buf, size = [], 0
                    fh.write("".join(buf).encode("utf-8"))
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


def staged_path(staging: str, sha: str, output_fp: str, suffix: str) -> str:
    """Where a worker stages one normalized output of a content (the name ties it to the
    content and the output fingerprint; ``suffix`` is "" or an augmentation copy's, e.g. ".t+3")."""
    return os.path.join(staging, f"{sha[:16]}_{output_fp[:8]}{suffix}.mid")


#: In the staging folder: one line per content whose staged outputs are complete
#: ("sha256<TAB>output fingerprint<TAB>suffix,suffix..."), appended by the main process after a
#: worker returned them, so a run that was stopped leaves its finished renders usable.
STAGED_LIST = "staged.txt"


def record_staged(out_dir: Path, fp: str, items: Iterable[tuple[str, tuple[str, ...]]]) -> None:
    """Append finished staged outputs to the staging folder's list (no fsync: a line lost to
    a power cut only means that content is rendered again)."""
    lines = "".join(f"{sha}\t{fp}\t{','.join(suffixes)}\n" for sha, suffixes in items)
    if not lines:
        return
    path = out_dir / STAGING / STAGED_LIST
    try:
        with open(path, "a", encoding="utf-8") as fh:
            fh.write(lines)
    except OSError as e:
        raise OutputError(f"cannot write ({e.strerror}); check free space and permissions of the "
                          "output folder", file=str(path)) from None


def staged_outputs(out_dir: Path, fp: str) -> dict[str, tuple[str, ...]]:
    """sha256 -> suffixes of the complete staged outputs an interrupted run left for output
    fingerprint ``fp`` (listed in ``STAGED_LIST`` and all still on disk); other leftovers are
    ignored and removed when the run places its outputs."""
    path = out_dir / STAGING / STAGED_LIST
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return {}
    staging = str(out_dir / STAGING)
    try:
        on_disk = set(os.listdir(staging))
    except OSError:
        return {}
    found: dict[str, tuple[str, ...]] = {}
    for line in text.splitlines():
        parts = line.split("\t")
        if len(parts) != 3 or parts[1] != fp or len(parts[0]) != 64:
            continue  # another fingerprint, or a line cut short when the run stopped
        sha, suffixes = parts[0], tuple(parts[2].split(",")) if parts[2] else ("",)
        if all(os.path.basename(staged_path(staging, sha, fp, x)) in on_disk for x in suffixes):
            found[sha] = suffixes
    return found


def render(piece: Any, stage_plans: list, transpose_values: dict | None, staging: str, sha: str,
           output_fp: str) -> tuple[str, ...]:
    """Encode the normalized output(s) of one piece into the staging folder (worker side);
    returns their suffixes (``staged_path`` gives each file's path). The outputs keep the
    piece's control, pitch-bend, aftertouch and program-change events and its text-like metas
    unless transpose's ``notes_only`` is set; a transposition moves only notes (and the key
    numbers of polyphonic aftertouch on pitched channels) and key signatures."""
    from .encode import encode
    versions: list[tuple[str, Any, int]]
    tplan = next((p for p in stage_plans if p.name == "transpose"), None)
    if tplan is not None and tplan.options.get("notes_only"):
        piece = replace(piece, controls=piece.controls[:0], texts=())
    if tplan is not None and transpose_values is not None:
        from .stages.transpose import Transpose
        versions = Transpose.output_notes(piece, transpose_values)
    else:
        versions = [("", piece.notes, 0)]
    for suffix, notes, semitones in versions:
        out_piece = piece if semitones == 0 else replace(
            piece, key_signatures=shift_key_signatures(piece.key_signatures, semitones),
            controls=shift_controls(piece.controls, semitones))
        _write_staged(Path(staged_path(staging, sha, output_fp, suffix)), encode(out_piece, notes))
    return tuple(suffix for suffix, _, _ in versions)


def _write_staged(path: Path, data: bytes) -> None:
    """A staged file is written in place, without the temporary name of ``write_atomic``: it
    is used only once its worker has returned (a file left half-written by a killed worker is
    never placed, and the staging folder is removed after placing)."""
    try:
        try:
            fh = open(path, "wb")
        except FileNotFoundError:  # the first file of a run makes the staging folder
            path.parent.mkdir(parents=True, exist_ok=True)
            fh = open(path, "wb")
        with fh:
            fh.write(data)
    except OSError as e:
        raise OutputError(f"cannot write ({e.strerror}); check free space and permissions of the output folder",
                          file=str(path)) from None


def shift_key_signatures(keys: Any, semitones: int) -> Any:
    """Key-signature events of a piece transposed by ``semitones``, so a normalized file declares
    the key it is now in. A signature's major tonic is ``7 * sharps`` (mod 12) on the circle of
    fifths (minor shares its relative major's signature), so the new signature is
    ``sharps + 7 * semitones`` (mod 12), written in the range -5..+6 (F# major, not Gb)."""
    import numpy as np
    out = keys.copy()
    if len(out):
        s = (out["sharps"].astype(int) + 7 * semitones) % 12
        out["sharps"] = np.where(s > 6, s - 12, s)
    return out


def shift_controls(controls: Any, semitones: int) -> Any:
    """Channel events of a piece transposed by ``semitones``: only polyphonic aftertouch
    carries a key number (data1), moved as its notes are on pitched channels (beyond 0..127
    folded back by octaves, as ``analysis.transpose.shift_notes`` folds notes); controller
    values, pitch bends and the drum channel stay as they are."""
    if not semitones or not len(controls) or not (controls["kind"] == 0xA0).any():
        return controls  # the usual case: no polyphonic aftertouch
    import numpy as np

    from .score import DRUM_CHANNEL
    poly = (controls["kind"] == 0xA0) & (controls["channel"] != DRUM_CHANNEL)
    out = controls.copy()
    from .analysis.transpose import fold_octaves
    out["data1"][poly] = fold_octaves(out["data1"][poly].astype(np.int64) + int(semitones))
    return out


def existing_outputs(out_dir: Path, fp: str, recorded: dict[str, tuple[str, str]]) -> dict[str, list[str]]:
    """sha256 -> output paths (relative to OUTPUT) already on disk with this fingerprint, of
    those the ledger records (``recorded``: path -> (sha256, fingerprint))."""
    found: dict[str, list[str]] = {}
    mine = {rel: sha for rel, (sha, ofp) in recorded.items() if ofp == fp}
    on_disk = present_files(out_dir, mine)
    for rel, sha in mine.items():
        if rel in on_disk:
            found.setdefault(sha, []).append(rel)
    return found


def present_files(out_dir: Path, rels: Iterable[str]) -> set[str]:
    """The paths (relative to ``out_dir``, "/"-separated) that are files on disk, listing each
    folder once instead of one stat per file (a rerun of 100,000 files checks them all)."""
    listed: dict[str, set[str]] = {}
    base = str(out_dir)
    found: set[str] = set()
    for rel in rels:
        folder, _, name = rel.rpartition("/")
        names = listed.get(folder)
        if names is None:
            try:
                with os.scandir(os.path.join(base, folder) if folder else base) as it:
                    names = {e.name for e in it if e.is_file()}
            except OSError:
                names = set()
            listed[folder] = names
        if name in names:
            found.add(rel)
    return found


@dataclass
class Placed:
    """Where the kept contents' outputs ended up."""

    parts: dict[str, list[str]] = field(default_factory=dict)  # part -> output paths
    main: dict[str, str] = field(default_factory=dict)  # sha -> main output path
    all_of: dict[str, list[str]] = field(default_factory=dict)  # sha -> every output path
    part_of: dict[str, str] = field(default_factory=dict)  # sha -> part, for every kept content


def _suffix_of(rel: str) -> str:
    name = rel.rsplit("/", 1)[-1]
    return name[16:-4]


def place(ledger: Any, out_dir: Path, walk: Any, rep: dict[str, str], existing: dict[str, list[str]],
          fp: str, recorded: dict[str, tuple[str, str]]) -> Placed:
    """Move staged/existing normalized files to ``midi/<part>/`` and drop everything else;
    ``recorded`` is the ledger's table of outputs as the run found it."""
    placed = Placed()
    rows = []
    moved: list[str] = []
    made: set[str] = set()
    base = str(out_dir)  # speed: plain strings, no Path object per file
    staging = str(out_dir / STAGING)
    for sha in rep:
        if walk.status.get(sha) is not None:
            continue
        part = placed.part_of[sha] = walk.value_of(sha, "split") or DEFAULT_PART
        sources: dict[str, str] = {}
        for rel in existing.get(sha, []):
            sources[_suffix_of(rel)] = os.path.join(base, rel)
        for suffix in walk.staged.get(sha, ()):
            if suffix not in sources:
                sources[suffix] = staged_path(staging, sha, fp, suffix)
        paths = []
        for suffix in sorted(sources, key=lambda s: (s != "", s)):
            rel = f"midi/{part}/{sha[:16]}{suffix}.mid"
            dst = os.path.join(base, rel)
            src = sources[suffix]
            if src != dst:
                try:
                    parent = os.path.dirname(dst)
                    if parent not in made:
                        os.makedirs(parent, exist_ok=True)
                        made.add(parent)
                    os.replace(src, dst)
                except OSError as e:
                    raise OutputError(f"cannot move a normalized file into place ({e.strerror})", file=dst) from None
                moved.append(dst)
            paths.append(rel)
            rows.append((rel, sha, fp))
        if paths:
            placed.main[sha] = paths[0]
            placed.all_of[sha] = paths
            placed.parts.setdefault(part, []).extend(paths)
    _flush_moved(moved, made)
    keep = {r[0] for r in rows}
    midi = out_dir / "midi"
    if midi.is_dir():
        _prune(midi, "midi", keep)
    shutil.rmtree(out_dir / STAGING, ignore_errors=True)
    wanted = {rel: (sha, ofp) for rel, sha, ofp in rows}
    if recorded != wanted:  # write only what changed (a rerun adds a few outputs to thousands)
        with ledger.batch():
            ledger.forget_outputs([rel for rel in recorded if rel not in wanted])
            ledger.put_outputs([(rel, *v) for rel, v in wanted.items() if recorded.get(rel) != v])
    for part in placed.parts:
        placed.parts[part].sort()
    return placed


#: Up to this many newly placed files are flushed one by one; more, with one ``os.sync()``.
FSYNC_EACH_UP_TO = 256


def _flush_moved(moved: list[str], folders: set[str]) -> None:
    """Staged files are written without fsync; flush the ones just placed before the ledger
    records them. A rerun that adds a few files syncs those files and their folders (``os.sync``
    also flushes everything else waiting for the disk: 130 ms after copying a 100 MB folder);
    a run that placed many syncs once."""
    if not moved:
        return
    if len(moved) > FSYNC_EACH_UP_TO:
        os.sync()
        return
    for path in moved:
        try:
            fd = os.open(path, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        except OSError as e:
            raise OutputError(f"cannot flush a normalized file to disk ({e.strerror}); check the "
                              "disk and rerun", file=path) from None
    for folder in sorted({os.path.dirname(p) for p in moved} | folders):
        try:  # the renames into them; some platforms cannot open or sync a folder: then skip
            fd = os.open(folder, os.O_RDONLY)
        except OSError:
            continue
        try:
            os.fsync(fd)
        except OSError:
            pass
        finally:
            os.close(fd)


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


@dataclass
class Tally:
    """What the summary counts, gathered while the manifest rows stream past."""

    files: int = 0
    kept: int = 0
    dropped_by: dict[tuple[str, str], int] = field(default_factory=dict)
    reached: dict[str, int] = field(default_factory=dict)
    parts: dict[str, int] = field(default_factory=dict)
    contents: set[str] = field(default_factory=set)

    def add(self, row: dict[str, Any], trail: list) -> None:
        """Count a row built in this run."""
        final = None if row["status"] == "kept" else (row["stage"], row["reason"])
        self.count(row["sha256"], final, row["split"], [step["stage"] for step in trail])

    def count(self, sha: str, final: tuple[str, str] | None, part: str | None,
              reached: Iterable[str]) -> None:
        """Count one source: its content, its final (stage, reason) or None when kept, its part
        and the stages it reached."""
        self.files += 1
        self.contents.add(sha)
        for stage in reached:
            self.reached[stage] = self.reached.get(stage, 0) + 1
        if final is None:
            self.kept += 1
            self.parts[part] = self.parts.get(part, 0) + 1
        else:
            self.dropped_by[final] = self.dropped_by.get(final, 0) + 1


def manifest_rows(files: list, walk: Any, placed: Placed, tally: Tally,
                  on_trail: Callable[[Any, dict, list, str | None], None] | None = None,
                  reuse: Any = None, corpus_positions: tuple[int, ...] = ()) -> Iterator[dict[str, Any] | str]:
    """Manifest rows in source order (``files`` is sorted by source), one at a time, counted
    into ``tally``; ``on_trail(file, row, trail, digest)`` sees each built row's trail as it
    passes (the runner records the decisions in the same pass). With ``reuse`` (a
    ``rowreuse.RowReuse``) a source whose row digest is unchanged gets its old manifest line
    (a str) instead, and ``on_trail`` is not called for it: its trail is already recorded."""
    from .rowreuse import line_prefix, row_digest
    old_lines = reuse.lines() if reuse is not None and reuse.usable else None
    pending = next(old_lines, None) if old_lines is not None else None
    for f in files:
        digest = row_digest(f, walk, placed, corpus_positions) if reuse is not None else None
        if old_lines is not None and reuse.old.get(f.rel) == digest and f.sha256 not in reuse.recomputed:
            while pending is not None and pending[0] < f.rel:
                pending = next(old_lines, None)
            if pending is not None and pending[0] == f.rel and pending[1].startswith(line_prefix(f)):
                final = walk.final(f.rel, f.sha256)
                part = None
                if final is None:
                    part = placed.part_of.get(f.sha256) or walk.value_of(f.sha256, "split") or DEFAULT_PART
                tally.count(f.sha256, final, part, walk.reached_names(f.rel, f.sha256))
                yield pending[1]
                continue
        row, trail = manifest_row(f, walk, placed)
        tally.add(row, trail)
        if on_trail is not None:
            on_trail(f, row, trail, digest)
        yield row


def configured_parts(stages: list) -> list[str]:
    """The parts a run writes, in the config's order: the split's ratios, or the one
    ``DEFAULT_PART`` without a split stage."""
    split = next((s for s in stages if s.name == "split"), None)
    return list(split.opts.get("ratios") or ()) if split is not None else [DEFAULT_PART]


def run_warnings(files: int, kept: int, part_files: dict[str, int], parts: list[str]) -> list[str]:
    """What a user must not miss although the run succeeded (exit 0): nothing in, nothing
    kept, a configured part left empty."""
    if files == 0:
        return ["the input folder holds no .mid, .midi, .kar or .rmi file: nothing was done"]
    if kept == 0:
        return ["no file was kept: every file was dropped (see the table above, or summary.json)"]
    return [f"part '{p}' is empty: no kept file was placed in it (too few groups for its ratio?)"
            for p in parts if not part_files.get(p)]


def build_summary(tally: Tally, walk: Any, stages: list, timings: dict, computed: int, reused: int,
                  placed: Placed, cfg: Any) -> dict[str, Any]:
    """summary.json: counts per stage and reason, split counts and ratios, timings, fingerprints."""
    per_stage: dict[str, dict[str, Any]] = {}
    for s in stages:
        per_stage[s.name] = {"reached": tally.reached.get(s.name, 0), "dropped": {}}
    for (stage, reason), n in sorted(tally.dropped_by.items()):
        d = per_stage.setdefault(stage, {"reached": 0, "dropped": {}})["dropped"]
        d[reason] = d.get(reason, 0) + n
    configured = configured_parts(stages)
    every_part = sorted({*configured, *tally.parts, *placed.parts})
    part_counts = {p: tally.parts.get(p, 0) for p in every_part}  # an empty part counts 0
    total_kept = max(1, tally.kept)
    split_stage = next((s for s in stages if s.name == "split"), None)
    split_info = {"files": part_counts,
                  "outputs": {p: len(placed.parts.get(p, ())) for p in every_part},
                  "ratios": {p: round(n / total_kept, 6) for p, n in sorted(part_counts.items())}}
    if split_stage is not None:
        split_info["targets"] = split_stage.opts.get("ratios")
        # the parts in the config's order (summary.json is written with sorted keys)
        split_info["part_order"] = list(split_stage.opts.get("ratios") or ())
        split_info.update(walk.states.get("split", {}).get("summary", {}) and
                          {"stage": walk.states["split"]["summary"]})
    counts = {"files": tally.files, "kept": tally.kept, "dropped": tally.files - tally.kept,
              "contents": len(tally.contents), "computed": computed, "reused": reused}
    return {
        "counts": counts,
        "warnings": run_warnings(tally.files, tally.kept, part_counts, configured),
        "stages": per_stage,
        "split": split_info,
        "notes": walk.notes,
        "timings_s": {k: round(v, 4) for k, v in timings.items()},
        "fingerprints": {s.name: s.fingerprint for s in stages},
        "options": {s.name: s.opts for s in stages},
        "input": str(cfg.input), "output": str(cfg.output),
    }


def _jsonl(rows: Iterable[dict | str]) -> Iterator[str]:
    """JSON lines of the rows; a str is a line reused as it is (it ends in a newline)."""
    dumps = json.dumps
    for r in rows:
        yield r if type(r) is str else dumps(r, ensure_ascii=False, separators=(", ", ": "), default=_default) + "\n"


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


def write_all(out_dir: Path, rows: Iterable[dict | str], placed: Placed,
              summary_of: Callable[[], dict], configured: Iterable[str] = ()) -> dict:
    """Write the manifest (streamed from ``rows``), the split lists, then the summary that
    ``summary_of`` builds once the rows are counted; each file atomically, stale split lists
    removed. Returns the summary."""
    write_atomic(out_dir / "manifest.jsonl", _jsonl(rows))
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


def write_summary(out_dir: Path, summary: dict, *, fsync: bool = True) -> None:
    """Write summary.json (atomically; ``fsync=False`` where losing it to a power cut loses
    nothing but fresh timings)."""
    write_atomic(out_dir / "summary.json", json.dumps(summary, indent=2, sort_keys=True, default=_default) + "\n",
                 fsync=fsync)
