"""Voice subsets of real pieces (pipeline.tools.bench_subsets): a melody-only and an
accompaniment-only file are found inside their full arrangement, and kept apart from other
pieces.

Pieces: the POP909 songs vendored in tests/data/pop909 (MIT licence, Music X Lab 2020; their
MELODY and PIANO tracks) and Bach chorales of music21's bundled corpus (their Soprano, and
Alto, Tenor and Bass parts), each of another tune. The subsets are written with mido, the
outside reader and writer, and checked against it.
"""
from __future__ import annotations

import io
from pathlib import Path

import mido
import pytest

from pipeline.tools.bench_subsets import (CHORALE_SUBSETS, POP_SUBSETS, evaluate, keep_tracks,
                                          subset_records)

POP = Path(__file__).parent / "data" / "pop909"
#: One chorale of each of five tunes (different tunes: tests/test_dedup.py's BACH_TUNES).
CHORALES = ("bwv244.15", "bwv114.7", "bwv245.11", "bwv20.7", "bwv84.5")


def _notes(data: bytes, names: set[str] | None = None) -> list[tuple[int, int, int]]:
    """(absolute tick, channel, pitch) of every note-on of the tracks named in ``names``, as
    mido reads them."""
    out = []
    for track in mido.MidiFile(file=io.BytesIO(data)).tracks:
        if names is not None and track.name.strip().casefold() not in names:
            continue
        tick = 0
        for msg in track:
            tick += msg.time
            if msg.type == "note_on" and msg.velocity > 0:
                out.append((tick, msg.channel, msg.note))
    return sorted(out)


def _pop_pieces() -> list[tuple[str, bytes]]:
    return [(song.name, (song / f"{song.name}.mid").read_bytes()) for song in sorted(POP.iterdir())
            if song.is_dir()]


def test_a_subset_holds_exactly_its_tracks_notes_at_their_times():
    for _, data in _pop_pieces():
        for names in POP_SUBSETS.values():
            part = keep_tracks(data, names)
            assert part is not None and _notes(part) == _notes(data, names)
    assert keep_tracks(_pop_pieces()[0][1], {"no such track"}) is None


def _linked_and_apart(recs: list[dict]) -> dict:
    res = evaluate(recs, lambda a, b: a["work"] != b["work"], seeds=1)
    for kind, counts in res["subsets"].items():
        # every subset travels with its full file (one split group: one part)
        assert counts["in_full_files_split_group"] == counts["files"], (kind, counts)
    assert res["pieces_across_parts"] == 0
    assert res["false_links"] == [] and res["clusters_mixing_pieces"] == []
    return res


def test_pop_melody_and_accompaniment_files_travel_with_their_song():
    recs = subset_records(_pop_pieces(), POP_SUBSETS)
    assert len(recs) == 3 * len(_pop_pieces())
    res = _linked_and_apart(recs)
    # and dedup finds them inside the full arrangement (containment of a voice subset)
    assert all(c["in_full_files_cluster"] == c["files"] for c in res["subsets"].values())


def test_chorale_melody_and_lower_voices_travel_with_their_chorale():
    pytest.importorskip("music21")
    from music21 import corpus, midi
    pieces = [(name, midi.translate.streamToMidiFile(corpus.parse(f"bach/{name}")).writestr())
              for name in CHORALES]
    recs = subset_records(pieces, CHORALE_SUBSETS)
    assert len(recs) == 3 * len(CHORALES)
    _linked_and_apart(recs)
