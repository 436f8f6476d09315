"""Files in the output folder: atomic writes, the staging folder, placing normalized files.

``midi/<part>/<id><suffix>.mid`` holds the normalized kept files (suffix "" for the main output,
e.g. ".t+3" for an augmentation copy). Workers render them into ``.staging/``
(``pipeline.outputs.render``); once the split is known the runner places them; files already in
place with the same output fingerprint are reused (or moved when their part changed). Anything
under ``midi/`` that the run did not place is removed: the output folder is ours.
"""
from __future__ import annotations

import os
import shutil
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

from ..errors import OutputError

STAGING = ".staging"
#: The part of every kept file in a run without a split stage.
DEFAULT_PART = "all"

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


def files_below(out_dir: Path, folder: str) -> set[str]:
    """Every file below ``out_dir / folder``, as a path relative to ``out_dir`` ("/"-separated);
    an empty set when the folder is missing."""
    found: set[str] = set()
    base = os.path.join(str(out_dir), folder)
    for root, _, names in os.walk(base):
        rel = os.path.relpath(root, str(out_dir)).replace(os.sep, "/")
        found.update(f"{rel}/{name}" for name in names)
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
    #: every output now in place: path -> (sha, output fingerprint), as the ledger records it
    recorded: dict[str, tuple[str, str]] = field(default_factory=dict)


def _suffix_of(rel: str) -> str:
    name = rel.rsplit("/", 1)[-1]
    return name[16:-4]


def place(out_dir: Path, walk: Any, rep: dict[str, str], existing: dict[str, list[str]],
          fp: str) -> Placed:
    """Move staged/existing normalized files to ``midi/<part>/`` and drop everything else;
    ``Placed.recorded`` lists what is now in place, for the runner to record."""
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
        have = existing.get(sha, ())
        if len(have) == 1 and sha not in walk.staged and have[0] == f"midi/{part}/{sha[:16]}.mid":
            # speed: a rerun's usual content, whose one output is already where it belongs
            rel = have[0]
            placed.main[sha] = rel
            placed.all_of[sha] = [rel]
            placed.parts.setdefault(part, []).append(rel)
            rows.append((rel, sha, fp))
            continue
        sources: dict[str, str] = {}
        for rel in have:
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
    _flush_moved(moved, made, len(rows))
    keep = {r[0] for r in rows}
    midi = out_dir / "midi"
    if midi.is_dir():
        _prune(midi, "midi", keep)
    shutil.rmtree(out_dir / STAGING, ignore_errors=True)
    placed.recorded = {rel: (sha, ofp) for rel, sha, ofp in rows}
    for part in placed.parts:
        placed.parts[part].sort()
    return placed


#: Up to this many newly placed files are flushed one by one, and so are more when they are at
#: most ``FSYNC_EACH_SHARE`` of the outputs in place (a rerun's new files); else one ``os.sync()``.
FSYNC_EACH_UP_TO = 256
FSYNC_EACH_SHARE = 1 / 16
#: Flushes of placed files in flight at once (threads: each waits on the disk).
FSYNC_THREADS = 8


def _flush_moved(moved: list[str], folders: set[str], in_place: int = 0) -> None:
    """Staged files are written without fsync; flush the ones just placed before the ledger
    records them. A rerun that adds few files, or few beside the ``in_place`` outputs, syncs
    those files and their folders (``os.sync`` also flushes everything else waiting for the
    disk, whatever its size); a run that placed many syncs once."""
    if not moved:
        return
    if len(moved) > max(FSYNC_EACH_UP_TO, FSYNC_EACH_SHARE * in_place):
        os.sync()
        return
    # speed: the flushes wait on the disk, not the interpreter; several in flight share its
    # journal commits (DEVELOPERS.md, Measurement history, Throughput, reruns and memory:
    # 2026-12-05)
    with ThreadPoolExecutor(min(FSYNC_THREADS, len(moved))) as pool:
        for _ in pool.map(_fsync_file, moved):  # the first failure in list order is raised
            pass
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


def _fsync_file(path: str) -> None:
    """Flush one placed file to disk; an OutputError naming it when it cannot be."""
    try:
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
    except OSError as e:
        raise OutputError(f"cannot flush a normalized file to disk ({e.strerror}); check the "
                          "disk and rerun", file=path) from None


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
