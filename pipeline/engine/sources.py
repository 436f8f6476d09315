"""Discovery and fingerprints of the input files (no numpy: the nothing-changed check runs on it).

Every ``.mid .midi .kar .rmi`` file under the input folder (case insensitive, symlinks not
followed out of it, the output folder excluded) in path order; a file whose size and mtime match
the ledger keeps its recorded sha256, any other is hashed.
"""
from __future__ import annotations

import hashlib
import os
import stat as stat_mod
from dataclasses import dataclass
from pathlib import Path

from ..errors import UsageError

MIDI_SUFFIXES = (".mid", ".midi", ".kar", ".rmi")


@dataclass(slots=True)  # memory: one per file, no __dict__
class SourceFile:
    """One input file: path relative to the input folder (POSIX form) and its fingerprint."""

    rel: str
    root: str  # the input folder, one string shared by every file (memory: no path per file)
    size: int  # size and mtime_ns: 0 once fingerprinted in a run (``forget_stats``)
    mtime_ns: int
    sha256: str = ""

    @property
    def path(self) -> str:
        """The file's path (a str, not a Path: a Path object costs several hundred bytes)."""
        return source_path(self.root, self.rel)


def source_path(root: str, rel: str) -> str:
    """The path of the input file ``rel`` (POSIX form) in the input folder ``root``, as
    ``discover`` found it."""
    return root + os.sep + (rel if os.sep == "/" else rel.replace("/", os.sep))


@dataclass(slots=True)
class Discovery:
    """The files found under ``input`` (an output folder ``output`` excluded) with their notes;
    the up-to-date check hands its discovery over to the run that follows it."""

    input: Path
    output: Path
    files: list[SourceFile]
    notes: list[str]

    def matches(self, input_dir: Path, output_dir: Path) -> bool:
        return self.input == input_dir.resolve() and self.output == output_dir.resolve()


def check_folders(input_dir: Path, output_dir: Path) -> None:
    """Refuse an output folder that is, or contains, the input folder (a run rewrites its output
    folder); checked before anything is created."""
    input_dir, out_res = input_dir.resolve(), output_dir.resolve()
    if out_res == input_dir or out_res in input_dir.parents:
        raise UsageError(f"the output folder {out_res} is, or contains, the input folder {input_dir}; "
                         "a run rewrites its output folder, so choose an output folder outside the input")


def discover(input_dir: Path, output_dir: Path | None = None) -> tuple[list[SourceFile], list[str]]:
    """All MIDI files below ``input_dir`` sorted by relative path, plus notes for the user.

    Reliability/safety: an output folder that is, or contains, the input folder is refused (the
    run cleans its own folder); one inside the input folder is not searched. Symlinks are not
    followed out of the input folder; unreadable files and names that are not valid UTF-8 are
    skipped with a note."""
    input_dir = input_dir.resolve()
    out_res = output_dir.resolve() if output_dir is not None else None
    if output_dir is not None:
        check_folders(input_dir, output_dir)
    notes: list[str] = []
    found: list[SourceFile] = []
    top = str(input_dir)
    # speed: the superuser reads every file it can stat (one access() call per file less)
    is_root = hasattr(os, "geteuid") and os.geteuid() == 0
    for root, dirs, names in os.walk(input_dir, followlinks=False):
        rootp = Path(root)
        if out_res is not None and (rootp == out_res or out_res in rootp.parents):
            dirs[:] = []
            continue
        dirs.sort()
        if out_res is not None:
            kept_dirs = []
            for d in dirs:
                if (rootp / d).resolve() == out_res:
                    notes.append(f"note: the output folder {out_res} lies inside the input folder; it is not searched")
                    continue
                kept_dirs.append(d)
            dirs[:] = kept_dirs
        root_sep = root + os.sep
        rel_root = os.path.relpath(root, input_dir)
        prefix = "" if rel_root == "." else rel_root.replace(os.sep, "/") + "/"
        for name in names:
            if not name.lower().endswith(MIDI_SUFFIXES):
                continue
            full = root_sep + name
            rel = prefix + name
            try:
                rel.encode("utf-8")
            except UnicodeEncodeError:
                notes.append(f"note: skipped {os.fsencode(rel)!r}: its name is not "
                             "valid UTF-8 (rename it to include it)")
                continue
            try:  # speed: one lstat per plain file (a stat more for a symlink), no Path objects
                st = os.lstat(full)
                if stat_mod.S_ISLNK(st.st_mode):
                    target = Path(full).resolve()
                    if input_dir not in target.parents or (out_res is not None and out_res in target.parents):
                        notes.append(f"note: skipped symlink {rel} pointing outside the input folder "
                                     "(or into the output folder)")
                        continue
                    st = os.stat(full)
            except (OSError, RuntimeError) as e:  # RuntimeError: a symlink loop (Python < 3.13)
                notes.append(f"note: cannot stat {rel}: {getattr(e, 'strerror', None) or e}")
                continue
            if not stat_mod.S_ISREG(st.st_mode):
                continue
            if not (is_root or os.access(full, os.R_OK)):
                notes.append(f"note: skipped {rel}: it is not readable (check its permissions)")
                continue
            found.append(SourceFile(rel, top, st.st_size, st.st_mtime_ns))
    found.sort(key=lambda f: f.rel)
    return found, notes


def fingerprint(files: list[SourceFile], known: dict[str, tuple[int, int, str]]) -> list[tuple[str, int, int, str]]:
    """Fill ``sha256`` of each file; hash only files whose size or mtime changed. Returns new rows.

    A file that vanished or became unreadable since discovery is removed from ``files`` (in
    place), so it is simply not part of this run."""
    changed = []
    gone = []
    for f in files:
        rec = known.get(f.rel)
        if rec is not None and rec[0] == f.size and rec[1] == f.mtime_ns:
            f.sha256 = rec[2]
            continue
        h = hashlib.sha256()
        try:
            with open(f.path, "rb") as fh:
                for block in iter(lambda: fh.read(1 << 20), b""):
                    h.update(block)
        except OSError:  # reliability: removed or made unreadable during the run
            gone.append(f)
            continue
        f.sha256 = h.hexdigest()
        changed.append((f.rel, f.size, f.mtime_ns, f.sha256))
    if gone:
        files[:] = [f for f in files if f not in gone]
    return changed


def forget_stats(files: list[SourceFile]) -> None:
    """Let go of each file's size and mtime once ``fingerprint`` compared and recorded them
    (they read 0 after): nothing later in a run reads them. Memory: two integer objects a
    file (about 60 bytes), held through the whole run otherwise."""
    for f in files:
        f.size = f.mtime_ns = 0
