"""Discovery and fingerprints of the input files (no numpy: the nothing-changed check runs on it).

Every ``.mid .midi .kar .rmi`` file under the input folder (case insensitive, symlinks not
followed out of it, the output folder excluded) in path order; a file whose size and mtime match
the ledger keeps its recorded sha256, any other is hashed.
"""
from __future__ import annotations

import os
import stat as stat_mod
from array import array
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import overload

from ..errors import UsageError
from ..store.atomic import file_sha256
from ..store.ledger import LEDGER_NAME
from ..store.lock import LOCK_NAME

MIDI_SUFFIXES = (".mid", ".midi", ".kar", ".rmi")


@dataclass(slots=True)
class SourceFile:
    """One input file: path relative to the input folder (POSIX form) and its fingerprint (a
    row of a ``SourceTable``, made when read)."""

    rel: str
    root: str  # the input folder
    size: int
    mtime_ns: int
    sha256: str = ""  # empty until fingerprinted

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
    files: SourceTable
    notes: list[str]

    def matches(self, input_dir: Path, output_dir: Path) -> bool:
        return self.input == input_dir.resolve() and self.output == output_dir.resolve()


class SourceTable(Sequence[SourceFile]):
    """The input files in path order, held as columns by file index: the paths as one UTF-8
    text with end offsets, sizes and mtimes as integer arrays, the sha256 digests as one
    byte string of 32 bytes a file. Reading an item makes its ``SourceFile``. Memory: no
    Python object per file (the figures: DEVELOPERS.md, Memory rounds)."""

    __slots__ = ("root", "skipped", "_paths", "_ends", "_sizes", "_mtimes", "_digests", "_hashed")

    def __init__(self, root: str, rows: Iterable[tuple[str, int, int]] = (),
                 skipped: Iterable[tuple[str, str]] = ()):
        """``rows``: (rel, size, mtime_ns) of each file, in path order (``discover``);
        ``skipped``: (rel, why) of each entry left out (``discover``, ``fingerprint``)."""
        self.root = root  # the input folder, as ``discover`` searched it
        #: the entries below the input that look like input and were left out, with why (a
        #: folder's path ends with '/'): summary.json lists them, ``explain`` answers for them
        self.skipped: list[tuple[str, str]] = list(skipped)
        paths = bytearray()
        self._ends, self._sizes, self._mtimes = array("q"), array("q"), array("q")
        for rel, size, mtime_ns in rows:
            paths += rel.encode("utf-8")
            self._ends.append(len(paths))
            self._sizes.append(size)
            self._mtimes.append(mtime_ns)
        self._paths = bytes(paths)
        self._digests = bytearray(32 * len(self._ends))
        self._hashed = bytearray(len(self._ends))  # 1 once the file's sha256 is set

    def __len__(self) -> int:
        return len(self._ends)

    @overload
    def __getitem__(self, i: int) -> SourceFile: ...

    @overload
    def __getitem__(self, i: slice) -> list[SourceFile]: ...

    def __getitem__(self, i: int | slice) -> SourceFile | list[SourceFile]:
        if isinstance(i, slice):
            return [self[j] for j in range(*i.indices(len(self)))]
        if i < 0:
            i += len(self)
        return SourceFile(self.rel(i), self.root, self._sizes[i], self._mtimes[i], self.sha256(i))

    def __iter__(self) -> Iterator[SourceFile]:
        return (self[i] for i in range(len(self)))

    def rel(self, i: int) -> str:
        """The path of file ``i``, relative to the input folder (POSIX form)."""
        if i < 0:
            i += len(self._ends)
        return self._path_bytes(i).decode("utf-8")

    def _path_bytes(self, i: int) -> bytes:
        return self._paths[self._ends[i - 1] if i else 0:self._ends[i]]

    def size(self, i: int) -> int:
        return self._sizes[i]

    def mtime_ns(self, i: int) -> int:
        return self._mtimes[i]

    def sha256(self, i: int) -> str:
        """The sha256 of file ``i`` as hex text, or "" before ``set_sha256``."""
        return self._digests[32 * i:32 * i + 32].hex() if self._hashed[i] else ""

    def set_sha256(self, i: int, sha256: str) -> None:
        self._digests[32 * i:32 * i + 32] = bytes.fromhex(sha256)
        self._hashed[i] = 1

    def path_set(self) -> set[str]:
        """The files' paths (``rel``) as a set, for membership tests (made on each call: hold
        it only while it is used). Speed: a rerun tests every known path; a binary search over
        the table in Python was a few percent of it (DEVELOPERS.md, Rerun rounds)."""
        return {self.rel(i) for i in range(len(self))}

    def indices_of(self, shas: Iterable[str]) -> list[int]:
        """The indices of the files whose sha256 is one of ``shas``, in order (no text made
        per file: a rerun looks for the few files of the contents that changed)."""
        wanted = {bytes.fromhex(s) for s in shas if s}
        digests, hashed = bytes(self._digests), self._hashed
        return [i for i in range(len(self)) if hashed[i] and digests[32 * i:32 * i + 32] in wanted]

    def without(self, gone: Iterable[int]) -> None:
        """Remove the files at the indices ``gone`` (in place)."""
        drop = set(gone)
        keep = [i for i in range(len(self)) if i not in drop]
        paths, ends = bytearray(), array("q")
        for i in keep:
            paths += self._path_bytes(i)
            ends.append(len(paths))
        self._paths, self._ends = bytes(paths), ends
        self._sizes = array("q", (self._sizes[i] for i in keep))
        self._mtimes = array("q", (self._mtimes[i] for i in keep))
        self._digests = bytearray(b"".join(self._digests[32 * i:32 * i + 32] for i in keep))
        self._hashed = bytearray(self._hashed[i] for i in keep)


class Contents(Mapping[str, str]):
    """The run's distinct contents in first-source order: sha256 -> the path (rel) of its
    first source, read from the ``SourceTable``. ``order`` lists the sha256 texts (one string
    per content, shared by every map of the run), ``index`` gives each its content index.
    Memory: no path string nor dict entry per content beside ``index``."""

    __slots__ = ("order", "index", "_first", "_files", "_copies")

    def __init__(self, files: SourceTable):
        self._files = files
        self.order: list[str] = []
        self.index: dict[str, int] = {}  # sha256 -> content index (position in ``order``)
        self._first = array("q")  # content index -> its first source's file index
        # content index -> the file indices of its other sources (byte-identical copies: few)
        self._copies: dict[int, list[int]] = {}
        for i in range(len(files)):
            sha = files.sha256(i)
            ci = self.index.get(sha)
            if ci is None:
                self.index[sha] = len(self.order)
                self.order.append(sha)
                self._first.append(i)
            else:
                self._copies.setdefault(ci, []).append(i)

    def copies(self, sha: str) -> list[str]:
        """The paths of the content's sources after its first (its byte-identical copies)."""
        return [self._files.rel(i) for i in self._copies.get(self.index[sha], ())]

    def __getitem__(self, sha: str) -> str:
        return self._files.rel(self._first[self.index[sha]])

    def __contains__(self, sha: object) -> bool:
        return sha in self.index

    def __iter__(self) -> Iterator[str]:
        return iter(self.order)

    def __len__(self) -> int:
        return len(self.order)


def check_folders(input_dir: Path, output_dir: Path) -> None:
    """Refuse an input that is not a folder, an output path that is (or lies below) a file and
    an output folder that is, or contains, the input folder (a run rewrites its output folder):
    usage errors (exit 2), checked before anything is created."""
    if not input_dir.is_dir():
        raise UsageError("the input folder does not exist or is not a folder; check 'input' in the "
                         "config or --input", file=str(input_dir))
    existing = next((p for p in (output_dir, *output_dir.parents) if os.path.lexists(p)), None)
    if existing is not None and not existing.is_dir():
        below = "" if existing == output_dir else f" (the output folder {output_dir} would be below it)"
        what = "a file, not a folder" if existing.is_file() else "not a folder"
        raise UsageError(f"this is {what}{below}; 'output' in the config or --output "
                         "must name a folder: a new one or an earlier run's output", file=str(existing))
    input_dir, out_res = input_dir.resolve(), output_dir.resolve()
    if out_res == input_dir or out_res in input_dir.parents:
        raise UsageError(f"the output folder {out_res} is, or contains, the input folder {input_dir}; "
                         "a run rewrites its output folder, so choose an output folder outside the input")
    check_output_folder(out_res)


def check_output_folder(out_dir: Path) -> None:
    """Refuse an existing folder that holds files but is no run's output folder (no ledger): a
    run removes from its output folder what it did not write (``midi/``, ``splits/``, its
    temporary files), which would be the user's own files there (an audit lost a collection
    kept under ``midi/`` that way). A folder whose first run stopped before its ledger was made
    holds at most the run's lock."""
    try:
        names = sorted(e.name for e in os.scandir(out_dir))
    except (FileNotFoundError, NotADirectoryError):
        return
    except OSError:
        return  # unreadable: creating the ledger there reports it
    foreign = [n for n in names if n != LOCK_NAME]
    if foreign and LEDGER_NAME not in names:
        shown = ", ".join(foreign[:3]) + (f" and {len(foreign) - 3} more" if len(foreign) > 3 else "")
        raise UsageError(f"the output folder {out_dir} is not empty ({shown}) but holds no {LEDGER_NAME}: it is "
                         "not a midisift output folder, and a run would remove what it did not write "
                         "there (midi/, splits/); choose a new or empty output folder")


def discover(input_dir: Path, output_dir: Path | None = None) -> tuple[SourceTable, list[str]]:
    """All MIDI files below ``input_dir`` sorted by relative path, plus notes for the user.

    Reliability/safety: an output folder that is, or contains, the input folder is refused (the
    run cleans its own folder); one inside the input folder is not searched, nor is any other
    folder below the input that holds a run's output (its ledger, ``LEDGER_NAME``). Symlinks are not
    followed out of the input folder; unreadable files and names that are not valid UTF-8 are
    skipped with a note."""
    input_dir = input_dir.resolve()
    out_res = output_dir.resolve() if output_dir is not None else None
    if output_dir is not None:
        check_folders(input_dir, output_dir)
    notes: list[str] = []
    skipped: list[tuple[str, str]] = []  # (rel, why): ``SourceTable.skipped``
    found: list[tuple[str, int, int]] = []  # (rel, size, mtime_ns)
    top = str(input_dir)

    def skip(rel: str, why: str, note: str | None = None) -> None:
        """Leave ``rel`` out, with a note (``note``, else 'skipped REL: WHY')."""
        shown = rel.encode("utf-8", "backslashreplace").decode("utf-8")  # a name not valid UTF-8
        skipped.append((shown, why))
        notes.append(note or f"note: skipped {shown}: {why}")

    def unlisted(err: OSError) -> None:
        # reliability: a folder os.walk cannot list (permissions, a path past PATH_MAX, EIO)
        # is named, not passed over in silence
        where = os.path.relpath(err.filename, input_dir) if err.filename else "a folder"
        skip(where.replace(os.sep, "/") + "/", f"cannot list this folder ({err.strerror or err}); "
             "its files are not part of this run")

    # speed: the superuser reads every file it can stat (one access() call per file less)
    is_root = hasattr(os, "geteuid") and os.geteuid() == 0
    for root, dirs, names in os.walk(input_dir, followlinks=False, onerror=unlisted):
        rootp = Path(root)
        if out_res is not None and (rootp == out_res or out_res in rootp.parents):
            dirs[:] = []
            continue
        dirs.sort()
        root_sep = root + os.sep
        rel_root = os.path.relpath(root, input_dir)
        prefix = "" if rel_root == "." else rel_root.replace(os.sep, "/") + "/"
        kept_dirs = []
        for d in dirs:
            if out_res is not None and (rootp / d).resolve() == out_res:
                notes.append(f"note: the output folder {out_res} lies inside the input folder; it is not searched")
            elif os.path.islink(root_sep + d):  # os.walk lists a link to a folder and does not enter it
                target = Path(root_sep + d).resolve()
                inside = target == input_dir or input_dir in target.parents
                skip(f"{prefix}{d}/", "a symlink to a folder " + (
                    "inside the input folder, which is read under its own path" if inside else
                    "outside the input folder") + "; links to folders are not followed")
            elif os.path.isfile(root_sep + d + os.sep + LEDGER_NAME):
                skip(f"{prefix}{d}/", f"it holds the output of another run ({LEDGER_NAME})",
                     f"note: skipped folder {prefix}{d}: it holds the output of another run "
                     f"({LEDGER_NAME}), whose normalized files are copies of input files; "
                     "give it as the input folder to read them")
            else:
                kept_dirs.append(d)
        dirs[:] = kept_dirs
        for name in names:
            if not name.lower().endswith(MIDI_SUFFIXES):
                continue
            full = root_sep + name
            rel = prefix + name
            try:
                rel.encode("utf-8")
            except UnicodeEncodeError:
                skip(rel, "its name is not valid UTF-8 (rename it to include it)",
                     f"note: skipped {os.fsencode(rel)!r}: its name is not "
                     "valid UTF-8 (rename it to include it)")
                continue
            try:  # speed: one lstat per plain file (a stat more for a symlink), no Path objects
                st = os.lstat(full)
                if stat_mod.S_ISLNK(st.st_mode):
                    target = Path(full).resolve()
                    if input_dir not in target.parents or (out_res is not None and out_res in target.parents):
                        skip(rel, "a symlink pointing outside the input folder (or into the output folder)",
                             f"note: skipped symlink {rel} pointing outside the input folder "
                             "(or into the output folder)")
                        continue
                    st = os.stat(full)
            except (OSError, RuntimeError) as e:  # RuntimeError: a symlink loop (Python < 3.13)
                why = getattr(e, 'strerror', None) or str(e)
                skip(rel, f"cannot stat it: {why}", f"note: cannot stat {rel}: {why}")
                continue
            if not stat_mod.S_ISREG(st.st_mode):
                skip(rel, f"not a regular file ({_kind(st.st_mode)})")
                continue
            if not (is_root or os.access(full, os.R_OK)):
                skip(rel, "it is not readable (check its permissions)")
                continue
            found.append((rel, st.st_size, st.st_mtime_ns))
    found.sort(key=lambda row: row[0])
    skipped.sort()
    return SourceTable(top, found, skipped), notes


def _kind(mode: int) -> str:
    """What a file that is not a regular one is, for a note."""
    for test, name in ((stat_mod.S_ISDIR, "a folder"), (stat_mod.S_ISFIFO, "a FIFO"),
                       (stat_mod.S_ISCHR, "a character device"), (stat_mod.S_ISBLK, "a block device"),
                       (stat_mod.S_ISSOCK, "a socket")):
        if test(mode):
            return name
    return "not a plain file"


def fingerprint(files: SourceTable, known: dict[str, tuple[int, int, str]],
                notes: list[str] | None = None, *, rehash: bool = False) -> list[tuple[str, int, int, str]]:
    """Set the sha256 of each file; hash only files whose size or mtime changed (every file
    with ``rehash``: ``--fresh`` trusts no recorded hash). Returns new rows.

    A file that vanished or became unreadable since discovery is removed from ``files`` (in
    place) and listed in ``files.skipped`` (with a note in ``notes``), so it is not part of
    this run, and says so."""
    changed = []
    gone = []
    for i in range(len(files)):
        rel, size, mtime_ns = files.rel(i), files.size(i), files.mtime_ns(i)
        rec = known.get(rel)
        if not rehash and rec is not None and rec[0] == size and rec[1] == mtime_ns:
            files.set_sha256(i, rec[2])
            continue
        try:
            sha = file_sha256(source_path(files.root, rel))
        except OSError as e:  # reliability: removed or made unreadable during the run
            gone.append(i)
            why = f"it could not be read to hash it ({e.strerror or e})"
            files.skipped.append((rel, why))
            if notes is not None:
                notes.append(f"note: skipped {rel}: {why}")
            continue
        files.set_sha256(i, sha)
        changed.append((rel, size, mtime_ns, sha))
    if gone:
        files.without(gone)
    return changed
