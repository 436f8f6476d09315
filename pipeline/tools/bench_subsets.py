"""Voice subsets of real pieces: is a melody-only or an accompaniment-only file found inside its
full arrangement, and kept apart from other pieces?

``python -m pipeline.tools.bench_subsets --chorales CACHE [--pop DIR]`` writes, for every piece
of a real collection, two more files beside the full one, each keeping the notes of some of its
tracks (with mido, the outside writer; every other event kept at its time):

* music21's Bach chorales (``bench_identity.render_chorales``): ``melody`` the track named
  Soprano, ``accompaniment`` the tracks named Alto, Tenor and Bass (the harmony without the
  tune); chorales without those four parts are left out;
* the POP909 development set (``--pop``, the main file ``NNN/NNN.mid`` of each song):
  ``melody`` the MELODY track, ``accompaniment`` the PIANO track.

All files of a collection then go through dedup and the split at their defaults together
(``bench_identity.run_stages``), and it reports, per kind of subset: how many are linked to
their full file (one dedup cluster; or one split group, which is what keeps a piece in one
part), how many pieces lie in more than one part (against random splits of the same kept
files), and every link between files of different pieces (chorales: of different tunes, soprano
beat similarity below ``bench_identity.OTHER_TUNE``; pop: of different songs by label), with its
similarity, so a person can check it.
"""
from __future__ import annotations

import argparse
import hashlib
import io
import json
from collections import defaultdict
from pathlib import Path
from typing import Any, Iterable

import mido

from .bench_identity import (OTHER_TUNE, melody_similarity, random_split, run_stages,
                             soprano_beats, songs_across_parts)

#: Subset kinds and the track names (casefolded) whose notes each keeps, per collection.
CHORALE_SUBSETS = {"melody": {"soprano"}, "accompaniment": {"alto", "tenor", "bass"}}
POP_SUBSETS = {"melody": {"melody"}, "accompaniment": {"piano"}}


def keep_tracks(data: bytes, names: set[str]) -> bytes | None:
    """``data`` with the note messages of every track whose name (casefolded, stripped) is not
    in ``names`` taken out, other messages kept at their times; None when no kept track holds
    a note."""
    mid = mido.MidiFile(file=io.BytesIO(data))
    out = mido.MidiFile(type=mid.type, ticks_per_beat=mid.ticks_per_beat)
    notes = 0
    for track in mid.tracks:
        keep = track.name.strip().casefold() in names
        new, carried = mido.MidiTrack(), 0
        for msg in track:
            if not keep and msg.type in ("note_on", "note_off"):
                carried += msg.time
                continue
            notes += keep and msg.type == "note_on" and msg.velocity > 0
            new.append(msg.copy(time=msg.time + carried))
            carried = 0
        out.tracks.append(new)
    if not notes:
        return None
    buf = io.BytesIO()
    out.save(file=buf)
    return buf.getvalue()


def subset_records(pieces: Iterable[tuple[str, bytes]], subsets: dict[str, set[str]]) -> list[dict]:
    """Records (``rel``, ``sha256``, ``id``, ``piece``, ``work``, ``kind``) of every piece's full
    file and of each subset it has (a piece missing a subset's tracks is left out)."""
    from ..midi.decode import decode
    recs = []
    for work, data in pieces:
        files = {"full": data}
        for kind, names in subsets.items():
            part = keep_tracks(data, names)
            if part is None:
                break
            files[kind] = part
        else:
            for kind, blob in files.items():
                sha = hashlib.sha256(blob).hexdigest()
                recs.append({"rel": f"{work}/{kind}.mid", "sha256": sha, "id": sha[:16],
                             "piece": decode(blob), "work": work, "kind": kind})
    return recs


def evaluate(recs: list[dict], different: Any, seeds: int = 5) -> dict[str, Any]:
    """The figures of the module docstring; ``different(rec_a, rec_b)`` says whether two files'
    pieces are different pieces (their link is then a false one)."""
    run = run_stages(recs)
    by_id = {r["id"]: r for r in recs}
    work_of = {r["id"]: r["work"] for r in recs}
    res = run["dedup"]
    kept = run["kept"]
    part_of = {k: run["split"][k].values["split"] for k in kept}
    # a file's split group: kept files by their group; a dropped file joins its cluster's part
    group_of = {k: run["split"][k].values["group"] for k in kept}
    cluster_group = {res[k].values["cluster"]: group_of[k] for k in kept}
    for k, r in res.items():
        if not r.kept:
            group_of[k] = cluster_group.get(r.values["cluster"], r.values["cluster"])
    full = {r["work"]: r["id"] for r in recs if r["kind"] == "full"}
    kinds = sorted({r["kind"] for r in recs} - {"full"})
    linked: dict[str, dict[str, int]] = {}
    for kind in kinds:
        ids = [r["id"] for r in recs if r["kind"] == kind]
        same_cluster = sum(res[k].values["cluster"] == res[full[work_of[k]]].values["cluster"] for k in ids)
        same_group = sum(group_of[k] == group_of[full[work_of[k]]] for k in ids)
        dropped = sum(not res[k].kept for k in ids)
        linked[kind] = {"files": len(ids), "in_full_files_cluster": int(same_cluster),
                        "in_full_files_split_group": int(same_group), "dropped": dropped}
    false_links = []
    for k, r in res.items():
        other = r.values.get("duplicate_of")
        if not r.kept and other and different(by_id[k], by_id[other]):
            false_links.append({"kind": f"dedup {r.reason}", "a": by_id[k]["rel"], "b": by_id[other]["rel"],
                                "similarity": r.values.get("similarity")})
    clusters: dict[str, list[str]] = defaultdict(list)
    for k, r in res.items():
        clusters[r.values["cluster"]].append(k)
    mixed = [sorted(by_id[k]["rel"] for k in ks) for ks in clusters.values()
             if any(different(by_id[a], by_id[b]) for a in ks for b in ks if a < b)]
    for a, b in run["group_links"]:
        if different(by_id[a], by_id[b]):
            false_links.append({"kind": "split link", "a": by_id[a]["rel"], "b": by_id[b]["rel"]})
    return {"pieces": len(full), "files": len(recs), "kept": len(kept), "subsets": linked,
            "pieces_across_parts": songs_across_parts(part_of, work_of),
            "random_split_pieces_across_parts": [songs_across_parts(random_split(kept, s), work_of)
                                                 for s in range(seeds)],
            "false_links": false_links, "clusters_mixing_pieces": mixed}


def chorale_pieces(cache: Path) -> tuple[list[tuple[str, bytes]], dict[str, list[int]]]:
    """(name, MIDI bytes) of each chorale, and each one's soprano beat moves (the judge of
    one tune, as in ``bench_identity.chorale_check``)."""
    from ..midi.decode import decode
    from .bench_identity import render_chorales
    works = render_chorales(cache)
    return ([(w["name"], w["midi"]) for w in works],
            {w["name"]: soprano_beats(decode(w["midi"])) for w in works})


def format_result(name: str, res: dict[str, Any]) -> str:
    lines = [f"{name}: {res['pieces']} pieces, {res['files']} files (full + subsets), "
             f"{res['kept']} kept; pieces in more than one part: {res['pieces_across_parts']} "
             f"(random splits of the same kept files: {res['random_split_pieces_across_parts']})"]
    for kind, c in res["subsets"].items():
        lines.append(f"  {kind}-only files: {c['files']}; in their full file's dedup cluster "
                     f"{c['in_full_files_cluster']}, in its split group {c['in_full_files_split_group']}; "
                     f"dropped {c['dropped']}")
    lines.append(f"  links between different pieces: {len(res['false_links'])}; dedup clusters "
                 f"mixing pieces: {len(res['clusters_mixing_pieces'])}")
    lines += [f"    {f['kind']}: {f['a']} ~ {f['b']}" + (f" at {f['similarity']}" if f.get("similarity") is not None else "")
              for f in res["false_links"][:40]]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--chorales", default=None, metavar="CACHE",
                    help="music21's Bach chorales (rendered once, cached as JSON in CACHE)")
    ap.add_argument("--pop", default=None, metavar="DIR",
                    help="the POP909 development set (its labels.json names each file's song)")
    ap.add_argument("--out", default=None, help="write the JSON results here")
    a = ap.parse_args(argv)
    results = {}
    if a.chorales:
        pieces, soprano = chorale_pieces(Path(a.chorales))

        def other_tune(x: dict, y: dict) -> bool:
            if x["work"] == y["work"]:
                return False
            return melody_similarity(soprano[x["work"]], soprano[y["work"]]) < OTHER_TUNE

        recs = subset_records(pieces, CHORALE_SUBSETS)
        results["chorales"] = evaluate(recs, other_tune)
        print(format_result("chorales", results["chorales"]))
    if a.pop:
        folder = Path(a.pop)
        labels = json.loads((folder / "labels.json").read_text())["files"]
        mains = sorted(rel for rel in labels if "/versions/" not in rel)
        song = {rel.split("/")[0]: str(labels[rel]["song"]) for rel in mains}
        recs = subset_records(((rel.split("/")[0], (folder / rel).read_bytes()) for rel in mains), POP_SUBSETS)
        results["pop"] = evaluate(recs, lambda x, y: song[x["work"]] != song[y["work"]])
        print(format_result("pop", results["pop"]))
    if a.out:
        Path(a.out).write_text(json.dumps(results, indent=1, default=str) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
