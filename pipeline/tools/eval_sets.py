"""Evaluation sets for key and meter detection across genres, with music21's analyses.

Each loader returns a list of *works*, plain dicts::

    {"set": "folk", "name": "airdsAirs/book4.abc#12",
     "midi": bytes,            # the MIDI file without key-signature events (pop: as on disk)
     "midi_no_meter": bytes,   # also without time-signature events (corpus sets only)
     "truth": (tonic_pc, "major"|"minor") | None,   # None: no major/minor truth (modal tune...)
     "meter": "6/8" | None,    # the notated meter (meter evaluations reuse the same works)
     "modulates": bool | None, # the annotation says the piece changes key (pop: n_keys > 1)
     "music21": {method: (tonic_pc, mode)}, "music21_seconds": {method: s}}

Sets:

- ``chorales``: music21's bundled Bach chorales (``bach/bwv*``, evenly spaced subsets); truth =
  key signature plus final bass note (common practice in key-finding evaluation).
- ``folk``: every tune of music21's *unreserved* folk books ``airdsAirs`` (books 1-6) and
  ``miscFolk`` (two opuses); truth = the tune's ABC ``K:`` field (major/minor/ionian/aeolian
  only; modal tunes get no key truth) and ``M:`` field.
- ``classical``: the string quartets, piano and vocal pieces of the corpus (Beethoven, Mozart,
  Haydn, Schumann, Chopin, Joplin, ...); truth = the stated key signature plus the final bass note,
  as for chorales (pieces whose ending fits neither reading get no truth).
- ``pop``: the POP909 development folder passed as an argument (``labels.json``: ``tonic_pc``,
  ``mode``, ``n_keys``, ``meter_exact``); the main arrangement of each song.

music21's ``oneills1850``, ``essenFolksong`` and ``ryansMammoth`` are reserved and never read.
music21's analyzers run on music21's own parse of the *same* MIDI bytes. Rendering and music21
parses are slow, so each work is cached as tagged JSON (never pickle) in ``cache_dir()``:
``$MIDISIFT_CACHE_DIR`` or ``<tmp>/midisift-music21-cache``, one file per work, so larger
samples reuse smaller ones.
"""
from __future__ import annotations

import hashlib
import json
import os
import re
import time
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np

from ..midi.piece import (DEFAULT_TEMPO, KEY_DTYPE, METER_DTYPE, TEMPO_DTYPE, Piece, empty_notes,
                          sort_notes)
from ..analysis import key as keymod
from ..analysis import meter as metermod

#: music21's analyzers run side by side: its default ``analyze('key')`` and its single profiles.
MUSIC21_KEY_METHODS = ("key", "key.krumhanslschmuckler", "key.aardenessen",
                       "key.temperleykostkapayne", "key.bellmanbudge", "key.simple")

RESERVED = ("oneills1850", "essenFolksong", "ryansMammoth")

FOLK_FILES = tuple(f"airdsAirs/book{i}.abc" for i in range(1, 7)) + (
    "miscFolk/americanfifeopus.abc", "miscFolk/northumbrianminstrelsyopus.abc")

#: Corpus folders of the classical set (every score file inside, one file per movement).
CLASSICAL_FOLDERS = ("beethoven", "mozart", "haydn", "schubert", "schumann_robert",
                     "schumann_clara", "chopin", "handel", "corelli", "cpebach", "joplin",
                     "weber", "verdi", "beach", "liliuokalani", "johnson_j_r")

#: Bump when the rendering or a truth rule changes, to invalidate cached works.
CACHE_VERSION = 1


def cache_dir() -> Path:
    import tempfile
    d = Path(os.environ.get("MIDISIFT_CACHE_DIR")
             or Path(tempfile.gettempdir()) / "midisift-music21-cache")
    d.mkdir(parents=True, exist_ok=True)
    return d


def _cached_work(set_name: str, ident: str, build: Callable[[], dict | None]) -> dict | None:
    """``build()``'s work, cached as one tagged-JSON file per work (bytes as base64)."""
    from .eval_midi import from_json as _from_json, to_json as _to_json
    import music21
    digest = hashlib.sha1(f"{CACHE_VERSION}:{music21.__version__}:{ident}".encode()).hexdigest()[:20]
    path = cache_dir() / f"eval-{set_name}" / f"{digest}.json"
    if path.exists():
        try:
            return _from_json(json.loads(path.read_text(encoding="utf-8")))
        except (OSError, ValueError, KeyError, TypeError):  # torn or stale: rebuild
            pass
    value = build()
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(f".tmp{os.getpid()}")
    tmp.write_text(json.dumps(_to_json(value)), encoding="utf-8")
    os.replace(tmp, path)
    return value


def music21_keys(data: bytes) -> tuple[dict, dict]:
    """music21's key analyses of its own parse of MIDI bytes, and the seconds each took
    (the parse itself is timed under ``"parse"``)."""
    from music21 import converter
    t0 = time.perf_counter()
    parsed = converter.parse(data, format="midi")
    times = {"parse": time.perf_counter() - t0}
    keys = {}
    for method in MUSIC21_KEY_METHODS:
        t0 = time.perf_counter()
        k = parsed.analyze(method)
        times[method] = time.perf_counter() - t0
        keys[method] = (k.tonic.pitchClass, k.mode)
    return keys, times


def _render(score) -> tuple[bytes, bytes]:
    from music21 import midi
    from .eval_midi import strip_meta
    data = midi.translate.streamToMidiFile(score).writestr()
    return (strip_meta(data, ("key_signature",)),
            strip_meta(data, ("key_signature", "time_signature")))


def _work(set_name: str, name: str, midi: bytes, midi_no_meter: bytes | None, truth, meter,
          modulates=None, with_music21: bool = True) -> dict:
    keys, times = music21_keys(midi) if with_music21 else ({}, {})
    return {"set": set_name, "name": name, "midi": midi, "midi_no_meter": midi_no_meter,
            "truth": truth, "meter": meter, "modulates": modulates,
            "music21": keys, "music21_seconds": times}


def _parallel_map(fn: Callable, items: list, workers: int | None = None) -> list:
    """``[fn(x) for x in items]`` in worker processes (music21 is CPU-bound)."""
    workers = workers or int(os.environ.get("MIDISIFT_EVAL_WORKERS", "2"))
    if workers < 2 or len(items) < 4:
        return [fn(x) for x in items]
    from concurrent.futures import ProcessPoolExecutor
    with ProcessPoolExecutor(workers) as pool:
        return list(pool.map(fn, items, chunksize=2))


def _spaced(items: list, count: int | None) -> list:
    """A deterministic, evenly spaced subset of ``count`` items (all when None or larger)."""
    if count is None or count >= len(items):
        return list(items)
    step = len(items) / count
    return [items[int(i * step)] for i in range(count)]


# ---------------------------------------------------------------------------------------------
# Score-based truth (chorales, classical)

def truth_from_signature_and_bass(score) -> tuple[int, str] | None:
    """Key signature of the first part plus the final bass note: the final lowest pitch class
    must be the major or the relative-minor tonic of the signature, else None (modal or
    half-cadence ending). Common practice in key-finding evaluation, no single source."""
    ks = score.parts[0].flatten().getElementsByClass("KeySignature") if score.parts else []
    if not ks:
        ks = score.flatten().getElementsByClass("KeySignature")
    if not ks:
        return None
    sharps = ks[0].sharps
    last_offset, final_pc = None, None
    for part in score.parts or [score]:
        notes = part.flatten().notes
        if not notes:
            continue
        last = notes[-1]
        end = last.offset + last.quarterLength
        low = min(p.midi for p in last.pitches)
        if last_offset is None or end > last_offset + 1e-6 or (
                abs(end - last_offset) <= 1e-6 and low < final_pc[1]):
            last_offset, final_pc = end, (low % 12, low)
    if final_pc is None:
        return None
    pc = final_pc[0]
    major_pc = (7 * sharps) % 12
    if pc == major_pc:
        return major_pc, "major"
    if pc == (major_pc + 9) % 12:
        return pc, "minor"
    return None


def _render_score_path(item: tuple[str, str, str]) -> dict | None:
    set_name, rel, path = item

    def build():
        from music21 import converter
        try:
            score = converter.parse(path)
            if hasattr(score, "scores"):  # an opus: take its first score
                score = score.scores[0]
            ts = score.flatten().getElementsByClass("TimeSignature")
            midi, no_meter = _render(score)
            truth = truth_from_signature_and_bass(score)
        except Exception as exc:  # a few corpus files do not parse or render: skip them
            return {"set": set_name, "name": rel, "error": f"{type(exc).__name__}: {exc}"}
        meter = ts[0].ratioString if ts and len({t.ratioString for t in ts}) == 1 else None
        return _work(set_name, rel, midi, no_meter, truth, meter)
    work = _cached_work(set_name, rel, build)
    return None if work is None or "error" in work else work


def chorales(count: int = 100, offset: int = 0) -> list[dict]:
    """Evenly spaced Bach chorales (``offset`` shifts the subset; 0 and 2 share no piece)."""
    from music21 import corpus
    paths = sorted(p for p in corpus.getComposer("bach") if p.name.startswith("bwv"))
    step = max(1, len(paths) // count)
    chosen = paths[offset::step][:count]
    items = [("chorales", f"bach/{p.name}", str(p)) for p in chosen]
    return [w for w in _parallel_map(_render_score_path, items) if w]


#: Classical files above this size (bytes on disk: whole multi-movement quartets, long songs)
#: are skipped to bound the evaluation's run time (music21 takes minutes on each).
CLASSICAL_MAX_BYTES = 120_000


def classical(count: int | None = None, max_bytes: int = CLASSICAL_MAX_BYTES) -> list[dict]:
    """The classical pieces of the corpus (see ``CLASSICAL_FOLDERS``), one work per file of at
    most ``max_bytes``; files of the same piece in two formats count once (the first format in
    name order)."""
    from music21 import corpus
    root = Path(corpus.getWork("bach/bwv66.6")).parent.parent
    seen, items = set(), []
    for folder in CLASSICAL_FOLDERS:
        for p in sorted((root / folder).rglob("*")):
            if (p.suffix not in (".mxl", ".xml", ".musicxml", ".krn") or "__" in str(p)
                    or p.stat().st_size > max_bytes):
                continue
            stem = str(p.relative_to(root).with_suffix(""))
            if stem in seen:
                continue
            seen.add(stem)
            items.append(("classical", str(p.relative_to(root)), str(p)))
    return [w for w in _parallel_map(_render_score_path, _spaced(items, count)) if w]


# ---------------------------------------------------------------------------------------------
# Folk tunes in ABC: K: and M: fields as truth

_ABC_MODES = {"": "major", "maj": "major", "major": "major", "ion": "major", "ionian": "major",
              "m": "minor", "min": "minor", "minor": "minor", "aeo": "minor", "aeolian": "minor"}
_ABC_METERS = {"C": "4/4", "C|": "2/2"}
_NOTE_PC = {"C": 0, "D": 2, "E": 4, "F": 5, "G": 7, "A": 9, "B": 11}


def abc_field(text: str, name: str) -> str | None:
    """The first header value of an ABC field (``K``, ``M``), comment stripped."""
    for line in text.splitlines():
        if line.startswith(f"{name}:"):
            return line[2:].split("%")[0].strip()
    return None


def abc_key(value: str | None) -> tuple[int, str] | None:
    """``K:`` value -> (tonic_pc, mode); None for modal keys (dorian, mixolydian...), highland
    pipe keys and anything unreadable. E.g. ``G`` -> (7, major), ``Bbm`` -> (10, minor),
    ``F#min`` -> (6, minor), ``Ador`` -> None."""
    if not value:
        return None
    m = re.match(r"^([A-Ga-g])([#b]?)\s*([A-Za-z]*)", value)
    if not m:
        return None
    pc = (_NOTE_PC[m.group(1).upper()] + {"#": 1, "b": -1, "": 0}[m.group(2)]) % 12
    mode = _ABC_MODES.get(m.group(3).lower())
    if mode is None:
        return None
    return pc, mode


def abc_meter(value: str | None) -> str | None:
    if not value:
        return None
    value = _ABC_METERS.get(value, value)
    return value if re.fullmatch(r"\d+/\d+", value) else None


def folk_tunes_text() -> list[tuple[str, str]]:
    """(name, ABC text) of every tune in ``FOLK_FILES``, in file order."""
    from music21 import corpus
    out = []
    for rel in FOLK_FILES:
        assert not any(r in rel for r in RESERVED)
        text = Path(corpus.getWork(rel)).read_text(encoding="latin-1")
        chunks = text.split("\nX:")
        for i, c in enumerate(chunks):
            c = "X:" + c if i else c
            if "\nK:" in c or c.startswith("K:"):
                out.append((f"{rel}#{i}", c))
    return out


def _render_folk(item: tuple[str, str]) -> dict | None:
    name, text = item

    def build():
        from music21 import converter
        try:
            score = converter.parse(text, format="abc")
            if len(score.flatten().notes) < 8:
                return {"set": "folk", "name": name, "error": "fewer than 8 notes"}
            midi, no_meter = _render(score)
        except Exception as exc:  # music21's ABC parser rejects a few tunes: skip them
            return {"set": "folk", "name": name, "error": f"{type(exc).__name__}: {exc}"}
        body_keys = sum(1 for line in text.splitlines() if line.startswith("K:"))
        return _work("folk", name, midi, no_meter, abc_key(abc_field(text, "K")),
                     abc_meter(abc_field(text, "M")), modulates=body_keys > 1)
    work = _cached_work("folk", name + hashlib.sha1(text.encode()).hexdigest(), build)
    return None if work is None or "error" in work else work


def folk(count: int | None = 400) -> list[dict]:
    """``count`` evenly spaced tunes of the folk books (all when None)."""
    return [w for w in _parallel_map(_render_folk, _spaced(folk_tunes_text(), count)) if w]


# ---------------------------------------------------------------------------------------------
# Pop dev set from a folder

def _render_pop(item: tuple[str, str, dict, bool]) -> dict:
    root, rel, label, with_music21 = item
    data = (Path(root) / rel).read_bytes()
    truth = (int(label["tonic_pc"]), label["mode"])
    meter = label.get("meter_exact")
    modulates = int(label.get("n_keys", 1)) > 1
    if not with_music21:
        return _work("pop", rel, data, None, truth, meter, modulates, with_music21=False)

    def build():
        w = _work("pop", rel, b"", None, truth, meter, modulates, with_music21=False)
        w["music21"], w["music21_seconds"] = music21_keys(data)
        return w
    work = _cached_work("pop", rel + hashlib.sha1(data).hexdigest(), build)
    return {**work, "midi": data}


def key_sets(chorale_count: int, folk_count: int, classical_count: int, pop_folder: str | None,
             pop_count: int | None = None, music21_pop: int | None = 0) -> dict[str, list[dict]]:
    """The key evaluation sets by name; a count of 0 (or no pop folder) leaves a set out, a
    negative count takes all of it (``pop_count`` None: every song)."""
    sets: dict[str, list[dict]] = {}
    if chorale_count:
        sets["chorales"] = chorales(chorale_count, 0)
    if folk_count:
        sets["folk"] = folk(None if folk_count < 0 else folk_count)
    if classical_count:
        sets["classical"] = classical(None if classical_count < 0 else classical_count)
    if pop_folder:
        sets["pop"] = pop(pop_folder, pop_count, music21_pop)
    return sets


def pop(folder: str | Path, count: int | None = None, music21_count: int | None = 150) -> list[dict]:
    """The main arrangement of each song in a POP909-style folder (``labels.json``);
    ``count`` evenly spaced songs (all when None); music21 runs on the first ``music21_count``
    of an evenly spaced sample (its parse takes seconds per song), the others have
    ``music21 == {}``."""
    folder = Path(folder)
    labels = json.loads((folder / "labels.json").read_text(encoding="utf-8"))["files"]
    mains = sorted(rel for rel, lab in labels.items() if lab.get("role") == "main")
    chosen = _spaced(mains, count)
    with_m21 = set(_spaced(chosen, music21_count)) if music21_count else set()
    items = [(str(folder), rel, labels[rel], rel in with_m21) for rel in chosen]
    slow = _parallel_map(_render_pop, [i for i in items if i[3]])
    fast = [_render_pop(i) for i in items if not i[3]]
    by_name = {w["name"]: w for w in slow + fast}
    return [by_name[rel] for rel in chosen]


# ---------------------------------------------------------------------------------------------
# Modulation truth: key-signature changes in the notation

def abc_key_changes(text: str) -> bool:
    """Whether an ABC tune changes key signature in its body: a later ``K:`` field whose
    major/minor key (read as its key signature: the relative major's tonic) differs from the
    header's. Modal or unreadable ``K:`` fields count by their tonic and mode letters as written,
    so ``K:G`` then ``K:Em`` is no change (one signature) and ``K:G`` then ``K:D`` is one."""
    values = [line[2:].split("%")[0].strip() for line in text.splitlines() if line.startswith("K:")]
    signatures = set()
    for value in values:
        key = abc_key(value)
        signatures.add(((key[0] + (3 if key[1] == "minor" else 0)) % 12) if key else value)
    return len(signatures) > 1


def folk_key_changes() -> dict[str, bool]:
    """``abc_key_changes`` of every folk tune, by work name."""
    return {name: abc_key_changes(text) for name, text in folk_tunes_text()}


def _score_signature_change(item: tuple[str, str]) -> tuple[str, bool | None]:
    rel, path = item

    def build():
        from music21 import converter
        try:
            score = converter.parse(path)
            if hasattr(score, "scores"):
                score = score.scores[0]
            part = score.parts[0] if score.parts else score
            sharps = [ks.sharps for ks in part.flatten().getElementsByClass("KeySignature")]
        except Exception as exc:  # files the key set skips too
            return {"name": rel, "error": f"{type(exc).__name__}: {exc}"}
        return {"name": rel, "changes": len(set(sharps)) > 1}
    rec = _cached_work("classical-signatures", rel, build)
    return rel, (None if rec is None or "error" in rec else rec["changes"])


def signature_changes(works: list[dict]) -> dict[str, bool | None]:
    """Whether the first part of each corpus-score work (chorales, classical) changes key
    signature (a notated key change), by work name (music21 parse, cached like the works;
    None for a file music21 cannot read)."""
    from music21 import corpus
    root = Path(corpus.getWork("bach/bwv66.6")).parent.parent
    items = [(w["name"], str(root / w["name"])) for w in works]
    return dict(_parallel_map(_score_signature_change, items))


# ---------------------------------------------------------------------------------------------
# Meter sets (evaluate_meter): notated meters, music21 parses kept as plain note lists
#
# Folk tunes (``FOLK_BOOKS``, ``M:`` truth), Bach chorales and the classical movements with one
# declared time signature, each split into a development and a held-out part, and the pop set's
# indexed meters; cached as JSON under /tmp/meter-cache/<music21 version>.

#: Bump when a loader's output changes, to invalidate the cache.
METER_CACHE_VERSION = 1
TPB = 480

FOLK_BOOKS = ("airdsAirs/book1.abc", "airdsAirs/book2.abc", "airdsAirs/book3.abc",
              "airdsAirs/book4.abc", "airdsAirs/book5.abc", "airdsAirs/book6.abc",
              "miscFolk/americanfifeopus.abc", "miscFolk/northumbrianminstrelsyopus.abc")
#: Corpus folders of the ``classical`` set (multi-movement works are folders of movements).
CLASSICAL_DIRS = ("beethoven", "mozart", "haydn", "schubert", "schumann_robert",
                  "schumann_clara", "chopin", "joplin", "weber", "verdi", "cpebach", "beach",
                  "johnson_j_r", "liliuokalani", "monteverdi", "opus18no1", "opus59no1",
                  "opus59no2", "opus59no3", "opus74no1", "opus1no1", "opus3no1", "opus17",
                  "opus19", "opus41no1", "k155", "k156", "k458", "k545", "k80")
#: Files larger than this are skipped in the classical set (parse time).
METER_CLASSICAL_MAX_BYTES = 600_000


def meter_cache_dir() -> Path:
    import music21
    d = Path("/tmp/meter-cache") / music21.__version__
    d.mkdir(parents=True, exist_ok=True)
    return d


# ---------------------------------------------------------------------------------------------
# music21 scores -> plain note lists (cached) -> Piece

def score_record(score, name: str) -> dict[str, Any] | None:
    """Notes (start, end in ticks at 480 per quarter; pitch; part) and the notated meter of a
    music21 score; None without a time signature, with a meter change, or under 16 notes."""
    from music21 import harmony
    sigs = {ts.ratioString for ts in score.recurse().getElementsByClass("TimeSignature")}
    if len(sigs) != 1:
        return None
    parts = list(score.parts) or [score]
    rows = []
    for pi, part in enumerate(parts):
        flat = part.stripTies().flatten()
        for n in flat.notes:
            if isinstance(n, harmony.ChordSymbol) or n.duration.isGrace:
                continue
            ql = float(n.quarterLength)
            if ql <= 0:
                continue
            start = int(round(float(n.getOffsetInHierarchy(flat)) * TPB))
            end = start + max(1, int(round(ql * TPB)))
            for p in n.pitches:
                rows.append((start, end, int(p.midi), pi))
    if len(rows) < 16:
        return None
    meter = sigs.pop()
    return {"name": name, "meter": _normal_meter(meter), "notes": rows}


def _normal_meter(meter: str) -> str:
    return {"C": "4/4", "C|": "2/2"}.get(meter, meter)


def piece_from_notes(rows: Iterable[tuple[int, int, int, int]], tpb: int = TPB) -> Piece:
    """A Piece of the given (start, end, pitch, part) rows, without time or key signatures."""
    rows = list(rows)
    notes = empty_notes(len(rows))
    if rows:
        arr = np.array(rows, dtype=np.int64)
        notes["start"], notes["end"], notes["pitch"] = arr[:, 0], arr[:, 1], arr[:, 2]
        notes["track"] = arr[:, 3]
        notes["channel"] = arr[:, 3] % 9
        notes["velocity"] = 80
        sec = 60.0 / 120 / tpb
        notes["start_s"], notes["end_s"] = arr[:, 0] * sec, arr[:, 1] * sec
    notes = sort_notes(notes)
    return Piece(notes=notes, ticks_per_beat=tpb,
                 tempos=np.array([(0, DEFAULT_TEMPO)], dtype=TEMPO_DTYPE),
                 time_signatures=np.zeros(0, dtype=METER_DTYPE),
                 key_signatures=np.zeros(0, dtype=KEY_DTYPE),
                 end_tick=int(notes["end"].max()) if len(notes) else 0)


def _cached_json(name: str, build: Callable[[], Any]) -> Any:
    path = meter_cache_dir() / f"{name}-v{METER_CACHE_VERSION}.json"
    if path.exists():
        try:
            return json.loads(path.read_text(encoding="utf-8"))
        except ValueError:  # a torn file: rebuild
            pass
    value = build()
    tmp = path.with_suffix(f".tmp{os.getpid()}")
    tmp.write_text(json.dumps(value), encoding="utf-8")
    os.replace(tmp, path)
    return value


def _abc_book(relpath: str) -> list[dict[str, Any]]:
    """The tunes of one ABC file of music21's corpus, each with its ``M:`` meter."""
    assert not any(r in relpath for r in RESERVED)

    def build():
        from music21 import corpus
        opus = corpus.parse(relpath)
        out = []
        for i, score in enumerate(opus.scores):
            try:
                rec = score_record(score, f"{relpath}#{i}")
            except Exception:  # a tune music21 cannot lay out: skipped
                rec = None
            if rec is not None:
                out.append(rec)
        return out
    return _cached_json("abc-" + relpath.replace("/", "-"), build)


def _corpus_file(path: Path) -> dict[str, Any] | None:
    def build():
        from music21 import converter
        try:
            score = converter.parse(str(path))
            if hasattr(score, "scores"):  # an opus: its first score
                score = score.scores[0]
            return score_record(score, path.stem) or {}
        except Exception:
            return {}
    root = str(path).split("/corpus/", 1)[-1].replace("/", "-")
    rec = _cached_json("file-" + root, build)
    return {**rec, "name": str(path).split("/corpus/", 1)[-1]} if rec else None


def meter_folk(split: str) -> list[dict[str, Any]]:
    """Folk tunes with notated meters: the even-numbered tunes of every book (``dev``) or the
    odd-numbered ones (``held``), so both parts cover every book's style."""
    want = 0 if split == "dev" else 1
    return [t for rel in FOLK_BOOKS for t in _abc_book(rel)
            if int(t["name"].rsplit("#", 1)[1]) % 2 == want]


def chorale_paths() -> list[Path]:
    from music21 import corpus
    return sorted(p for p in corpus.getComposer("bach") if p.name.startswith("bwv")
                  and p.suffix in (".mxl", ".xml", ".krn"))


def meter_chorales(split: str, limit: int = 120) -> list[dict[str, Any]]:
    """Bach chorales with one declared meter; even positions ``dev``, odd ``held``."""
    paths = chorale_paths()[(0 if split == "dev" else 1)::2][:limit]
    return [r for r in map(_corpus_file, paths) if r is not None]


#: Preferred encoding when a corpus work comes in several (the same notes twice would put one
#: work on both sides of the development / held-out split).
_SUFFIX_ORDER = (".mxl", ".xml", ".musicxml", ".krn")


def classical_paths() -> list[Path]:
    """The classical set's files: one encoding per work (``_SUFFIX_ORDER``), no ``_old``
    duplicates, size-limited."""
    from music21 import corpus
    root = Path(corpus.getComposer("bach")[0]).parents[1]
    chosen: dict[tuple[Path, str], Path] = {}
    for d in CLASSICAL_DIRS:
        for p in sorted((root / d).rglob("*")):
            if (p.suffix in _SUFFIX_ORDER and p.is_file() and not p.stem.endswith("_old")
                    and p.stat().st_size <= METER_CLASSICAL_MAX_BYTES
                    and not any(r in str(p) for r in RESERVED)):
                key = (p.parent, p.stem)
                if key not in chosen or _SUFFIX_ORDER.index(p.suffix) < \
                        _SUFFIX_ORDER.index(chosen[key].suffix):
                    chosen[key] = p
    return sorted(chosen.values())


def _distinct(works: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The works whose note lists differ from every earlier one's (the corpus holds a few
    works twice under different names)."""
    seen, out = set(), []
    for w in works:
        key = hash(tuple(map(tuple, w["notes"])))
        if key not in seen:
            seen.add(key)
            out.append(w)
    return out


def meter_classical(split: str) -> list[dict[str, Any]]:
    """Single-meter movements of the other corpus works; alternate files dev / held."""
    works = _distinct([r for r in map(_corpus_file, classical_paths()) if r is not None])
    return works[(0 if split == "dev" else 1)::2]


# ---------------------------------------------------------------------------------------------
# The pop dev set (passed as an argument)

def meter_pop(folder: str | Path, split: str) -> list[dict[str, Any]]:
    """Files of the pop dev set with their indexed meter; songs 1 mod 4 ``dev``, 3 mod 4
    ``held``. Each record holds the decoded Piece (time signatures removed) and the declared
    meter of the file."""
    from ..midi.decode import decode
    folder = Path(folder)
    labels = json.loads((folder / "labels.json").read_text(encoding="utf-8"))["files"]
    want = 1 if split == "dev" else 3
    out = []
    for rel, lab in sorted(labels.items()):
        if int(lab["song"]) % 4 != want:
            continue
        piece = decode((folder / rel).read_bytes())
        out.append({"name": rel, "meter": file_time_meter(lab), "label": lab["meter_exact"],
                    "piece": _without_meter(piece), "declared": metermod.meter_from_file(piece),
                    "key_declared": keymod.declared_key(piece),
                    "key_truth": (lab["tonic_pc"], lab["mode"])})
    return out


def meter_truth_corpus(folder: str | Path) -> list[dict[str, Any]]:
    """The files of a generated corpus (``midisift synth``, the shipped demo) whose
    ``truth.json`` names a meter, decoded as they are (their time signatures too: the estimate
    does not read them), with the declared meter of the file (None when it declares none).
    Files that do not decode, or without notes, are left out."""
    from ..midi.decode import decode
    from ..errors import MidisiftError
    folder = Path(folder)
    truth = json.loads((folder / "truth.json").read_text(encoding="utf-8"))["files"]
    out = []
    for rel, t in sorted(truth.items()):
        if not t.get("meter"):
            continue
        try:
            piece = decode((folder / rel).read_bytes())
        except (MidisiftError, OSError):
            continue
        if len(piece.notes) == 0:
            continue
        out.append({"name": rel, "meter": t["meter"], "piece": piece,
                    "declared": metermod.meter_from_file(piece)})
    return out


def file_time_meter(label: dict[str, Any]) -> str:
    """The pop set's meter in the file's own time base. Its 6/8 songs carry the dotted-quarter
    beat on the file's quarter note and their annotated downbeats fall every
    ``beat_midi_downbeat_gap`` (4) file quarters, as in the 4/4 songs: in the file they are bars
    of four quarter-note beats, so their truth here is 4/4 (their compound division is not
    visible in the time base)."""
    if label["meter_exact"] == "6/8" and label.get("beat_midi_downbeat_gap") == 4:
        return "4/4"
    return label["meter_exact"]


def _without_meter(piece: Piece) -> Piece:
    return Piece(**{**piece.__dict__, "time_signatures": np.zeros(0, dtype=METER_DTYPE)})


def load_meter_sets(names: list[str], pop_folder: str | None) -> dict[str, list[dict[str, Any]]]:
    loaders: dict[str, Callable[[], list[dict[str, Any]]]] = {
        "folk-dev": lambda: meter_folk("dev"), "folk-held": lambda: meter_folk("held"),
        "chorales-dev": lambda: meter_chorales("dev"), "chorales-held": lambda: meter_chorales("held"),
        "classical-dev": lambda: meter_classical("dev"), "classical-held": lambda: meter_classical("held"),
    }
    if pop_folder:
        loaders["pop-dev"] = lambda: meter_pop(pop_folder, "dev")
        loaders["pop-held"] = lambda: meter_pop(pop_folder, "held")
    return {n: loaders[n]() for n in names if n in loaders}


METER_SETS = ("folk-dev", "folk-held", "chorales-dev", "chorales-held", "classical-dev",
            "classical-held", "pop-dev", "pop-held")
