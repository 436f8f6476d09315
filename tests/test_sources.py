"""The input files as columns (pipeline.engine.sources.SourceTable, Contents).

The references are outside the project: ``os.walk``/``os.stat`` for the paths, sizes and
mtimes, ``hashlib`` for the digests, Python's sorted order and set membership for the paths.
"""
from __future__ import annotations

import hashlib
import os
from pathlib import Path

import pytest

from pipeline.engine.sources import Contents, SourceTable, discover, fingerprint

NAMES = ["a.mid", "b/Café Nörthern.MID", "b/c/zoë ü 1.midi", "b/c/x.kar", "d e/f.rmi", "d e/g.mid",
         "日本/曲.mid", "z/copy of a.mid", "z/copy 2 of a.mid", "0.mid"]


def _tree(root: Path) -> dict[str, bytes]:
    data = {}
    for i, name in enumerate(NAMES):
        p = root / name
        p.parent.mkdir(parents=True, exist_ok=True)
        body = b"MThd" + bytes([i]) * (7 * i + 1)
        if "copy" in name:
            body = data["a.mid"]  # byte-identical copies of a.mid
        p.write_bytes(body)
        data[name] = body
    (root / "notes.txt").write_text("not a MIDI file")
    return data


def _walked(root: Path) -> dict[str, tuple[int, int, str]]:
    """rel -> (size, mtime_ns, sha256) of every MIDI file, by os.walk, os.stat and hashlib."""
    out = {}
    for dirpath, _dirs, names in os.walk(root):
        for name in names:
            if name.lower().endswith((".mid", ".midi", ".kar", ".rmi")):
                full = os.path.join(dirpath, name)
                st = os.stat(full)
                with open(full, "rb") as fh:
                    sha = hashlib.sha256(fh.read()).hexdigest()
                out[os.path.relpath(full, root).replace(os.sep, "/")] = (st.st_size, st.st_mtime_ns, sha)
    return out


def test_the_table_reads_back_every_path_size_mtime_and_sha256_as_the_file_system_gives_them(tmp_path):
    root = tmp_path / "in"
    _tree(root)
    files, notes = discover(root)
    assert notes == []
    changed = fingerprint(files, {})
    want = _walked(root)
    assert len(files) == len(want) == len(NAMES)
    assert [files.rel(i) for i in range(len(files))] == sorted(want)  # path (code point) order
    for i, f in enumerate(files):
        assert (f.size, f.mtime_ns, f.sha256) == want[f.rel]
        assert (files.size(i), files.mtime_ns(i), files.sha256(i)) == want[f.rel]
        assert f.root == str(root.resolve()) and Path(f.path) == root.resolve() / f.rel
    assert sorted((rel, size, mtime, sha) for rel, size, mtime, sha in changed) == \
        sorted((rel, *v) for rel, v in want.items())
    assert [f.rel for f in files[2:5]] == sorted(want)[2:5] and files[-1].rel == sorted(want)[-1]


def test_known_fingerprints_are_reused_and_a_vanished_file_is_left_out(tmp_path):
    root = tmp_path / "in"
    _tree(root)
    files, _ = discover(root)
    want = _walked(root)
    # a recorded sha256 whose size and mtime match is taken as it is (not hashed again)
    known = {"a.mid": (*want["a.mid"][:2], "f" * 64), "0.mid": (want["0.mid"][0] + 1, want["0.mid"][1], "e" * 64)}
    (root / "d e" / "f.rmi").unlink()  # gone between discovery and fingerprinting
    changed = fingerprint(files, known)
    del want["d e/f.rmi"]
    assert [f.rel for f in files] == sorted(want)
    got = {f.rel: (f.size, f.mtime_ns, f.sha256) for f in files}
    assert got == {**want, "a.mid": (*want["a.mid"][:2], "f" * 64)}
    assert {row[0] for row in changed} == set(want) - {"a.mid"}


def test_without_leaves_the_other_rows_as_they_were():
    # Reference: the same rows as a list of tuples, the removed indices left out
    rows = [(f"d/{k:02d}é.mid", 100 + k, 10**18 + k) for k in range(7)]
    table = SourceTable("/in", rows)
    shas = {k: "%064x" % (k * 977) for k in (0, 2, 3, 6)}  # 1, 4 and 5 not hashed
    for k, sha in shas.items():
        table.set_sha256(k, sha)
    table.without([0, 4, 6])
    want = [(*rows[k], shas.get(k, "")) for k in (1, 2, 3, 5)]
    assert [(f.rel, f.size, f.mtime_ns, f.sha256) for f in table] == want
    assert table.path_set() == {w[0] for w in want}


def test_paths_membership_and_contents_follow_their_references(tmp_path):
    root = tmp_path / "in"
    data = _tree(root)
    files, _ = discover(root)
    fingerprint(files, {})
    rels = sorted(data)
    assert [f.rel for f in files] == rels
    paths = files.path_set()
    assert paths == set(rels)
    for probe in rels + ["", "a", "a.mi", "b/", "zz.mid", "b/c/zoë ü 1.mid", "日本"]:
        assert (probe in paths) == (probe in set(rels))
    # each distinct content once, in first-source order, with its first source's path
    contents = Contents(files)
    first: dict[str, str] = {}
    for rel in rels:
        first.setdefault(hashlib.sha256(data[rel]).hexdigest(), rel)
    assert dict(contents.items()) == first and list(contents) == list(first) == contents.order
    assert contents.index == {sha: i for i, sha in enumerate(first)}
    assert len(contents) == len(NAMES) - 2 and "0" * 64 not in contents


def test_an_empty_folder_gives_an_empty_table(tmp_path):
    files, notes = discover(tmp_path)
    assert len(files) == 0 and list(files) == [] and files.path_set() == set()
    assert fingerprint(files, {}) == [] and len(Contents(files)) == 0
    assert len(SourceTable("/x")) == 0


def test_a_folder_holding_another_runs_output_is_not_input(tmp_path):
    """An audit found that an output folder placed inside the input folder, once another run
    wrote elsewhere, had its normalized copies read as input (141 of the kept files became
    copies). A folder below the input that holds a run's ledger is skipped with a note; given
    as the input folder itself it is read (a user may mean to)."""
    (tmp_path / "in" / "songs").mkdir(parents=True)
    (tmp_path / "in" / "songs" / "a.mid").write_bytes(b"MThd")
    old = tmp_path / "in" / "old_out"
    (old / "midi" / "train").mkdir(parents=True)
    (old / "midi" / "train" / "0123456789abcdef.mid").write_bytes(b"MThd")
    (old / "state.sqlite").write_bytes(b"")
    table, notes = discover(tmp_path / "in", tmp_path / "out")
    assert [table.rel(i) for i in range(len(table))] == ["songs/a.mid"]
    assert any("skipped folder old_out" in n and "state.sqlite" in n for n in notes)
    whole, _ = discover(old, tmp_path / "out2")
    assert [whole.rel(i) for i in range(len(whole))] == ["midi/train/0123456789abcdef.mid"]


def test_a_run_refuses_a_folder_of_the_users_files_as_its_output(tmp_path):
    """An audit lost a collection kept under OUTPUT/midi/: a run removes what it did not write
    from its output folder. A folder that holds files but no ledger is refused before anything
    is written (usage error, exit 2); an empty folder, or one holding only a stopped first
    run's lock, is taken."""
    from pipeline.engine.sources import check_folders
    from pipeline.errors import UsageError
    from pipeline.store.lock import LOCK_NAME

    src = tmp_path / "in"
    src.mkdir()
    mine = tmp_path / "datasets"
    (mine / "midi" / "my_collection").mkdir(parents=True)
    (mine / "midi" / "my_collection" / "precious.mid").write_bytes(b"MThd")
    with pytest.raises(UsageError, match=r"is not empty \(midi\) but holds no state.sqlite"):
        check_folders(src, mine)
    empty = tmp_path / "empty"
    empty.mkdir()
    check_folders(src, empty)
    (empty / LOCK_NAME).write_text("{}")
    check_folders(src, empty)
    (mine / "state.sqlite").write_bytes(b"")  # a run's output folder: its own files
    check_folders(src, mine)


def test_the_cli_leaves_the_users_files_in_place(tmp_path):
    import subprocess
    import sys

    root = Path(__file__).resolve().parents[1]
    mine = tmp_path / "datasets"
    (mine / "splits").mkdir(parents=True)
    (mine / "splits" / "todo.txt").write_text("keep me\n")
    proc = subprocess.run([sys.executable, "-m", "pipeline.cli", "run", str(root / "configs" / "default.yaml"),
                           "--input", str(root / "sample_corpus"), "--output", str(mine)],
                          capture_output=True, text=True, cwd=root)
    assert proc.returncode == 2 and "not a midisift output folder" in proc.stderr
    assert sorted(p.name for p in mine.rglob("*")) == ["splits", "todo.txt"]


def test_every_entry_left_out_is_named_with_why(tmp_path, monkeypatch):
    """An audit found input entries left out without a trace: links to folders (inside and
    outside the input), a folder that cannot be listed, a FIFO named *.mid, a path past
    PATH_MAX, a file gone before it was hashed. Each is now in ``skipped`` with a note."""
    inp, outside = tmp_path / "in", tmp_path / "outside"
    (inp / "real").mkdir(parents=True)
    outside.mkdir()
    (inp / "a.mid").write_bytes(b"MThd a")
    (inp / "real" / "r.mid").write_bytes(b"MThd r")
    (outside / "o.mid").write_bytes(b"MThd o")
    (inp / "locked").mkdir()
    (inp / "locked" / "l.mid").write_bytes(b"MThd l")
    os.symlink("real", inp / "link_in")
    os.symlink(outside, inp / "link_out")
    os.mkfifo(inp / "fifo.mid")
    monkeypatch.chdir(inp)
    for i in range(45):  # about 4,550 bytes of path: past PATH_MAX (4096), made step by step
        name = f"{i:03d}" + "d" * 97
        os.mkdir(name)
        os.chdir(name)
    Path("deep.mid").write_bytes(b"MThd deep")
    monkeypatch.chdir(tmp_path)
    real_scandir = os.scandir

    def scandir(path="."):  # the superuser lists any folder: permission denied, as it is for others
        if str(path).endswith("locked"):
            raise PermissionError(13, "Permission denied", str(path))
        return real_scandir(path)
    monkeypatch.setattr(os, "scandir", scandir)
    table, notes = discover(inp, tmp_path / "out")
    monkeypatch.undo()
    assert [table.rel(i) for i in range(len(table))] == ["a.mid", "real/r.mid"]
    why = dict(table.skipped)
    assert "symlink to a folder inside the input" in why["link_in/"]
    assert "symlink to a folder outside the input" in why["link_out/"]
    assert "Permission denied" in why["locked/"] and "cannot list" in why["locked/"]
    assert why["fifo.mid"] == "not a regular file (a FIFO)"
    assert any("File name too long" in w for w in why.values()), why
    assert len(notes) == len(table.skipped) and all(n.startswith("note: ") for n in notes)
    (inp / "a.mid").unlink()  # gone between the listing and the hashing
    notes = []
    fingerprint(table, {}, notes)
    assert [table.rel(i) for i in range(len(table))] == ["real/r.mid"]
    assert "could not be read to hash it" in dict(table.skipped)["a.mid"] and "a.mid" in notes[0]
