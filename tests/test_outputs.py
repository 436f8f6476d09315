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
