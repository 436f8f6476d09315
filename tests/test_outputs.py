"""Output helpers: atomic writes, key signatures of transposed outputs, output fingerprints."""
from __future__ import annotations

import numpy as np
import pytest

from pipeline.analysis.transpose import shift_key_signatures
from pipeline.store.atomic import write_atomic
from pipeline.midi.piece import KEY_DTYPE


def _keys(*pairs):
    return np.array([(0, s, m) for s, m in pairs], dtype=KEY_DTYPE)


@pytest.mark.parametrize("sharps,minor,semitones,expect", [
    # Circle of fifths (common practice; any harmony handbook): C=0, G=1, D=2, ..., F=-1, Bb=-2, Eb=-3.
    (-3, 0, -3, 0),    # Eb major down 3 semitones -> C major, no accidentals
    (0, 1, 0, 0),      # A minor unchanged
    (3, 1, -6, -3),    # F# minor (3 sharps) down 6 -> C minor (3 flats)
    (1, 0, 2, 3),      # G major up 2 -> A major (3 sharps)
    (-1, 0, 1, 6),     # F major up 1 -> F# major (6 sharps; written as F#, not Gb)
    (4, 1, 12, 4),     # an octave changes nothing
])
def test_key_signature_follows_transposition(sharps, minor, semitones, expect):
    out = shift_key_signatures(_keys((sharps, minor)), semitones)
    assert out["sharps"].tolist() == [expect]
    assert out["minor"].tolist() == [minor]


def test_write_atomic_leaves_no_temp_file(tmp_path):
    p = tmp_path / "a" / "b.txt"
    write_atomic(p, "one")
    write_atomic(p, b"two", fsync=False)
    assert p.read_bytes() == b"two"
    assert [x.name for x in p.parent.iterdir()] == ["b.txt"]


def test_placed_files_are_flushed_one_by_one_or_with_one_sync(tmp_path, monkeypatch):
    """A few newly placed files are fsynced one by one (and their folders), as are more that are
    few beside the outputs in place; many, with one os.sync(); a file that cannot be flushed is an OutputError naming it (fsync(2) reports
    write-back errors such as EIO)."""
    import errno
    import os

    from pipeline.outputs import files as outputs
    from pipeline.errors import OutputError
    files = []
    for i in range(3):
        p = tmp_path / "midi" / "train" / f"{i}.mid"
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(b"MThd")
        files.append(str(p))
    synced, whole = [], []
    real_fsync = os.fsync
    monkeypatch.setattr(os, "fsync", lambda fd: synced.append(fd) or real_fsync(fd))
    monkeypatch.setattr(os, "sync", lambda: whole.append(1))
    outputs._flush_moved(files, set())
    assert len(synced) == 4 and whole == []  # three files and their folder
    synced.clear()
    monkeypatch.setattr(outputs, "FSYNC_EACH_UP_TO", 2)
    outputs._flush_moved(files, set())
    assert synced == [] and whole == [1]
    # more than that, but few beside the outputs already in place (a rerun's new files): one
    # by one; exactly at the share still one by one, past it one sync
    whole.clear()
    outputs._flush_moved(files, set(), in_place=48)
    assert len(synced) == 4 and whole == []
    synced.clear()
    outputs._flush_moved(files, set(), in_place=47)
    assert synced == [] and whole == [1]
    monkeypatch.setattr(outputs, "FSYNC_EACH_UP_TO", 256)

    def failing(fd):
        raise OSError(errno.EIO, "Input/output error")
    monkeypatch.setattr(os, "fsync", failing)
    with pytest.raises(OutputError) as err:
        outputs._flush_moved(files, set())
    assert err.value.file == files[0] and "Input/output error" in err.value.message


def test_placing_outputs_keeps_those_in_place_and_moves_the_rest(tmp_path):
    """A rerun's outputs: one already in its part's folder (left as it is), one whose content
    changed part (moved), one with an augmentation copy beside it, one in place with a staged
    copy to add, a new staged one, a dropped content's output (removed). Every file must end at
    midi/<part>/<id><suffix>.mid with its own bytes, as the layout in DESIGN.md says, and the
    placed lists must name exactly those files."""
    import hashlib
    import os
    from types import SimpleNamespace

    from pipeline.outputs import files as outputs
    fp = "f" * 16
    sha = {n: hashlib.sha256(n.encode()).hexdigest() for n in "abcdef"}
    part = {"a": "train", "b": "test", "c": "valid", "d": "train", "e": "train"}

    def put(rel, body):
        p = tmp_path / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(body)
    existing = {}
    for n, where, suffixes in [("a", "train", [""]), ("b", "train", [""]), ("c", "valid", ["", ".t+3"]),
                               ("d", "train", [""]), ("f", "test", [""])]:
        existing[sha[n]] = [f"midi/{where}/{sha[n][:16]}{s}.mid" for s in suffixes]
        for rel in existing[sha[n]]:
            put(rel, rel.encode())
    staging = str(tmp_path / outputs.STAGING)
    staged = {sha["d"]: (".t-2",), sha["e"]: ("",)}
    for h, suffixes in staged.items():
        for s in suffixes:
            p = outputs.staged_path(staging, h, fp, s)
            os.makedirs(os.path.dirname(p), exist_ok=True)
            open(p, "wb").write(f"staged {h[:16]}{s}".encode())
    status = {sha["f"]: ("dedup", "exact_duplicate")}  # f was dropped this run
    values = {sha[n]: p for n, p in part.items()}
    walk = SimpleNamespace(status=status, staged=staged,
                           value_of=lambda h, key: values[h] if key == "split" else None)
    rep = {sha[n]: f"{n}.mid" for n in "abcdef"}
    placed = outputs.place(tmp_path, walk, rep, existing, fp)
    want = {  # path -> bytes
        f"midi/train/{sha['a'][:16]}.mid": f"midi/train/{sha['a'][:16]}.mid".encode(),
        f"midi/test/{sha['b'][:16]}.mid": f"midi/train/{sha['b'][:16]}.mid".encode(),
        f"midi/valid/{sha['c'][:16]}.mid": f"midi/valid/{sha['c'][:16]}.mid".encode(),
        f"midi/valid/{sha['c'][:16]}.t+3.mid": f"midi/valid/{sha['c'][:16]}.t+3.mid".encode(),
        f"midi/train/{sha['d'][:16]}.mid": f"midi/train/{sha['d'][:16]}.mid".encode(),
        f"midi/train/{sha['d'][:16]}.t-2.mid": f"staged {sha['d'][:16]}.t-2".encode(),
        f"midi/train/{sha['e'][:16]}.mid": f"staged {sha['e'][:16]}".encode(),
    }
    on_disk = {str(p.relative_to(tmp_path)): p.read_bytes() for p in (tmp_path / "midi").rglob("*") if p.is_file()}
    assert on_disk == want
    assert not (tmp_path / outputs.STAGING).exists()
    assert placed.recorded == {rel: (next(h for h in rep if rel.split("/")[-1].startswith(h[:16])), fp) for rel in want}
    assert placed.all_of[sha["c"]] == [f"midi/valid/{sha['c'][:16]}.mid", f"midi/valid/{sha['c'][:16]}.t+3.mid"]
    assert placed.main == {sha[n]: f"midi/{part[n]}/{sha[n][:16]}.mid" for n in part}
    assert placed.part_of == {sha[n]: part[n] for n in part}
    assert placed.parts == {p: sorted(r for r in want if r.startswith(f"midi/{p}/")) for p in ("train", "test", "valid")}
