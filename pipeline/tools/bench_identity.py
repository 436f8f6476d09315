"""Piece identity on real collections with group labels, and on music21's Bach chorales.

``python -m pipeline.tools.bench_dedup --real DIR --labels DIR/labels.json`` runs the dedup and split
stages at their defaults (``prepare`` per file, then ``run_corpus``, as a run does) over every
MIDI file of a labelled collection (``labels.json``: ``{"files": {path: {"song": id, ...}}}``,
the layout of the POP909 development set) and reports:

* songs whose kept files lie in more than one part, ours against random splits of the same kept
  files with the same ratios (several seeds);
* songs keeping two files that share a melody track (the track named ``MELODY``; two tracks are
  the same when the aligned similarity of their pitch-interval sequences, difflib's
  ``SequenceMatcher.ratio``, is at least ``SAME_MELODY``);
* every link between files of different songs (dedup drops and split grouping links), with its
  similarity and the melody-track similarity, so a person can check each;
* dedup drops whose own similarity to the kept file they name is below the threshold;
* files per second of ``prepare`` + dedup + split (decoding excluded).

``--chorales`` compares the Bach chorales bundled with music21 that share a title (the same
hymn tune harmonized several times): pairs of one tune linked, pairs of different tunes linked.
"""
from __future__ import annotations

import difflib
import json
import random
import time
from collections import Counter, defaultdict
from itertools import combinations
from pathlib import Path
from typing import Any

import numpy as np

from ..stages.base import CorpusState, FileContext, Member

#: Aligned interval similarity from which two melody tracks count as the same melody.
SAME_MELODY = 0.8
#: Split ratios of the default configuration.
RATIOS = {"train": 0.8, "valid": 0.1, "test": 0.1}


def melody_intervals(piece: Any, track_name: str = "MELODY") -> list[int]:
    """Pitch intervals between successive onsets of the track named ``track_name`` (its top
    note per onset); empty when the file has no such track."""
    names = [n.strip().upper() for n in piece.track_names]
    if track_name not in names:
        return []
    t = names.index(track_name)
    n = piece.notes[piece.notes["track"] == t]
    if len(n) < 2:
        return []
    order = np.lexsort((-n["pitch"], n["start"]))
    start, pitch = n["start"][order], n["pitch"][order]
    first = np.concatenate(([True], start[1:] != start[:-1]))
    top = pitch[first].astype(int)
    return np.diff(top).tolist()


def melody_similarity(a: list[int], b: list[int]) -> float:
    """Aligned similarity of two interval sequences (difflib ratio: 2 * matched / total)."""
    if not a or not b:
        return 0.0
    return difflib.SequenceMatcher(None, a, b, autojunk=False).ratio()


def load_collection(folder: Path, labels: Path) -> list[dict]:
    """Decode every labelled file: records with ``rel``, ``sha256``, ``piece``, ``song``."""
    import hashlib
    from ..errors import DecodeError
    from ..midi.decode import decode
    files = json.loads(Path(labels).read_text())["files"]
    recs = []
    seen: Counter = Counter()
    for rel in sorted(files):
        data = (folder / rel).read_bytes()
        try:
            piece = decode(data, source=rel)
        except DecodeError:
            continue
        sha = hashlib.sha256(data).hexdigest()
        base = sha[:16]
        rid = base if not seen[base] else f"{base}.{seen[base]}"
        seen[base] += 1
        recs.append({"rel": rel, "sha256": sha, "piece": piece, "song": str(files[rel]["song"]),
                     "id": rid})
    return recs


def run_stages(recs: list[dict], dedup_opts: dict | None = None, split_opts: dict | None = None
               ) -> dict[str, Any]:
    """Dedup then split, as a run does; returns results, kept ids, parts, links and seconds."""
    from ..stages.dedup import Dedup
    from ..stages.split import Split
    dedup = Dedup(dedup_opts or {})
    split = Split(split_opts or {})
    t0 = time.perf_counter()
    members = []
    for r in recs:
        art = dedup.prepare(r["piece"], FileContext(r["piece"], r["rel"], r["sha256"]))
        members.append(Member(r["id"], r["sha256"], r["rel"], {"notes": len(r["piece"].notes)},
                              {"dedup": art}, [r["rel"]]))
    t1 = time.perf_counter()
    dstate = CorpusState()
    dres = dedup.run_corpus(members, dstate)
    t2 = time.perf_counter()
    kept = [m for m in members if dres[m.id].kept]
    # as a run's walk hands them over: every file dedup saw, with its path (the split's
    # group_by_folder: auto judges the layout on them)
    sstate = CorpusState(upstream={"dedup": dres}, flags={
        "sources_of": lambda name: ((m.id, m.source) for m in members) if name == "dedup" else iter(())})
    sres = split.run_corpus(kept, sstate)
    t3 = time.perf_counter()
    links = sstate.current.get("links", {}).get("links", [])
    return {"dedup": dres, "split": sres, "kept": [m.id for m in kept], "group_links": links,
            "folders": sstate.current.get("summary", {}).get("group_by_folder"),
            "members": {m.id: m for m in members}, "threshold": float(dedup.opts["threshold"]),
            "group_threshold": split.opts["group_threshold"],
            "seconds": {"prepare": t1 - t0, "dedup": t2 - t1, "split": t3 - t2}}


def songs_across_parts(part_of: dict[str, str], song_of: dict[str, str]) -> int:
    """Songs whose files (the keys of ``part_of``) lie in more than one part."""
    return len(split_songs(part_of, song_of))


def split_songs(part_of: dict[str, str], song_of: dict[str, str]) -> list[str]:
    """The songs whose files (the keys of ``part_of``) lie in more than one part, sorted."""
    parts: dict[str, set[str]] = defaultdict(set)
    for k, p in part_of.items():
        parts[song_of[k]].add(p)
    return sorted(s for s, ps in parts.items() if len(ps) > 1)


def random_split(ids: list[str], seed: int, ratios: dict[str, float] = RATIOS) -> dict[str, str]:
    """A plain random split of ``ids`` with the given part shares."""
    ids = sorted(ids)
    random.Random(seed).shuffle(ids)
    out, lo = {}, 0
    names = list(ratios)
    for i, name in enumerate(names):
        hi = len(ids) if i == len(names) - 1 else lo + int(round(ratios[name] * len(ids)))
        out.update((k, name) for k in ids[lo:hi])
        lo = hi
    return out


def evaluate(recs: list[dict], dedup_opts: dict | None = None, split_opts: dict | None = None,
             seeds: int = 5) -> dict[str, Any]:
    """Every figure of the module docstring for one collection."""
    from ..similarity.sets import set_similarity
    run = run_stages(recs, dedup_opts, split_opts)
    by_id = {r["id"]: r for r in recs}
    song_of = {r["id"]: r["song"] for r in recs}
    mel = {r["id"]: melody_intervals(r["piece"]) for r in recs}
    kept = run["kept"]
    part_of = {k: run["split"][k].values["split"] for k in kept}
    ours = songs_across_parts(part_of, song_of)
    rand = [songs_across_parts(random_split(kept, s), song_of) for s in range(seeds)]
    # songs keeping two files with the same melody track
    kept_by_song: dict[str, list[str]] = defaultdict(list)
    for k in kept:
        kept_by_song[song_of[k]].append(k)
    same_melody_songs = []
    for song, ks in sorted(kept_by_song.items()):
        best = max((melody_similarity(mel[a], mel[b]) for a, b in combinations(ks, 2)), default=0.0)
        if best >= SAME_MELODY:
            same_melody_songs.append((song, round(best, 3)))
    # pairs of one song sharing a melody, and what our similarity says of them
    within = []
    by_song: dict[str, list[str]] = defaultdict(list)
    for r in recs:
        by_song[r["song"]].append(r["id"])
    members = run["members"]
    for ks in by_song.values():
        for a, b in combinations(ks, 2):
            ms = melody_similarity(mel[a], mel[b])
            if ms >= SAME_MELODY:
                sim, _ = set_similarity(members[a].artifacts["dedup"]["shingles"],
                                        members[b].artifacts["dedup"]["shingles"],
                                        **_measure_kwargs(dedup_opts))
                within.append(sim)
    # links between different songs: dedup drops and split links
    threshold = run["threshold"]
    cross, below, drops = [], 0, 0
    for k, res in run["dedup"].items():
        if res.kept:
            continue
        drops += 1
        other = res.values.get("duplicate_of")
        sim = float(res.values.get("similarity", 1.0))
        if res.reason == "near_duplicate" and sim < threshold - 1e-9:
            below += 1
        if other and song_of[other] != song_of[k]:
            cross.append({"kind": f"dedup {res.reason}", "a": by_id[k]["rel"], "b": by_id[other]["rel"],
                          "similarity": round(sim, 3),
                          "melody_similarity": round(melody_similarity(mel[k], mel[other]), 3)})
    for a, b in run["group_links"]:
        if song_of[a] != song_of[b]:
            sim, _ = set_similarity(members[a].artifacts["dedup"]["shingles"],
                                    members[b].artifacts["dedup"]["shingles"],
                                    **_measure_kwargs(dedup_opts))
            cross.append({"kind": "split link", "a": by_id[a]["rel"], "b": by_id[b]["rel"],
                          "similarity": round(float(sim), 3),
                          "melody_similarity": round(melody_similarity(mel[a], mel[b]), 3)})
    secs = run["seconds"]
    total = sum(secs.values())
    within_arr = np.array(within) if within else np.zeros(1)
    return {"files": len(recs), "songs": len(by_song), "kept": len(kept), "dropped": drops,
            "songs_across_parts": ours, "split_songs": split_songs(part_of, song_of),
            "random_split_songs_across_parts": rand,
            "songs_keeping_same_melody": same_melody_songs,
            "songs_with_two_kept": sum(1 for ks in kept_by_song.values() if len(ks) > 1),
            "same_melody_pairs": len(within),
            "same_melody_pair_similarity": {
                "min": float(within_arr.min()), "median": float(np.median(within_arr)),
                "below_threshold": int(np.sum(within_arr < threshold))},
            "cross_song_links": cross, "drops_below_threshold": below,
            "seconds": secs, "files_per_s": len(recs) / total if total else float("inf"),
            "split_folders": run["folders"],
            "prepare_ms_per_file": 1000 * secs["prepare"] / max(1, len(recs))}


def _measure_kwargs(dedup_opts: dict | None) -> dict[str, Any]:
    """The measure options ``set_similarity`` shares with the dedup stage's defaults."""
    from ..stages.dedup import Dedup
    o = Dedup(dedup_opts or {}).opts
    return {"min_size_ratio": float(o["min_size_ratio"])}


def format_real(res: dict[str, Any]) -> str:
    """The real-collection figures as plain text lines."""
    s = res["same_melody_pair_similarity"]
    lines = [
        f"{res['files']} files, {res['songs']} songs; kept {res['kept']}, dropped {res['dropped']}",
        f"songs with kept files in more than one part: ours {res['songs_across_parts']}, "
        f"random split {', '.join(map(str, res['random_split_songs_across_parts']))}; "
        f"ours: {res['split_songs']}",
        f"songs keeping two files with the same melody track: {len(res['songs_keeping_same_melody'])} "
        f"of {res['songs']} ({100 * len(res['songs_keeping_same_melody']) / max(1, res['songs']):.1f}%) "
        f"{[s for s, _ in res['songs_keeping_same_melody']][:20]}",
        f"songs keeping two or more files: {res['songs_with_two_kept']}",
        f"split group_by_folder: {json.dumps(res.get('split_folders'))}",
        f"pairs of one song sharing a melody track: {res['same_melody_pairs']}; our similarity "
        f"min {s['min']:.3f}, median {s['median']:.3f}, {s['below_threshold']} below the dedup threshold",
        f"dedup drops below threshold: {res['drops_below_threshold']}",
        f"files/s (prepare + dedup + split): {res['files_per_s']:.0f}; prepare "
        f"{res['prepare_ms_per_file']:.3f} ms/file; seconds {json.dumps({k: round(v, 3) for k, v in res['seconds'].items()})}",
        f"links between different songs: {len(res['cross_song_links'])}",
    ]
    for c in res["cross_song_links"]:
        lines.append(f"  {c['kind']}: {c['a']} ~ {c['b']} similarity {c['similarity']:.3f}, "
                     f"melody-track similarity {c['melody_similarity']:.3f}")
    return "\n".join(lines)


# --- music21's Bach chorales --------------------------------------------------------------------

#: Soprano similarity (aligned beat-to-beat moves, ``soprano_beats``) from which two chorales
#: carry the same tune, and below which they carry different tunes (between: counted in
#: neither, listed when linked).
SAME_TUNE, OTHER_TUNE = 0.8, 0.5


def render_chorales(cache: Path | None = None) -> list[dict[str, Any]]:
    """Every ``bach/bwv*`` chorale of music21's corpus as MIDI bytes (one track per part,
    named by music21) with its soprano's pitch intervals; cached as JSON in ``cache``."""
    import base64
    if cache is not None and Path(cache).exists():
        return [dict(r, midi=base64.b64decode(r["midi"])) for r in json.loads(Path(cache).read_text())]
    from music21 import corpus, midi
    out = []
    for path in sorted(p for p in corpus.getComposer("bach") if p.name.startswith("bwv")):
        score = corpus.parse(str(path))
        sop = [p for p in score.parts if (p.partName or "").lower().startswith("soprano")]
        if not sop:
            continue
        pitches = [max(x.pitches).midi for x in sop[0].flatten().notes]
        data = midi.translate.streamToMidiFile(score).writestr()
        out.append({"name": path.name, "midi": data,
                    "soprano": [b - a for a, b in zip(pitches, pitches[1:])]})
    if cache is not None:
        Path(cache).write_text(json.dumps([dict(r, midi=base64.b64encode(r["midi"]).decode())
                                           for r in out]))
    return out


def soprano_beats(piece: Any) -> list[int]:
    """The soprano's moves from beat to beat: the pitch sounding at each quarter-note beat of
    the track named Soprano, successive differences, repeated pitches left out (passing and
    neighbour notes between beats, which harmonizations of one tune vary, are not seen)."""
    names = [n.strip().lower() for n in piece.track_names]
    tracks = [t for t, name in enumerate(names) if name.startswith("soprano")]
    if not tracks:
        return []
    n = piece.notes[piece.notes["track"] == tracks[0]]
    if not len(n):
        return []
    tpb = piece.ticks_per_beat
    beats = np.arange(0, int(n["end"].max()), tpb)
    idx = np.searchsorted(n["start"], beats, side="right") - 1
    ok = (idx >= 0) & (n["end"][np.maximum(idx, 0)] > beats)
    pitches = n["pitch"][idx[ok]].astype(int)
    moves = np.diff(pitches)
    return moves[moves != 0].tolist()


def chorale_check(works: list[dict[str, Any]], dedup_opts: dict | None = None,
                  group_threshold: float = 0.2) -> dict[str, Any]:
    """Pairs of chorales with one tune (soprano similarity >= ``SAME_TUNE``) linked by dedup
    (its clusters) and at ``group_threshold``; every linked pair of different tunes (soprano
    similarity < ``OTHER_TUNE``) listed."""
    import hashlib
    from ..similarity.grouping import near_links
    from ..midi.decode import decode
    from ..stages.dedup import Dedup
    recs = []
    for w in works:
        sha = hashlib.sha256(w["midi"]).hexdigest()
        piece = decode(w["midi"])
        recs.append({"rel": w["name"], "sha256": sha, "id": sha[:16], "piece": piece,
                     "soprano": soprano_beats(piece)})
    stage = Dedup(dedup_opts or {})
    members = [Member(r["id"], r["sha256"], r["rel"], {},
                      {"dedup": stage.prepare(r["piece"], FileContext(r["piece"], r["rel"], r["sha256"]))})
               for r in recs]
    res = stage.run_corpus(members, CorpusState())
    cluster = {k: v.values["cluster"] for k, v in res.items()}
    arts = {m.id: m.artifacts["dedup"] for m in members}
    low = near_links({k: a["signature"] for k, a in arts.items()}, group_threshold,
                     {k: a["shingles"] for k, a in arts.items()})
    low_pairs = {(min(a, b), max(a, b)): s for a, b, s in low}
    by_id = {r["id"]: r for r in recs}
    same, same_linked, same_grouped, wrong, same_found = 0, 0, 0, [], []
    known = sorted(k for k, r in by_id.items() if r["soprano"])  # a soprano part was found
    for a, b in combinations(known, 2):
        ms = melody_similarity(by_id[a]["soprano"], by_id[b]["soprano"])
        linked = cluster[a] == cluster[b]
        grouped = (a, b) in low_pairs
        if ms >= SAME_TUNE:
            same += 1
            same_linked += linked
            same_grouped += grouped or linked
            if grouped or linked:
                same_found.append((by_id[a]["rel"], by_id[b]["rel"]))
        elif ms < OTHER_TUNE and (linked or grouped):
            wrong.append({"a": by_id[a]["rel"], "b": by_id[b]["rel"], "soprano_similarity": round(ms, 3),
                          "kind": "dedup cluster" if linked else f"link at {group_threshold}",
                          "similarity": round(low_pairs.get((a, b), 0.0), 3)})
    return {"chorales": len(recs), "with_soprano": len(known), "same_tune_pairs": same, "same_tune_linked_by_dedup": same_linked,
            "same_tune_linked_at_group_threshold": same_grouped, "different_tunes_linked": wrong,
            "same_tune_linked_pairs": same_found}


def format_chorales(res: dict[str, Any]) -> str:
    lines = [f"{res['chorales']} chorales ({res['with_soprano']} with a part named Soprano, "
             f"compared); {res['same_tune_pairs']} pairs with one tune (soprano "
             f"similarity >= {SAME_TUNE}): {res['same_tune_linked_by_dedup']} in one dedup cluster, "
             f"{res['same_tune_linked_at_group_threshold']} linked at the split's threshold",
             f"pairs of different tunes (soprano similarity < {OTHER_TUNE}) linked: "
             f"{len(res['different_tunes_linked'])}"]
    lines += [f"  {w['kind']}: {w['a']} ~ {w['b']} similarity {w['similarity']}, soprano "
              f"{w['soprano_similarity']}" for w in res["different_tunes_linked"]]
    return "\n".join(lines)
