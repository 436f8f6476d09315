"""Reproduce the key-detection figures of the README: four genres, music21 side by side.

    python -m pipeline.tools.evaluate_key [--pop ../shared/data/pop909-dev] [--folk 600]
        [--classical -1] [--chorales 100] [--music21-pop 150] [--no-cv]

The command (``main``) scores the sets of ``eval_sets`` (Bach chorales, airdsAirs/miscFolk folk
tunes with ABC ``K:`` truth, classical corpus pieces, the POP909 development songs) with our
methods (the learned default cross-validated by 5 folds and leave-one-genre-out, and every
published profile with and without bass/final weighting) and music21's analyzers on the same
files, and prints exact and MIREX accuracy, accuracy by key_confidence quartile and time per
file. The functions below it on the chorales only (``chorales``, ``key_table``, meter helpers)
serve the tests and the meter figures.

Works: Bach chorales (key and meter) and the folk tunes of Aird's Airs books 4-6 plus the
misc-folk opuses (meter; books 1-3 were used while setting the meter constants). music21's
folders ``oneills1850``, ``essenFolksong`` and ``ryansMammoth`` are reserved for independent
evaluation and never used. Each work is rendered to MIDI with music21, its key-signature (and,
for meter, time-signature) events are removed, and the bytes are decoded like any input file;
music21's key analyzers are run on music21's own parse of the *same* MIDI bytes.

Key ground truth: the score's key signature plus the final bass note (common practice in
key-finding evaluation, no single source); endings on neither the major nor the relative-minor
tonic (modal or half-cadence endings) are skipped. MIREX weighted score (MIREX audio key
detection task; relations as in mir_eval.key.weighted_score with ascending fifths, from
memory): 1.0 same key, 0.5 same mode with the tonic a perfect fifth above, 0.3 relative
major/minor, 0.2 parallel major/minor, else 0.

Rendering is slow (about 0.7 s per chorale), so rendered bytes, ground truth and music21's
analyses are cached on disk under the system temp dir, keyed by the music21 version.
"""
from __future__ import annotations

import argparse
import json
import os
import tempfile
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np

from ..analysis import key as keymod
from ..analysis import meter as metermod
from ..midi.piece import Piece
from .eval_midi import decode, from_json, strip_meta, to_json

#: Bump when the rendering or the ground truth changes, to invalidate the disk cache.
CACHE_VERSION = 2

RESERVED = ("oneills1850", "essenFolksong", "ryansMammoth")

#: music21's key analyzers compared against ours (identifiers of ``Stream.analyze``).
MUSIC21_KEY_METHODS = ("key.krumhanslschmuckler", "key.aardenessen", "key.temperleykostkapayne",
                       "key.bellmanbudge", "key.simple")


def cache_dir() -> Path:
    import music21
    d = Path(tempfile.gettempdir()) / "midisift-music21-cache" / music21.__version__
    d.mkdir(parents=True, exist_ok=True)
    return d


def _cached(name: str, build):
    """``build()``'s value, cached as tagged JSON (never pickle: the folder is shared)."""
    path = cache_dir() / f"{name}.json"
    if path.exists():
        try:
            return from_json(json.loads(path.read_text(encoding="utf-8")))
        except (OSError, ValueError, KeyError, TypeError):  # a torn or stale cache file: rebuild it
            pass
    value = build()
    tmp = path.with_suffix(f".tmp{os.getpid()}")
    tmp.write_text(json.dumps(to_json(value)), encoding="utf-8")
    os.replace(tmp, path)
    return value


# ---------------------------------------------------------------------------------------------
# Decoding

# ---------------------------------------------------------------------------------------------
# Bach chorales: key ground truth and music21's analyses of the rendered MIDI

def chorale_paths(count: int = 100, offset: int = 0) -> list[Path]:
    """A deterministic, evenly spaced subset of music21's Bach chorales (``bach/bwv*``).

    ``offset=0`` is the evaluation subset (tests and README figures); ``offset=2`` with the
    same count is a disjoint development subset, on which the default weights were chosen.
    """
    from music21 import corpus
    paths = sorted(p for p in corpus.getComposer("bach") if p.name.startswith("bwv"))
    step = max(1, len(paths) // count)
    return paths[offset::step][:count]


def _key_truth(score) -> tuple[int, str] | None:
    """Key from the key signature plus the final bass note (common practice in key-finding
    evaluation): the final bass pitch class must be the major or the relative-minor tonic of
    the signature, otherwise the ending is modal (or on the dominant) and the work is skipped."""
    ks = score.parts[0].flatten().getElementsByClass("KeySignature")
    if not ks:
        return None
    sharps = ks[0].sharps
    bass = score.parts[-1].flatten().notes
    if not bass:
        return None
    last = bass[-1]
    final_pc = min(p.midi for p in last.pitches) % 12
    major_pc = (7 * sharps) % 12
    if final_pc == major_pc:
        return major_pc, "major"
    if final_pc == (major_pc + 9) % 12:
        return final_pc, "minor"
    return None


def _m21_key(k) -> tuple[int, str]:
    return k.tonic.pitchClass, k.mode


def render_chorale(path: Path) -> dict[str, Any]:
    """Render one chorale: MIDI bytes without key-signature events, the ground truth, the
    declared meter, and music21's key analyses (with times) of the same MIDI bytes."""
    from music21 import converter, midi
    score = converter.parse(str(path))
    ts = score.parts[0].flatten().getElementsByClass("TimeSignature")
    data = midi.translate.streamToMidiFile(score).writestr()
    no_key = strip_meta(data, ("key_signature",))
    parsed = converter.parse(no_key, format="midi")
    analyses, times = {}, {}
    for method in MUSIC21_KEY_METHODS:
        t0 = time.perf_counter()
        k = parsed.analyze(method)
        times[method] = time.perf_counter() - t0
        analyses[method] = _m21_key(k)
    return {"name": path.stem, "midi": no_key,
            "midi_no_meter": strip_meta(data, ("key_signature", "time_signature")),
            "truth": _key_truth(score), "meter": ts[0].ratioString if ts else None,
            "music21": analyses, "music21_seconds": times}


def chorales(count: int = 100, offset: int = 0) -> list[dict[str, Any]]:
    """Rendered chorales (cached on disk per music21 version, subset size and offset)."""
    suffix = f"-{offset}" if offset else ""
    return _cached(f"chorales-v{CACHE_VERSION}-{count}{suffix}",
                   lambda: _parallel_map(render_chorale, chorale_paths(count, offset)))


# ---------------------------------------------------------------------------------------------
# Folk tunes in ABC (many meters) for meter evaluation

#: Aird's Airs books 1-3 were looked at while setting the meter method's constants; books 4-6
#: and the misc-folk opuses are the held-out evaluation set used by the tests.
ABC_EVAL_FILES = ("airdsAirs/book4.abc", "airdsAirs/book5.abc", "airdsAirs/book6.abc",
                  "miscFolk/americanfifeopus.abc", "miscFolk/northumbrianminstrelsyopus.abc")
ABC_DEV_FILES = ("airdsAirs/book1.abc", "airdsAirs/book2.abc", "airdsAirs/book3.abc")


def _abc_tunes(relpath: str) -> list[str]:
    from music21 import corpus
    assert not any(r in relpath for r in RESERVED)
    text = Path(corpus.getWork(relpath)).read_text(encoding="latin-1")
    chunks = text.split("\nX:")
    return ["X:" + c if i else c for i, c in enumerate(chunks) if "K:" in c]


_ABC_HEADER_METER = {"C": "4/4", "C|": "2/2"}


def _header_meter(text: str) -> str | None:
    """The meter an ABC tune's ``M:`` header declares (``C`` = 4/4, ``C|`` = 2/2)."""
    for line in text.splitlines():
        if line.startswith("M:"):
            value = line[2:].split("%")[0].strip()
            return _ABC_HEADER_METER.get(value, value)
    return None


def render_abc_tune(item: tuple[str, str]) -> dict[str, Any] | None:
    """One ABC tune rendered to MIDI without time- and key-signature events; None when
    music21 cannot parse it, it changes meter or it is shorter than 16 notes."""
    from music21 import converter, midi
    name, text = item
    try:
        score = converter.parse(text, format="abc")
        ts = score.flatten().getElementsByClass("TimeSignature")
        if not ts or len(score.flatten().notes) < 16 or len({t.ratioString for t in ts}) > 1:
            return None
        data = midi.translate.streamToMidiFile(score).writestr()
    except Exception:  # music21's ABC parser rejects a few tunes; skip them
        return None
    return {"name": name, "meter": ts[0].ratioString,
            "midi_no_meter": strip_meta(data, ("key_signature", "time_signature"))}


def render_abc_tunes(files: tuple[str, ...], per_meter: int) -> list[dict[str, Any]]:
    """The first ``per_meter`` tunes per header meter of the ABC files (in file order),
    rendered in parallel; the truth is the time signature music21 reads from the tune."""
    taken: dict[str, int] = {}
    items = []
    for rel in files:
        for i, text in enumerate(_abc_tunes(rel)):
            meter = _header_meter(text)
            if meter is None or taken.get(meter, 0) >= per_meter:
                continue
            taken[meter] = taken.get(meter, 0) + 1
            items.append((f"{rel}#{i}", text))
    return [r for r in _parallel_map(render_abc_tune, items) if r is not None]


def _parallel_map(fn: Callable, items: list) -> list:
    """``[fn(x) for x in items]`` over all cores (music21 rendering is CPU-bound)."""
    workers = min(os.cpu_count() or 1, 4)
    if workers < 2 or len(items) < 8:
        return [fn(x) for x in items]
    from concurrent.futures import ProcessPoolExecutor
    with ProcessPoolExecutor(workers) as pool:
        return list(pool.map(fn, items, chunksize=4))


def abc_tunes(split: str = "eval", per_meter: int = 12) -> list[dict[str, Any]]:
    files = ABC_EVAL_FILES if split == "eval" else ABC_DEV_FILES
    return _cached(f"abc-v{CACHE_VERSION}-{split}-{per_meter}", lambda: render_abc_tunes(files, per_meter))


# ---------------------------------------------------------------------------------------------
# Scoring

def mirex_score(estimate: tuple[int, str], truth: tuple[int, str]) -> float:
    """MIREX weighted key score of one estimate (see the module docstring)."""
    (epc, emode), (tpc, tmode) = estimate, truth
    if (epc, emode) == (tpc, tmode):
        return 1.0
    if emode == tmode and (epc - tpc) % 12 == 7:
        return 0.5
    if emode != tmode:
        # relative: C major <-> A minor (the minor tonic 9 semitones above the major tonic)
        if (tmode == "major" and (epc - tpc) % 12 == 9) or (tmode == "minor" and (epc - tpc) % 12 == 3):
            return 0.3
        if epc == tpc:
            return 0.2
    return 0.0


def score_keys(estimates: list[tuple[int, str]], truths: list[tuple[int, str]]) -> tuple[float, float]:
    """(exact accuracy, mean MIREX weighted score)."""
    exact = float(np.mean([e == t for e, t in zip(estimates, truths)]))
    mirex = float(np.mean([mirex_score(e, t) for e, t in zip(estimates, truths)]))
    return exact, mirex


def our_estimator(profile: str, bass_weight: float = 0.0,
                  final_weight: float = 0.0) -> Callable[[Piece], tuple[int, str]]:
    def run(piece: Piece) -> tuple[int, str]:
        k = keymod.estimate_key(piece, profile, bass_weight=bass_weight, final_weight=final_weight)
        return k.tonic_pc, k.mode
    return run


#: Our variants in the comparison table: (label, profile, bass_weight, final_weight).
VARIANTS: tuple[tuple[str, str, float, float], ...] = tuple(
    (f"{p}{tag}", p, bass, final)
    for tag, bass, final in (("", 0.0, 0.0), (" +bass", 1.0, 0.0), (" +final", 0.0, 2.0),
                             (" +bass+final", 1.0, 2.0))
    for p in sorted(keymod.PROFILES)) + (
    ("default", keymod.DEFAULT_PROFILE, keymod.DEFAULT_BASS_WEIGHT, keymod.DEFAULT_FINAL_WEIGHT),
)


def key_table(works: list[dict[str, Any]]) -> list[tuple[str, float, float, int]]:
    """Rows (label, exact, MIREX, n) for our variants and music21's analyzers on the works
    that have a ground truth."""
    rated = [w for w in works if w["truth"] is not None]
    truths = [w["truth"] for w in rated]
    pieces = [decode(w["midi"]) for w in rated]
    rows = []
    for label, profile, bass, final in VARIANTS:
        est = [our_estimator(profile, bass, final)(p) for p in pieces]
        rows.append((f"midisift {label}", *score_keys(est, truths), len(rated)))
    for method in MUSIC21_KEY_METHODS:
        est = [tuple(w["music21"][method]) for w in rated]
        rows.append((f"music21 {method}", *score_keys(est, truths), len(rated)))
    return rows


def agreement_with_music21(works: list[dict[str, Any]], profile: str = "krumhansl_kessler",
                           method: str = "key.krumhanslschmuckler") -> tuple[float, list[str]]:
    """Fraction of works where our plain estimate equals music21's, and the disagreeing names."""
    same, differ = 0, []
    for w in works:
        ours = our_estimator(profile)(decode(w["midi"]))
        if ours == tuple(w["music21"][method]):
            same += 1
        else:
            differ.append(w["name"])
    return same / len(works), differ


def key_timing(works: list[dict[str, Any]], repeats: int = 200) -> tuple[float, float]:
    """(our µs per estimate, music21 µs per analyze) measured side by side on the same works
    (music21 on its parse of the same MIDI bytes; parsing excluded from both)."""
    from music21 import converter
    pieces = [decode(w["midi"]) for w in works]
    streams = [converter.parse(w["midi"], format="midi") for w in works]
    t0 = time.perf_counter()
    for _ in range(repeats):
        for p in pieces:
            keymod.estimate_key(p)
    ours = (time.perf_counter() - t0) / (repeats * len(pieces))
    t0 = time.perf_counter()
    for s in streams:
        s.analyze("key.krumhanslschmuckler")
    theirs = (time.perf_counter() - t0) / len(streams)
    return ours * 1e6, theirs * 1e6


def meter_table(works: list[dict[str, Any]]) -> dict[str, float]:
    """Exact and by-family accuracy of ``estimate_meter`` against the declared meters, and
    the majority-class baselines on the same works."""
    truth = [w["meter"] for w in works]
    est = [metermod.estimate_meter(decode(w["midi_no_meter"])).meter for w in works]
    fam_t = [metermod.meter_family(m) for m in truth]
    fam_e = [metermod.meter_family(m) for m in est]
    majority = max(sorted(set(truth)), key=truth.count)
    majority_fam = max(sorted(set(fam_t)), key=fam_t.count)
    return {
        "n": len(works),
        "exact": float(np.mean([a == b for a, b in zip(est, truth)])),
        "family": float(np.mean([a == b for a, b in zip(fam_e, fam_t)])),
        "baseline_exact": truth.count(majority) / len(truth),
        "baseline_family": fam_t.count(majority_fam) / len(fam_t),
        "majority": majority, "majority_family": majority_fam,
    }


def meter_works(n_chorales: int = 100, per_meter: int = 12) -> list[dict[str, Any]]:
    """The meter evaluation set: chorales with a declared meter plus the held-out folk tunes."""
    return ([c for c in chorales(n_chorales) if c["meter"]]
            + abc_tunes("eval", per_meter))


# ---------------------------------------------------------------------------------------------
# Across genres (eval_sets): the tables of the README's Key detection section

#: Our correlation variants in the genre tables: (label, profile, bass_weight, final_weight).
GENRE_VARIANTS: tuple[tuple[str, str, float, float], ...] = tuple(
    (f"{p}{tag}", p, bass, final)
    for p in sorted(keymod.PROFILES)
    for tag, bass, final in (("", 0.0, 0.0), (" +bass+final", keymod.DEFAULT_BASS_WEIGHT,
                                                keymod.DEFAULT_FINAL_WEIGHT)))


def confidence_quartiles(conf: np.ndarray, right: np.ndarray) -> list[tuple[float, float, float]]:
    """(lowest confidence, highest confidence, accuracy) of each confidence quartile (pieces
    sorted by confidence, split in four near-equal groups)."""
    order = np.argsort(conf, kind="stable")
    return [(float(conf[q].min()), float(conf[q].max()), float(right[q].mean()))
            for q in np.array_split(order, 4) if len(q)]


def genre_sets(args) -> dict[str, list[dict]]:
    """The evaluation sets named by the command line (see ``eval_sets``)."""
    from . import eval_sets
    return eval_sets.key_sets(args.chorales, args.folk, args.classical, args.pop,
                              None if args.pop_count < 0 else args.pop_count, args.music21_pop)


Prediction = tuple[int, str, float]  # tonic_pc, mode, confidence
MODES = keymod.MODES


def cross_validated_predictions(train: dict[str, list[dict]], name: str, works: list[dict],
                                folds: int = 5) -> dict[str, dict[str, Prediction]]:
    """Predictions of the learned method for the rated ``works`` of set ``name`` by models that
    never saw them, by work name: ``"5-fold"`` (the set's pieces in five folds, each predicted
    by a model trained on the other folds plus every other training set; works that are not in
    the training set at all are predicted by a model trained on everything) and
    ``"leave-one-genre-out"`` (trained on the other sets only). Same L2 as the shipped weights."""
    from . import train_key
    import json as _json
    l2 = _json.loads(train_key.WEIGHTS_PATH.read_text(encoding="utf-8"))["l2"]
    arrays = {n: train_key.class_feature_array(ws) for n, ws in train.items()}
    rated = [w for w in works if w["truth"] is not None]
    phi, _ = train_key.class_feature_array(rated)

    def as_predictions(pred: np.ndarray, prob: np.ndarray, names: list[str]) -> dict[str, Prediction]:
        return {n: (int(c % 12), MODES[c // 12], float(p)) for n, c, p in zip(names, pred, prob)}

    def trained_on(names: list[str]) -> np.ndarray:
        groups = [arrays[n][1] for n in names]
        return train_key.fit(np.concatenate([arrays[n][0] for n in names]), np.concatenate(groups),
                             train_key.balanced_weights(groups), l2)

    out: dict[str, dict[str, Prediction]] = {}
    w = trained_on([n for n in arrays if n != name])
    out["leave-one-genre-out"] = as_predictions(*train_key.predict(phi, w), [x["name"] for x in rated])
    trained = {x["name"] for x in train.get(name, []) if x["truth"] is not None}
    cv: dict[str, Prediction] = {}
    if name in arrays:
        names = [x["name"] for x in train[name] if x["truth"] is not None]
        cv = as_predictions(*train_key.cross_validated(arrays, name, l2, folds), names)
    missing = [x for x in rated if x["name"] not in trained]
    if missing:
        mphi, _ = train_key.class_feature_array(missing)
        cv.update(as_predictions(*train_key.predict(mphi, trained_on(list(arrays))),
                                 [x["name"] for x in missing]))
    out["5-fold"] = cv
    return out


def genre_report(name: str, works: list[dict],
                 learned: dict[str, dict[str, Prediction]] | None = None) -> dict[str, Any]:
    """Every figure of one set: rows (label, exact, MIREX, n) on the works music21 also
    analysed, our default on all rated works, confidence quartiles, times per file.
    ``learned``: cross-validated predictions of the learned method by label and work name
    (see ``cross_validated_predictions``)."""
    rated = [w for w in works if w["truth"] is not None]
    pieces = [decode(w["midi"]) for w in rated]
    truths = [tuple(w["truth"]) for w in rated]
    both = [i for i, w in enumerate(rated) if w["music21"]]
    rows: list[tuple[str, float, float, int]] = []

    def add(label: str, est: list[tuple[int, str]], idx: list[int]) -> None:
        if idx:
            rows.append((label, *score_keys([est[i] for i in idx], [truths[i] for i in idx]),
                         len(idx)))

    shipped = [keymod.estimate_key_learned(p) for p in pieces]
    predictions = {"shipped weights": [(k.tonic_pc, k.mode, k.confidence) for k in shipped]}
    for label, by_name in (learned or {}).items():
        predictions[label] = [by_name[w["name"]] for w in rated]
    for label, pred in predictions.items():
        add(f"midisift learned ({label})", [p[:2] for p in pred], both)
    for label, profile, bass, final in GENRE_VARIANTS:
        add(f"midisift {label}", [our_estimator(profile, bass, final)(p) for p in pieces], both)
    for method in eval_sets_methods():
        est = [tuple(w["music21"].get(method, (-1, ""))) for w in rated]
        add(f"music21 {method}", est, both)
    report: dict[str, Any] = {"name": name, "works": len(works), "rated": len(rated),
                              "rows": rows, "with_music21": len(both)}
    if len(both) < len(rated):
        report["all_rows"] = [(f"midisift learned ({label})",
                               *score_keys([p[:2] for p in pred], truths), len(rated))
                              for label, pred in predictions.items()]
    for label, pred in predictions.items():
        conf = np.array([p[2] for p in pred])
        right = np.array([p[:2] == t for p, t in zip(pred, truths)])
        if len(conf):
            report[f"quartiles {label}"] = confidence_quartiles(conf, right)
    # time per file, parsing excluded on both sides (music21: its cached analysis times)
    sample = pieces[:50]
    if sample:
        reps = max(1, 1000 // len(sample))
        for label, fn in (("midisift learned", keymod.estimate_key_learned),
                          ("midisift simple +bass+final",
                           lambda p: keymod.estimate_key(p, "simple", 1.0, 2.0))):
            t0 = time.process_time()  # CPU time: the machine may be shared
            for _ in range(reps):
                for p in sample:
                    fn(p)
            report.setdefault("times", []).append(
                (label, (time.process_time() - t0) / (reps * len(sample))))
        report["notes_per_file"] = float(np.mean([len(p.notes) for p in sample]))
    m21 = [w["music21_seconds"] for w in rated if w.get("music21_seconds")]
    if m21:
        for key in ("parse", "key"):
            report.setdefault("times", []).append(
                (f"music21 {'parse of the MIDI file' if key == 'parse' else 'analyze(key)'}",
                 float(np.mean([t[key] for t in m21]))))
    return report


def eval_sets_methods() -> tuple[str, ...]:
    from .eval_sets import MUSIC21_KEY_METHODS as methods
    return methods


def print_report(r: dict[str, Any]) -> None:
    print(f"\n== {r['name']}: {r['rated']} of {r['works']} works with a key truth; "
          f"{r['with_music21']} with music21's analyses (the table's files)")
    print(f"{'method':<52} {'exact':>6} {'MIREX':>6} {'n':>5}")
    for label, exact, mirex, n in r["rows"]:
        print(f"{label:<52} {exact:6.3f} {mirex:6.3f} {n:5d}")
    for label, exact, mirex, n in r.get("all_rows", []):
        print(f"{label + ' (all)':<52} {exact:6.3f} {mirex:6.3f} {n:5d}")
    for key, q in r.items():
        if key.startswith("quartiles "):
            print(f"accuracy by key_confidence quartile ({key[10:]}): " + "; ".join(
                f"{lo:.2f}-{hi:.2f}: {acc:.3f}" for lo, hi, acc in q))
    if "times" in r:
        print(f"time per file (mean {r.get('notes_per_file', 0):.0f} notes; midisift CPU time, "
              f"music21 wall time when cached): " + "; ".join(
            f"{label} {sec * 1e3:.3f} ms" for label, sec in r["times"]))


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description="Key detection scored across genres, music21 "
                                 "side by side (README, Key detection).")
    ap.add_argument("--chorales", type=int, default=100, help="Bach chorales (0 = skip)")
    ap.add_argument("--folk", type=int, default=600,
                    help="folk tunes of airdsAirs+miscFolk, evenly spaced (-1 = all, 0 = skip)")
    ap.add_argument("--classical", type=int, default=-1,
                    help="classical corpus pieces (-1 = all, 0 = skip)")
    ap.add_argument("--pop", help="POP909-style folder with labels.json (e.g. ../shared/data/pop909-dev)")
    ap.add_argument("--pop-count", type=int, default=-1, help="songs of the pop set (-1 = all)")
    ap.add_argument("--music21-pop", type=int, default=150,
                    help="pop songs music21 also analyses (its parse takes seconds per song)")
    ap.add_argument("--no-cv", action="store_true",
                    help="skip the cross-validation retraining (faster)")
    args = ap.parse_args(argv)
    import music21
    print(f"music21 {music21.__version__}; cache {__import__('pipeline.tools.eval_sets', fromlist=['x']).cache_dir()}")
    sets = genre_sets(args)
    train = None
    if not args.no_cv:
        from . import train_key
        train = train_key.training_sets(args.pop, args.folk if args.folk > 0 else None)
    for name, works in sets.items():
        learned = cross_validated_predictions(train, name, works) if train is not None else None
        print_report(genre_report(name, works, learned))
    from .evaluate_modulation import modulation_report, pop_annotated_keys, print_modulation, truths
    print()
    for name, works in sets.items():  # the windowed estimate's modulation flag (key_modulates)
        print_modulation(modulation_report(name, works, truths(name, works),
                                           pop_annotated_keys(args.pop) if name == "pop" else None))
    cropped = pieces_of_500_notes([w for ws in sets.values() for w in ws])
    if cropped:
        print(f"\nkey time per 500-note piece ({len(cropped)} pieces cut to their first 500 "
              f"notes): " + "; ".join(f"{label} {sec * 1e3:.3f} ms"
                                      for label, sec in time_per_piece(cropped)))


def pieces_of_500_notes(works: list[dict], count: int = 40) -> list[Piece]:
    """Up to ``count`` pieces cut to their first 500 notes (pieces with fewer are skipped)."""
    out = []
    for w in works:
        p = decode(w["midi"])
        if len(p.notes) >= 500:
            out.append(Piece(**{**p.__dict__, "notes": p.notes[:500]}))
        if len(out) == count:
            break
    return out


def time_per_piece(pieces: list[Piece], repeats: int = 20) -> list[tuple[str, float]]:
    """CPU seconds per estimate of the learned method and the simple +bass+final correlation."""
    out = []
    for label, fn in (("learned (default)", keymod.estimate_key_learned),
                      ("simple +bass+final", lambda p: keymod.estimate_key(p, "simple", 1.0, 2.0))):
        t0 = time.process_time()  # CPU time: the machine may be shared
        for _ in range(repeats):
            for p in pieces:
                fn(p)
        out.append((label, (time.process_time() - t0) / (repeats * len(pieces))))
    return out


if __name__ == "__main__":
    main()
