"""A labelled collection of files and their copies in another track layout, for the split's
same-content grouping (``python -m pipeline.tools.bench_split --corpus OUT``).

Each selected file is copied as it is and again with every track's notes that start in an odd
bar (four beats) moved to a new track of their own (same channel): the note content (pitch,
drum flag, start and end in beats) is unchanged, so dedup's content hash is too, but each line
becomes two lines full of holes, so the shingles (which follow the voices) differ. ``labels.json``
gives both files the source's group (its ``song`` in the source's labels, else its stem), so the
benchmark's pairs are each file with its other layout.

Run: ``python -m pipeline.tools.relayout ../shared/data/pop909-dev /tmp/layouts --pattern '*/???.mid'``.
"""
from __future__ import annotations

import argparse
import json
from pathlib import Path


def relayout(data: bytes) -> bytes:
    """The file with every track's notes of odd bars moved to a track of their own (mido)."""
    import io

    import mido
    mid = mido.MidiFile(file=io.BytesIO(data))
    bar = 4 * mid.ticks_per_beat
    out = mido.MidiFile(type=1, ticks_per_beat=mid.ticks_per_beat)
    for track in mid.tracks:
        keep: list[tuple[int, int, mido.Message]] = []
        moved: list[tuple[int, int, mido.Message]] = []
        now, onset = 0, {}
        for i, msg in enumerate(track):
            now += msg.time
            if msg.type in ("note_on", "note_off"):
                key = (msg.channel, msg.note)
                if msg.type == "note_on" and msg.velocity > 0:
                    onset.setdefault(key, []).append(now)
                    odd = (now // bar) % 2 == 1
                else:  # a note's end goes with its start (first in, first out)
                    starts = onset.get(key)
                    odd = bool(starts) and (starts.pop(0) // bar) % 2 == 1
                (moved if odd else keep).append((now, i, msg))
            elif msg.type != "end_of_track":
                keep.append((now, i, msg))
        for events in (keep, moved):
            if events or events is keep:
                new, last = mido.MidiTrack(), 0
                for t, _, msg in sorted(events, key=lambda e: (e[0], e[1])):
                    new.append(msg.copy(time=t - last))
                    last = t
                out.tracks.append(new)
    buf = io.BytesIO()
    out.save(file=buf)
    return buf.getvalue()


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("source", help="a folder of MIDI files (with labels.json, or not)")
    ap.add_argument("out", help="the folder written: each file, its other layout, labels.json")
    ap.add_argument("--pattern", default="**/*.mid", help="files taken (glob under source)")
    a = ap.parse_args(argv)
    src, out = Path(a.source), Path(a.out)
    labels_path = src / "labels.json"
    known = json.loads(labels_path.read_text())["files"] if labels_path.is_file() else {}
    files: dict[str, dict] = {}
    for path in sorted(src.glob(a.pattern)):
        rel = path.relative_to(src).as_posix()
        group = str(known.get(rel, {}).get("song", path.stem))
        data = path.read_bytes()
        other = rel[:-len(path.suffix)] + "-layout" + path.suffix
        for name, payload in ((rel, data), (other, relayout(data))):
            (out / name).parent.mkdir(parents=True, exist_ok=True)
            (out / name).write_bytes(payload)
            files[name] = {"song": group}
    (out / "labels.json").write_text(json.dumps({"files": files}, indent=1, ensure_ascii=False))
    print(f"{len(files)} files ({len(files) // 2} pairs) written to {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
