"""Reproduce the meter-estimation figures of the README across genres.

    python -m pipeline.tools.evaluate_meter [--pop FOLDER] [--sets ...] [--speed]
    python -m pipeline.tools.evaluate_meter --speed-base CHECKOUT [--rounds 6]  # side by side
    python -m pipeline.tools.evaluate_meter --train --pop FOLDER   # refit meter_weights.py

Sets (truth = the meter the score notates; the estimate never sees it: pieces are built
without time-signature events, and the pop files' declared time signatures are removed):

- ``folk-dev`` / ``folk-held``: Aird's Airs books 1-6 and music21's misc-folk opuses
  (American fife tunes, Northumbrian minstrelsy); truth = the ABC ``M:`` field; the
  even-numbered tunes of each book for development, the odd-numbered ones held out;
- ``chorales``: Bach chorales (declared time signature), even-numbered files for development,
  odd-numbered held out (``chorales-dev`` / ``chorales-held``);
- ``classical``: the other single-meter movements of music21's corpus (string quartets, songs,
  piano pieces, Monteverdi madrigals; one encoding per work, repeated works once), every
  other work held out (``classical-dev`` / ``classical-held``);
- ``pop``: the pop-arrangement dev set given by ``--pop`` (``labels.json``: ``meter_exact``);
  songs whose number is 1 mod 4 for development, 3 mod 4 held out. In its 6/8 songs the
  file's quarter note carries the dotted-quarter beat and the annotated downbeats are four
  file quarters apart: scored as 4/4, the meter in the file's time base (``file_time_meter``).

The set loaders live in ``eval_sets`` (one module loads every evaluation set).
music21's folders ``oneills1850``, ``essenFolksong`` and ``ryansMammoth`` are reserved for
independent evaluation and never read. music21 parses are cached as JSON under
``/tmp/meter-cache/<music21 version>`` (the first run takes about 20 minutes on a shared
2-core machine; later runs about two).
Tied notes are merged (``stripTies``); chord symbols and grace notes are not played notes and
are left out.
"""
from __future__ import annotations

import argparse
import json
import os
import time
from collections import Counter
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np

from ..midi.piece import (DEFAULT_TEMPO, KEY_DTYPE, METER_DTYPE, TEMPO_DTYPE, Piece, empty_notes,
                          sort_notes)
from ..analysis import key as keymod
from ..analysis import meter as metermod

from .eval_sets import (CLASSICAL_DIRS, FOLK_BOOKS, RESERVED, TPB,  # noqa: F401 (the loaders
                        _abc_book, _corpus_file, _distinct, _normal_meter,  # live in eval_sets)
                        _without_meter, chorale_paths, classical_paths, file_time_meter,
                        meter_truth_corpus, piece_from_notes, score_record)
from .eval_sets import METER_SETS as ALL_SETS
from .eval_sets import load_meter_sets as load_sets
from .eval_sets import meter_cache_dir as cache_dir  # noqa: F401
from .eval_sets import meter_chorales as chorales
from .eval_sets import meter_classical as classical  # noqa: F401
from .eval_sets import meter_folk as folk
from .eval_sets import meter_pop as pop  # noqa: F401

# ---------------------------------------------------------------------------------------------
# Scoring

def pieces_of(works: list[dict[str, Any]]) -> list[Piece]:
    return [w["piece"] if "piece" in w else piece_from_notes(w["notes"]) for w in works]


def evaluate(works: list[dict[str, Any]], estimator: Callable[[Piece], str] | None = None,
             ) -> dict[str, Any]:
    """Exact and family accuracy, the most-common-meter baselines, the main confusions and
    the estimate's time per file (best of three passes, process CPU time)."""
    estimator = estimator or (lambda p: metermod.estimate_meter(p).meter)
    pieces = pieces_of(works)
    best = None
    for _ in range(3):  # process CPU time: the machine may be shared
        t0 = time.process_time()
        est = [estimator(p) for p in pieces]
        dt = (time.process_time() - t0) / max(1, len(pieces))
        best = dt if best is None else min(best, dt)
    truth = [w["meter"] for w in works]
    exact = [e == t for e, t in zip(est, truth)]
    fam_t = [metermod.meter_family(t) for t in truth]
    fam_e = [metermod.meter_family(e) for e in est]
    majority = max(sorted(set(truth)), key=truth.count)
    majority_fam = max(sorted(set(fam_t)), key=fam_t.count)
    confusions = Counter((t, e) for t, e, ok in zip(truth, est, exact) if not ok)
    notes = [len(p.notes) for p in pieces]
    return {
        "n": len(works),
        "exact": float(np.mean(exact)) if works else 0.0,
        "family": float(np.mean([a == b for a, b in zip(fam_e, fam_t)])) if works else 0.0,
        "baseline_exact": truth.count(majority) / max(1, len(truth)),
        "baseline_family": fam_t.count(majority_fam) / max(1, len(fam_t)),
        "majority": majority, "majority_family": majority_fam,
        "truth_counts": Counter(truth),
        "confusions": confusions.most_common(),
        "ms_per_file": best * 1e3,
        "mean_notes": float(np.mean(notes)) if notes else 0.0,
    }


def declared_table(works: list[dict[str, Any]],
                   min_family_probability: float = metermod.CONTRADICTION_PROBABILITY,
                   ) -> dict[str, Any]:
    """What key_meter does with declared meters: how many are defaults or contradicted, and
    how often the declared meter and the reported ``meter`` equal the truth. A music21 work
    declares its notated meter (the truth); a pop file declares what its file says."""
    return declared_tables(works, (min_family_probability,))[0]


def declared_tables(works: list[dict[str, Any]], thresholds: Iterable[float],
                    estimates: list | None = None) -> list[dict[str, Any]]:
    """``declared_table`` at each of several ``meter_contradiction`` values (one estimate per
    piece), with the overrules split: ``overruled_right`` (the declaration was wrong and the
    estimate right), ``overruled_wrong`` (the declaration was the truth)."""
    thresholds = list(thresholds)
    if estimates is None:
        estimates = [metermod.estimate_meter(p) for p in pieces_of(works)]
    out = []
    for t in thresholds:
        n = kept = default = contradicted = declared_right = reported_right = 0
        over_right = over_wrong = 0
        for w, est in zip(works, estimates):
            declared = w.get("declared", w["meter"])
            if declared is None:
                continue
            issue = metermod.declared_meter_issue(declared, est, t)
            reported = declared if issue is None else est.meter
            n += 1
            kept += issue is None
            default += issue == "default"
            contradicted += issue == "contradicted"
            declared_right += declared == w["meter"]
            reported_right += reported == w["meter"]
            if issue == "contradicted":
                over_right += est.meter == w["meter"]
                over_wrong += declared == w["meter"]
        out.append({"threshold": t, "n": n, "kept": kept, "default": default,
                    "contradicted": contradicted, "overruled_right": over_right,
                    "overruled_wrong": over_wrong, "declared_right": declared_right,
                    "reported_right": reported_right,
                    "declared_exact": declared_right / max(1, n),
                    "reported_exact": reported_right / max(1, n)})
    return out


#: ``meter_contradiction`` values ``--sweep`` compares.
SWEEP = (0.01, 1e-3, 1e-4, 1e-5, 1e-6, 1e-7, 0.0)


def print_sweep(sets: dict[str, list[dict[str, Any]]], thresholds: Iterable[float] = SWEEP) -> None:
    """Per set and ``meter_contradiction`` value: declarations overruled, of which right and
    wrong, and the reported ``meter`` right."""
    thresholds = list(thresholds)
    print("\ndeclared meters by meter_contradiction: overruled (right / wrong), reported right")
    print(f"{'set':<16} {'n':>5} " + " ".join(f"{t:>16g}" for t in thresholds))
    for name, works in sets.items():
        rows = declared_tables(works, thresholds)
        cells = [f"{r['contradicted']:>3} ({r['overruled_right']}/{r['overruled_wrong']}) "
                 f"{r['reported_right']:>4}" for r in rows]
        print(f"{name:<16} {rows[0]['n']:>5} " + " ".join(f"{c:>16}" for c in cells))


def onset_prefixes(sets: dict[str, list[dict[str, Any]]],
                   counts: Iterable[int] = (1, 2, 3, 4, 6, 8, 12, 16, 24)) -> None:
    """How the estimate fares on the first k distinct pitched onsets of each piece (with the
    evidence rule off): the share whose family (``compatible_meters`` of the truth) is right,
    and the share that would overrule a true declaration (compatible support below 0.01): the
    evidence ``MIN_ONSETS`` needs."""
    from ..midi.piece import DRUM_CHANNEL
    counts = list(counts)
    print("\nfirst k onsets: family right / would overrule the true meter (at 0.01)")
    print(f"{'set':<16} " + " ".join(f"{k:>13}" for k in counts))
    saved = metermod.MIN_ONSETS
    metermod.MIN_ONSETS = 0
    try:
        for name, works in sets.items():
            cells = []
            for k in counts:
                right = over = m = 0
                for w, piece in zip(works, pieces_of(works)):
                    notes = piece.notes
                    pitched = notes[notes["channel"] != DRUM_CHANNEL]
                    starts = np.unique(pitched["start"])
                    if len(starts) < k:
                        continue
                    cut = notes[notes["start"] <= starts[k - 1]]
                    est = metermod.estimate_meter(Piece(**{**piece.__dict__, "notes": cut}))
                    ok = metermod.compatible_meters(w["meter"])
                    m += 1
                    right += est.meter in ok
                    over += bool(est.probabilities) and est.support(ok) < 0.01
                cells.append(f"{right / max(1, m):.2f}/{over / max(1, m):.3f}")
            print(f"{name:<16} " + " ".join(f"{c:>13}" for c in cells))
    finally:
        metermod.MIN_ONSETS = saved


def key_flag_table(works: list[dict[str, Any]]) -> dict[str, int]:
    """The C major key-signature flag on files with a key truth (pop set): files declaring C
    major, how many are flagged, and how many of each have a true key whose signature is not
    C major's (neither C major nor A minor)."""
    from ..stages.key_meter import key_declared_suspect
    c_major = flagged = other = flagged_other = 0
    for w, piece in zip(works, pieces_of(works)):
        if w.get("key_declared") != "C major":
            continue
        pc, mode = w["key_truth"]
        truly_other = (pc if mode == "major" else (pc + 3) % 12) != 0
        flag = bool(key_declared_suspect(w["key_declared"], keymod.estimate_key(piece)))
        c_major += 1
        flagged += flag
        other += truly_other
        flagged_other += flag and truly_other
    return {"c_major": c_major, "flagged": flagged, "truly_other": other,
            "flagged_truly_other": flagged_other}



def pieces_500() -> list[Piece]:
    """500-note pieces: held-out folk tunes and chorales concatenated and cut every 500
    notes (53 pieces)."""
    works = folk("held")[:200] + chorales("held", 40)
    pieces, t_off = [], 0
    chunk = []
    for w in works:
        for s, e, p, part in w["notes"]:
            chunk.append((s + t_off, e + t_off, p, part))
        t_off += max(e for _, e, _, _ in w["notes"])
        while len(chunk) >= 500:
            t0 = min(s for s, _, _, _ in chunk[:500])
            pieces.append(piece_from_notes([(s - t0, e - t0, p, q) for s, e, p, q in chunk[:500]]))
            chunk = chunk[500:]
    return pieces


def time_key_meter(package: str, pieces: list[Piece], repeats: int) -> tuple[float, float]:
    """One timed pass (process CPU time, ms per piece) of ``estimate_meter`` and of the key
    estimate with the modulation flag (``key.estimate_key`` then ``modulation.key_regions``,
    as key_meter runs them), with the analysis modules of ``package`` (``pipeline``, or
    another checkout's copy, see ``speed_side_by_side``)."""
    import importlib
    meter = importlib.import_module(f"{package}.analysis.meter")
    key = importlib.import_module(f"{package}.analysis.key")
    modulation = importlib.import_module(f"{package}.analysis.modulation")

    def key_and_modulation(piece: Piece) -> None:  # what key_meter computes for the key
        est = key.estimate_key(piece)
        modulation.key_regions(piece, est.tonic_pc + (12 if est.mode == "minor" else 0),
                               windowed=est.windowed)
    times = []
    for fn in (meter.estimate_meter, key_and_modulation):
        t0 = time.process_time()
        for _ in range(repeats):
            for p in pieces:
                fn(p)
        times.append((time.process_time() - t0) / (repeats * len(pieces)) * 1e3)
    return times[0], times[1]


def speed_500(repeats: int = 20) -> tuple[float, float]:
    """Milliseconds of ``estimate_meter`` and of the key estimate with the modulation flag
    per 500-note piece (``pieces_500``): the best of three passes of process CPU time, so
    other jobs on the machine count less."""
    pieces = pieces_500()
    passes = [time_key_meter("pipeline", pieces, repeats) for _ in range(3)]
    return min(m for m, _ in passes), min(k for _, k in passes)


def speed_side_by_side(base: str, rounds: int = 6, repeats: int = 10) -> dict[str, list]:
    """``time_key_meter`` of this tree and of the checkout ``base`` (its extension built in
    place), in alternating rounds in one process so both see the same load: {"base": [(meter
    ms, key ms) per round], "this": [...]}. The base's ``pipeline`` is copied to a temporary
    folder as ``pipeline_base`` so both import at once."""
    import shutil
    import sys
    import tempfile
    tmp = Path(tempfile.mkdtemp(prefix="key_meter_base_"))
    try:
        shutil.copytree(Path(base) / "pipeline", tmp / "pipeline_base")
        sys.path.insert(0, str(tmp))
        pieces = pieces_500()
        out: dict[str, list] = {"base": [], "this": []}
        for r in range(rounds):
            order = ("base", "this") if r % 2 == 0 else ("this", "base")
            for name in order:
                package = "pipeline_base" if name == "base" else "pipeline"
                out[name].append(time_key_meter(package, pieces, repeats))
        return out
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


# ---------------------------------------------------------------------------------------------
# Training the meter classifier (multinomial logistic regression, numpy only)

#: The development parts the shipped weights are trained on (one per genre); the held-out
#: parts (``*-held``) are never used for training or for choosing the regularization.
TRAIN_SETS = ("folk-dev", "chorales-dev", "classical-dev", "pop-dev")
#: The meters the classifier chooses among.
TRAIN_CLASSES = ("2/4", "4/4", "2/2", "3/4", "3/8", "3/2", "6/8", "9/8", "12/8")
#: Regularization strengths tried by cross-validation.
L2_GRID = (0.0003, 0.001, 0.003, 0.01, 0.03, 0.1)
WEIGHTS_PATH = Path(metermod.__file__).with_name("meter_weights.py")


def features_of(works: list[dict[str, Any]]) -> np.ndarray:
    rows = []
    for p in pieces_of(works):
        f = metermod.piece_features(p)
        rows.append(np.zeros(len(metermod.FEATURE_NAMES)) if f is None else f)
    return np.array(rows)


def fit_logistic(x: np.ndarray, y: np.ndarray, w: np.ndarray, n_classes: int, l2: float,
                 steps: int = 3000, lr: float = 0.05) -> tuple[np.ndarray, np.ndarray]:
    """Weighted multinomial logistic regression by full-batch Adam on standardized ``x``:
    minimizes sum_i w_i * cross-entropy_i / sum(w) + l2 * |W|^2. Returns (W, B)."""
    n, f = x.shape
    W = np.zeros((n_classes, f))
    B = np.zeros(n_classes)
    onehot = np.eye(n_classes)[y]
    w = w / w.sum()
    mw, vw, mb, vb = np.zeros_like(W), np.zeros_like(W), np.zeros_like(B), np.zeros_like(B)
    b1, b2 = 0.9, 0.999
    for t in range(1, steps + 1):
        z = x @ W.T + B
        z -= z.max(axis=1, keepdims=True)
        p = np.exp(z)
        p /= p.sum(axis=1, keepdims=True)
        g = (p - onehot) * w[:, None]
        gW = g.T @ x + 2 * l2 * W
        gB = g.sum(axis=0)
        mw = b1 * mw + (1 - b1) * gW
        vw = b2 * vw + (1 - b2) * gW ** 2
        mb = b1 * mb + (1 - b1) * gB
        vb = b2 * vb + (1 - b2) * gB ** 2
        W -= lr * (mw / (1 - b1 ** t)) / (np.sqrt(vw / (1 - b2 ** t)) + 1e-8)
        B -= lr * (mb / (1 - b1 ** t)) / (np.sqrt(vb / (1 - b2 ** t)) + 1e-8)
    return W, B


def _training_data(sets: dict[str, list[dict[str, Any]]], classes: tuple[str, ...]):
    """(features, class index, sample weight, set index) of the works whose meter is a class;
    each set weighs the same in total, so no genre dominates."""
    xs, ys, ws, gs = [], [], [], []
    for gi, (name, works) in enumerate(sets.items()):
        works = [w for w in works if w["meter"] in classes]
        if not works:
            continue
        xs.append(features_of(works))
        ys.append(np.array([classes.index(w["meter"]) for w in works]))
        ws.append(np.full(len(works), 1.0 / len(works)))
        gs.append(np.full(len(works), gi))
    return np.vstack(xs), np.concatenate(ys), np.concatenate(ws), np.concatenate(gs)


def _standardize(x: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    mean = (x * w[:, None]).sum(axis=0) / w.sum()
    scale = np.sqrt(((x - mean) ** 2 * w[:, None]).sum(axis=0) / w.sum())
    return mean, np.where(scale > 1e-9, scale, 1.0)


def cross_validate(x, y, w, g, classes, l2: float, folds: int = 5) -> list[float]:
    """Exact accuracy per development set (genre) of ``folds``-fold cross-validation over the
    pooled sets (every set split the same way), for one L2 strength."""
    fold_of = np.zeros(len(y), dtype=int)
    for gi in np.unique(g):
        idx = np.flatnonzero(g == gi)
        fold_of[idx] = np.arange(len(idx)) % folds
    pred = np.zeros(len(y), dtype=int)
    for f in range(folds):
        tr, te = fold_of != f, fold_of == f
        mean, scale = _standardize(x[tr], w[tr])
        W, B = fit_logistic((x[tr] - mean) / scale, y[tr], w[tr], len(classes), l2)
        pred[te] = np.argmax((x[te] - mean) / scale @ W.T + B, axis=1)
    return [float(np.mean(pred[g == gi] == y[g == gi])) for gi in np.unique(g)]


def leave_one_genre_out(x, y, w, g, classes, l2: float) -> list[float]:
    """Exact accuracy on each development set of a model trained on the other sets only."""
    accs = []
    for gi in np.unique(g):
        tr, te = g != gi, g == gi
        mean, scale = _standardize(x[tr], w[tr])
        W, B = fit_logistic((x[tr] - mean) / scale, y[tr], w[tr], len(classes), l2)
        accs.append(float(np.mean(np.argmax((x[te] - mean) / scale @ W.T + B, axis=1) == y[te])))
    return accs


def train(sets: dict[str, list[dict[str, Any]]], classes: tuple[str, ...]) -> dict[str, Any]:
    """Choose the L2 strength by the mean over genres of 5-fold cross-validated accuracy on
    the pooled development sets, then fit on all of them. Also reports, for the chosen
    strength, each genre's accuracy when it is left out of training (an unseen genre)."""
    x, y, w, g = _training_data(sets, classes)
    cv = {l2: cross_validate(x, y, w, g, classes, l2) for l2 in L2_GRID}
    best = max(L2_GRID, key=lambda l2: (np.mean(cv[l2]), l2))
    logo = leave_one_genre_out(x, y, w, g, classes, best)
    mean, scale = _standardize(x, w)
    W, B = fit_logistic((x - mean) / scale, y, w, len(classes), best)
    return {"classes": classes, "mean": mean, "scale": scale, "W": W, "B": B, "l2": best,
            "cv": cv, "logo": logo, "sets": {k: len(v) for k, v in sets.items()}}


def write_weights(model: dict[str, Any], path: Path = WEIGHTS_PATH) -> None:
    def tup(a):
        return "(" + ", ".join(f"{v:.6g}" for v in a) + ("," if len(a) == 1 else "") + ")"
    sets = ", ".join(f"{k} ({v} works)" for k, v in model["sets"].items())
    lines = [
        '"""Weights of the meter classifier (``meter.estimate_meter``), written by',
        "``python -m pipeline.tools.evaluate_meter --train --pop FOLDER``: multinomial logistic",
        "regression over ``meter.FEATURE_NAMES``, trained on the development sets",
        f"{sets}, each set weighing the same; L2 strength {model['l2']:g}",
        "chosen by 5-fold cross-validation (mean accuracy over the sets). Do not edit by hand.",
        '"""',
        f"CLASSES = {tuple(model['classes'])!r}",
        f"FEATURES = {tuple(metermod.FEATURE_NAMES)!r}",
        f"MEAN = {tup(model['mean'])}",
        f"SCALE = {tup(model['scale'])}",
        "W = (",
        *[f"    {tup(row)}," for row in model["W"]],
        ")",
        f"B = {tup(model['B'])}",
    ]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")



def print_table(results: dict[str, dict[str, Any]]) -> None:
    print(f"{'set':<16} {'n':>5} {'exact':>6} {'base':>6} {'family':>6} {'fbase':>6} "
          f"{'ms/file':>7} {'notes':>6}  majority")
    for name, m in results.items():
        print(f"{name:<16} {m['n']:>5} {m['exact']:6.3f} {m['baseline_exact']:6.3f} "
              f"{m['family']:6.3f} {m['baseline_family']:6.3f} {m['ms_per_file']:7.3f} "
              f"{m['mean_notes']:6.0f}  {m['majority']}")
    print("\nmain confusions (truth -> estimate: count), meters present")
    for name, m in results.items():
        conf = ", ".join(f"{t}->{e}: {c}" for (t, e), c in m["confusions"][:6])
        counts = ", ".join(f"{k} {v}" for k, v in m["truth_counts"].most_common(6))
        print(f"{name:<16} {conf or '-'}\n{'':<16} [{counts}]")


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pop", help="folder of the pop dev set (with labels.json)")
    ap.add_argument("--sets", nargs="*", default=list(ALL_SETS))
    ap.add_argument("--speed", action="store_true", help="also time a 500-note piece")
    ap.add_argument("--speed-base", metavar="CHECKOUT",
                    help="time a 500-note piece with this tree and with another checkout (its "
                         "extension built in place) in alternating rounds, and stop")
    ap.add_argument("--rounds", type=int, default=6, help="rounds of --speed-base (default 6)")
    ap.add_argument("--corpus", action="append", default=[], metavar="NAME=FOLDER",
                    help="also a generated corpus with truth.json (midisift synth, the demo)")
    ap.add_argument("--sweep", action="store_true",
                    help="declared meters at several meter_contradiction values, and the "
                         "estimate on each piece's first k onsets")
    ap.add_argument("--train", action="store_true",
                    help="retrain the classifier on the development sets and write meter_weights.py")
    args = ap.parse_args(argv)
    if args.speed_base:
        runs = speed_side_by_side(args.speed_base, args.rounds)
        print(f"ms per 500-note piece (process CPU time), {args.rounds} alternating rounds, "
              f"min-max: meter / key with the modulation flag / together")
        for name, label in (("base", args.speed_base), ("this", "this tree")):
            cols = [[r[0] for r in runs[name]], [r[1] for r in runs[name]],
                    [r[0] + r[1] for r in runs[name]]]
            print(f"{label}: " + " / ".join(f"{min(c):.3f}-{max(c):.3f}" for c in cols))
        return
    if args.train:
        if not args.pop:
            ap.error("--train needs --pop (the pop development part is one of the genres)")
        model = train(load_sets(list(TRAIN_SETS), args.pop), TRAIN_CLASSES)
        names = ", ".join(TRAIN_SETS)
        for l2, accs in model["cv"].items():
            print(f"L2 {l2:g}: 5-fold exact on {names}: "
                  + ", ".join(f"{a:.3f}" for a in accs) + f" (mean {np.mean(accs):.3f})")
        print(f"chosen L2 {model['l2']:g}; each genre left out of training: "
              + ", ".join(f"{a:.3f}" for a in model["logo"]))
        print(f"weights written to {WEIGHTS_PATH}")
        write_weights(model)
        import importlib
        importlib.reload(metermod._weights)
        importlib.reload(metermod)
    sets = load_sets(args.sets, args.pop)
    for spec in args.corpus:
        name, _, folder = spec.partition("=")
        sets[name] = meter_truth_corpus(folder)
    if args.sweep:
        print_sweep(sets)
        onset_prefixes(sets)
        return
    results = {name: evaluate(works) for name, works in sets.items()}
    print_table(results)
    print("\ndeclared meters in key_meter (contradiction below family probability "
          f"{metermod.CONTRADICTION_PROBABILITY:g})")
    print(f"{'set':<16} {'n':>5} {'kept':>5} {'default':>7} {'contra':>6} {'declared ok':>11} "
          f"{'reported ok':>11}")
    for name, works in sets.items():
        d = declared_table(works)
        print(f"{name:<16} {d['n']:>5} {d['kept']:>5} {d['default']:>7} {d['contradicted']:>6} "
              f"{d['declared_exact']:11.3f} {d['reported_exact']:11.3f}")
    for name, works in sets.items():
        if name.startswith("pop"):
            k = key_flag_table(works)
            print(f"{name}: {k['c_major']} files declare C major, {k['flagged']} flagged; "
                  f"{k['truly_other']} of them are truly in a key of another signature, "
                  f"{k['flagged_truly_other']} of those flagged")
    if args.speed:
        meter_ms, key_ms = speed_500()
        print(f"\nper 500-note piece, same run: estimate_meter {meter_ms:.3f} ms, "
              f"estimate_key with the modulation flag {key_ms:.3f} ms, together {meter_ms + key_ms:.3f} ms")


if __name__ == "__main__":
    main()
