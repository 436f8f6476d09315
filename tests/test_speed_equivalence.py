"""The fast per-file analyses give bit-identical results to the plain formulations they replaced.

Each ``plain_*`` function below is the straightforward numpy formulation the module used before
it was tuned for many small files (fewer numpy calls, no structured-row copies, sorts skipped
when the decoder's note order makes them the identity, tables built once). They are the
oracles here: every value, floats included, must be equal to the last bit (the manifest is
compared byte for byte between versions). The pieces are decoded seeded random files (drums,
tempo changes, several tracks), Bach chorales from music21's bundled corpus, and variants that
take the general paths (unsorted notes, onsets sharing a grid bin out of pitch order, long
silences, zero-length notes, resolutions the grid does not divide, long or unsorted tempo
maps, several meter and key events). The outside references (music21's key analysis,
pretty_midi's tempo and note times, datasketch's MinHash) are checked in the modules' own
tests; ``test_minhash_layouts_equal_datasketch`` repeats datasketch at the sizes where
``minhash`` switches its table layout.
"""
from __future__ import annotations

import re
from collections import Counter

import dataclasses
import hashlib

import numpy as np
import pytest
from datasketch import MinHash

from pipeline.analysis import timing
from pipeline.analysis import key as keymod
from pipeline.analysis import meter as metermod
from pipeline.analysis import shingles as shmod
from pipeline.analysis import stats as statsmod
from pipeline.analysis import transpose as trmod
from pipeline.midi.piece import (DRUM_CHANNEL, KEY_DTYPE, METER_DTYPE, TEMPO_DTYPE, Piece,
                                 empty_notes, sort_notes)
from pipeline.similarity.minhash import fold32, minhash, permutations, signature_of
from pipeline.midi.decode import decode
from pipeline.stages.transpose import Transpose

from fixtures_midi import random_midi
from music21_fixtures import chorales


# --- the plain formulations (the oracles) ----------------------------------------------------

def plain_pitch_class_histogram(piece, bass_weight=0.0, final_weight=0.0,
                                final_beats=keymod.FINAL_BEATS):
    notes = piece.notes
    notes = notes[notes["channel"] != DRUM_CHANNEL]
    if len(notes) == 0:
        return np.zeros(12)
    tpb = float(piece.ticks_per_beat)
    dur = (notes["end"] - notes["start"]).astype(np.float64) / tpb
    weight = np.ones(len(notes))
    if bass_weight:
        start = notes["start"]
        order = np.lexsort((notes["pitch"], start))
        s_sorted = start[order]
        first = np.ones(len(order), dtype=bool)
        first[1:] = s_sorted[1:] != s_sorted[:-1]
        weight[order[first]] += bass_weight
    if final_weight:
        last = notes["end"].max()
        weight[notes["end"] > last - final_beats * tpb] += final_weight
    return np.bincount(notes["pitch"] % 12, weights=dur * weight, minlength=12)


def plain_key_from_histogram(hist, profile):
    profile = keymod.resolve_profile(profile)
    h = np.asarray(hist, dtype=np.float64)
    h = h - h.mean()
    norm = np.linalg.norm(h)
    scores = keymod._MATRICES[profile] @ (h / norm) if norm > 0 else np.zeros(24)
    order = np.argsort(-scores, kind="stable")
    best, second = int(order[0]), int(order[1])
    mode = keymod.MODES[best // 12]
    pc = best % 12
    names = keymod.MAJOR_TONIC_NAMES if mode == "major" else keymod.MINOR_TONIC_NAMES
    return keymod.KeyEstimate(tonic=names[pc], tonic_pc=pc, mode=mode,
                              confidence=float(scores[best] - scores[second]),
                              runner_up=keymod.key_name(second % 12, keymod.MODES[second // 12]),
                              correlation=float(scores[best]), profile=profile,
                              scores=tuple(float(x) for x in scores))


def plain_declared_key(piece):
    ks = piece.key_signatures
    if len(ks) == 0:
        return None
    first = ks[np.flatnonzero(ks["tick"] == ks["tick"].min())[-1]]  # the last at the first tick
    sharps = int(np.clip(first["sharps"], -7, 7))
    if first["minor"]:
        return f"{keymod.MINOR_BY_SHARPS[sharps]} minor"
    return f"{keymod.MAJOR_BY_SHARPS[sharps]} major"


def plain_meter_from_file(piece):
    ts = piece.time_signatures
    if len(ts) == 0:
        return None
    ts = ts[np.argsort(ts["tick"], kind="stable")]
    end = max(int(piece.end_tick), int(ts["tick"].max()) + 1,
              int(piece.notes["end"].max()) if len(piece.notes) else 0)
    spans = np.diff(np.append(ts["tick"], end))
    i = int(np.argmax(spans))
    return f"{int(ts['numerator'][i])}/{int(ts['denominator'][i])}"


def plain_accent_function(piece):
    notes = piece.notes
    notes = notes[notes["channel"] != DRUM_CHANNEL]
    if len(notes) == 0:
        return np.zeros(0)
    tpb = float(piece.ticks_per_beat)
    bins = metermod._squeeze_gaps(np.rint(notes["start"] / tpb * metermod.BINS_PER_BEAT)
                                  .astype(np.int64))
    dur = np.minimum((notes["end"] - notes["start"]) / tpb, metermod.ACCENT_CAP_BEATS)
    acc = np.bincount(bins, weights=dur)
    order = np.lexsort((notes["pitch"], bins))
    b_sorted = bins[order]
    first = np.ones(len(order), dtype=bool)
    first[1:] = b_sorted[1:] != b_sorted[:-1]
    acc += metermod.BASS_ACCENT * np.bincount(bins[order[first]], weights=dur[order[first]],
                                              minlength=len(acc))
    return acc


def _plain_autocorrs(acc, lags):
    a = acc - acc.mean()
    denom = float(np.add.reduce(a * a))
    return [0.0 if lag >= len(acc) else
            (float(np.add.reduce(a[:-lag] * a[lag:])) / denom if denom > 0 else 0.0)
            for lag in lags]


def _plain_fold_phase(acc, spec):
    tc, tc_norm, rolled = metermod._ROLLED[spec.name]
    n = len(tc)
    folded = np.bincount(np.arange(len(acc)) % n, weights=acc, minlength=n)
    f = folded - folded.mean()
    denom = np.linalg.norm(f) * tc_norm
    if denom == 0:
        return 0
    return int(np.argmax(rolled @ f / denom))


def plain_estimate_meter(piece):
    acc = plain_accent_function(piece)
    if np.count_nonzero(acc) < metermod.MIN_ONSETS:  # too few onset positions: no estimate
        return metermod.MeterEstimate(None, 0.0, 0.0, None, 0.0, ())
    r = _plain_autocorrs(acc, metermod._LAG_BINS)
    onsets = np.unique(piece.pitched["start"])
    ioi = np.diff(onsets) / float(piece.ticks_per_beat)
    median = float(np.median(ioi)) if len(ioi) else 0.0
    p = metermod._classify(metermod.meter_features(acc, r, median))
    ranked = sorted(range(len(p)), key=lambda i: -p[i])
    best, second = metermod.CLASSES[ranked[0]], metermod.CLASSES[ranked[1]]
    phase = _plain_fold_phase(acc, next(m for m in metermod.METERS if m.name == best))
    return metermod.MeterEstimate(best, float(p[ranked[0]]), float(p[ranked[0]] - p[ranked[1]]),
                                  second, phase / metermod.BINS_PER_BEAT,
                                  tuple(float(v) for v in p))


def plain_tempo_bpm(piece):
    end = int(piece.notes["end"].max()) if len(piece.notes) else 0
    if end <= 0:
        us = float(piece.tempos["us_per_beat"][0]) if len(piece.tempos) else 500_000.0
        return 60e6 / us
    seconds = float(piece.ticks_to_seconds(np.array([end]))[0])
    return (end / piece.ticks_per_beat) / (seconds / 60.0) if seconds > 0 else 0.0


def plain_grid_fraction(piece, divisions=timing.GRID_DIVISIONS,
                        tolerance_beats=timing.GRID_TOLERANCE_BEATS):
    if len(piece.notes) == 0:
        return 1.0
    tpb = float(piece.ticks_per_beat)
    tol = tolerance_beats * tpb
    start = piece.notes["start"].astype(np.float64)
    on = np.zeros(len(start), dtype=bool)
    for d in divisions:
        step = tpb / d
        r = np.mod(start, step)
        on |= np.minimum(r, step - r) <= tol + 1e-9
    return float(on.mean())


def _plain_polyphony(notes):
    n = len(notes)
    if n == 0:
        return 0, 0.0
    ticks = np.concatenate((notes["start"], notes["end"]))
    secs = np.concatenate((notes["start_s"], notes["end_s"]))
    delta = np.concatenate((np.ones(n, np.int64), -np.ones(n, np.int64)))
    order = np.lexsort((delta, ticks))
    running = np.cumsum(delta[order])
    seg = np.diff(secs[order])
    sounding = float(seg[running[:-1] > 0].sum())
    note_seconds = float((notes["end_s"] - notes["start_s"]).sum())
    return int(running.max()), (note_seconds / sounding if sounding > 0 else 0.0)


def _plain_longest_silence(notes, duration):
    sounding = notes[notes["end"] > notes["start"]]
    if len(sounding) == 0:
        return duration
    start_s, end_s = sounding["start_s"], sounding["end_s"]
    covered = np.maximum.accumulate(end_s)
    inner = float((start_s[1:] - covered[:-1]).max()) if len(start_s) > 1 else 0.0
    return max(float(start_s[0]), inner, duration - float(covered[-1]), 0.0)


def plain_piece_stats(piece):
    notes = piece.notes
    n = len(notes)
    if n == 0:
        return statsmod.piece_stats(piece)  # the constant table of an empty piece
    duration = float(notes["end_s"].max())
    drum = notes["channel"] == DRUM_CHANNEL
    n_drum = int(np.count_nonzero(drum))
    pitched = notes[~drum] if n_drum else notes
    programs = np.flatnonzero(np.bincount(pitched["program"], minlength=128))
    max_poly, mean_poly = _plain_polyphony(pitched)
    return {
        "duration_s": duration, "notes": n,
        "notes_per_s": n / duration if duration > 0 else 0.0,
        "pitches": int(np.count_nonzero(np.bincount(pitched["pitch"], minlength=128))),
        "max_polyphony": max_poly, "mean_polyphony": mean_poly, "drum_fraction": n_drum / n,
        "longest_silence_s": _plain_longest_silence(notes, duration),
        "tracks": int(np.count_nonzero(np.bincount(notes["track"]))),
        "instruments": int(len(programs)) + (1 if n_drum else 0),
        "longest_note_s": (float((pitched["end_s"] - pitched["start_s"]).max())
                           if len(pitched) else 0.0),
        "programs": programs.tolist(), "has_drums": n_drum > 0,
    }


def plain_line_tokens(onsets, spec):
    """One voice's line tokens, one Python step per onset: ``onsets`` are (grid step, pitch)."""
    top = {}
    for q, p in onsets:
        top[q] = max(top.get(q, p), p)
    keys = sorted(top)
    steps = [b - a for a, b in zip(keys, keys[1:])]
    if not steps:
        return []
    out = []
    for k in range(1, len(keys)):
        interval = max(-spec.max_interval, min(spec.max_interval, top[keys[k]] - top[keys[k - 1]]))
        if k == 1:
            rhythm = shmod.RATIO_FIRST
        else:  # round(2 log2(ratio)) by the class boundaries 2 ** ((c + 0.5) / 2)
            ratio = float(steps[k - 1]) / float(steps[k - 2])  # as float64s, as numpy divides
            c = -spec.max_ratio
            while c < spec.max_ratio and ratio >= 2.0 ** ((c + 0.5) / 2):
                c += 1
            rhythm = c + 16
        out.append((interval + 128) * 4096 + rhythm)
    return out


def plain_window_hashes(tokens, n, kind, spec, keep_all=False):
    mask = (1 << 64) - 1
    out = []
    for k in range(len(tokens) - n + 1):
        w = tokens[k:k + n]
        if not keep_all and len(set(w)) <= min(spec.min_distinct, n - 2):
            continue
        h = (n + shmod.KIND_TAGS[kind] * 0x632BE59BD9B4E019) & mask
        for t in w:
            h = (h * int(shmod._ROLL) + t) & mask
        out.append(h)
    return out


def plain_shingle_hashes(piece, spec):
    """Line and pitch shingles of every voice, voice by voice and window by window."""
    tpb = int(piece.ticks_per_beat)
    voices = {}
    # the grid step in numpy's int64 arithmetic, as every analysis rounds ticks (it wraps for
    # ticks near 2**63, identically in both)
    grid_q = (piece.notes["start"] * (4 * spec.grid) + tpb) // (2 * tpb)
    for n, q in zip(piece.notes, grid_q.tolist()):
        if n["channel"] == DRUM_CHANNEL:
            continue
        voices.setdefault(int(n["track"]) * 16 + int(n["channel"]), []).append((q, int(n["pitch"])))
    stats = {}
    for v, onsets in voices.items():
        pitches = sorted(p for _, p in onsets)
        stats[v] = (pitches[(len(pitches) - 1) // 2], len(onsets), len({q for q, _ in onsets}))
    every = sorted(p for onsets in voices.values() for _, p in onsets)
    limit = (spec.bass_below if spec.bass_below is not None
             else every[(len(every) - 1) // 2] - spec.bass_gap if every else 0)
    upper = [v for v in sorted(voices) if stats[v][0] >= limit]
    lead = plain_lead_voice(upper, stats, piece.track_names, spec)
    hashes, first_line, pitch_hashes, lead_hashes = [], None, [], []
    for v in upper:
        toks = plain_line_tokens(voices[v], spec)
        if toks and first_line is None:
            first_line = toks
        hashes += plain_window_hashes(toks, spec.ngram, "line", spec)
        moved = [t // 4096 for t in toks if t // 4096 != 128]
        pitch_hashes += plain_window_hashes(moved, spec.ngram + spec.pitch_extra, "pitch", spec)
        if v == lead:
            lead_hashes += plain_window_hashes(toks, spec.ngram, "lead", spec)
    if not hashes and first_line:
        w = first_line[:spec.ngram]
        hashes = plain_window_hashes(w, len(w), "line", spec, keep_all=True)
    hashes += pitch_hashes
    top = 1 << 63
    out = [int(h) | top for h in plain_fmix64(np.array(hashes, dtype=np.uint64))]
    out += [int(h) & (top - 1) for h in plain_fmix64(np.array(lead_hashes, dtype=np.uint64))]
    if not out:
        return np.zeros(0, dtype=np.uint64)
    out = np.unique(np.array(out, dtype=np.uint64))
    return out[:spec.max_shingles] if len(out) > spec.max_shingles else out


def plain_fmix64(x):
    x = x.astype(np.uint64, copy=True)
    with np.errstate(over="ignore"):
        x ^= x >> np.uint64(33)
        x *= shmod._MIX1
        x ^= x >> np.uint64(33)
        x *= shmod._MIX2
        x ^= x >> np.uint64(33)
    return x


def plain_lead_voice(upper, stats, track_names, spec):
    """The lead voice by the rules of shingles.lead_voice, written out voice by voice."""
    cand = [v for v in upper if stats[v][2] > spec.ngram]
    for t, name in enumerate(track_names):
        words = set(re.findall(r"[a-z]+", name.casefold()))
        named = [v for v in cand if v // 16 == t]
        if words & set(shmod.LEAD_NAMES) and named:
            return max(named, key=lambda v: (stats[v][2], -v))
    mono = [v for v in cand if stats[v][2] >= spec.lead_monophony * stats[v][1]]
    if not mono:
        return None
    busiest = max(stats[v][2] for v in mono)
    busy = [v for v in mono if 2 * stats[v][2] >= busiest]
    return min(busy, key=lambda v: (-stats[v][0], -stats[v][2], v))


def plain_content_hash(piece):
    n = piece.notes
    tpb = int(piece.ticks_per_beat)
    steps = shmod.CONTENT_STEPS_PER_BEAT
    s = (n["start"] * (2 * steps) + tpb) // (2 * tpb)
    e = (n["end"] * (2 * steps) + tpb) // (2 * tpb)
    row = plain_fmix64(s.astype(np.uint64))
    with np.errstate(over="ignore"):
        row = plain_fmix64(row * shmod._ROLL + e.astype(np.uint64))
        code = (n["pitch"].astype(np.uint64) * np.uint64(2)
                + (n["channel"] == DRUM_CHANNEL).astype(np.uint64))
        row = plain_fmix64(row * shmod._ROLL + code)
    row.sort()
    return hashlib.sha256(row.astype("<u8").tobytes()).hexdigest()[:32]


def plain_minhash(shingles, num_perm=128, seed=1):
    a, b = permutations(num_perm, seed)
    if len(shingles) == 0:
        return np.full(num_perm, np.uint32(0xFFFFFFFF), dtype=np.uint32)
    s = np.asarray(shingles, dtype=np.uint64)
    h = ((s ^ (s >> np.uint64(32))) & np.uint64(0xFFFFFFFF)).astype(np.uint32)
    with np.errstate(over="ignore"):
        h = h ^ (h >> np.uint32(16))
        h = h * np.uint32(0x85EBCA6B)
        h = h ^ (h >> np.uint32(13))
        h = h * np.uint32(0xC2B2AE35)
        h = h ^ (h >> np.uint32(16))
        return (h[:, None] * a[None, :] + b[None, :]).min(axis=0)


def plain_shift_notes(notes, semitones):
    out = notes.copy()
    if semitones == 0 or len(out) == 0:
        return out, 0
    pitched = out["channel"] != DRUM_CHANNEL
    p = out["pitch"].astype(np.int64) + np.where(pitched, int(semitones), 0)
    high = p > 127
    low = p < 0
    p = np.where(high, p - 12 * ((p - 127 + 11) // 12), p)
    p = np.where(low, p + 12 * ((-p + 11) // 12), p)
    out["pitch"] = p.astype(out["pitch"].dtype)
    return out, int(np.count_nonzero(high | low))


def plain_fold_count(notes, semitones):
    if semitones == 0 or len(notes) == 0:
        return 0
    p = notes["pitch"][notes["channel"] != DRUM_CHANNEL].astype(np.int64) + int(semitones)
    return int(np.count_nonzero((p > 127) | (p < 0)))


# --- exact comparison ------------------------------------------------------------------------

def identical(a, b) -> bool:
    """Equal values of equal types; arrays equal in dtype, shape and bytes; floats equal in
    every bit (a -0.0 is not a 0.0)."""
    if isinstance(a, np.ndarray):
        return (isinstance(b, np.ndarray) and a.dtype == b.dtype and a.shape == b.shape
                and a.tobytes() == b.tobytes())
    if dataclasses.is_dataclass(a):
        return type(a) is type(b) and identical(dataclasses.asdict(a), dataclasses.asdict(b))
    if isinstance(a, dict):
        return (isinstance(b, dict) and list(a) == list(b)
                and all(identical(a[k], b[k]) for k in a))
    if isinstance(a, (list, tuple)):
        return (type(a) is type(b) and len(a) == len(b)
                and all(identical(x, y) for x, y in zip(a, b)))
    if isinstance(a, float):
        return type(b) is float and np.float64(a).tobytes() == np.float64(b).tobytes()
    return type(a) is type(b) and a == b


def test_identical_is_strict():
    assert identical(0.1 + 0.2, 0.30000000000000004)
    assert not identical(0.1 + 0.2, 0.3)
    assert not identical(0.0, -0.0)
    assert not identical(1, 1.0)
    assert not identical(np.zeros(2), np.zeros(2, np.float32))


# --- the pieces --------------------------------------------------------------------------------

def _variants(piece: Piece):
    """The piece and variants that take each general (non-fast) path."""
    yield piece
    n = piece.notes
    if len(n) < 4:
        return
    rng = np.random.default_rng(len(n))
    rep = dataclasses.replace
    yield rep(piece, notes=n[rng.permutation(len(n))])  # not in canonical order
    m = n.copy()  # distinct onsets sharing a 1/12-beat bin, out of pitch order within it
    m["start"] += rng.integers(0, 15, len(m))
    m["end"] += 20
    yield rep(piece, notes=sort_notes(m))
    m = n.copy()  # equal onsets (chords) everywhere
    m["start"] = (m["start"] // 480) * 480
    yield rep(piece, notes=sort_notes(m))
    m = n.copy()  # a long silence in the middle and one before the first note
    m["start"][len(m) // 2:] += 480 * 1000
    m["end"][len(m) // 2:] += 480 * 1000
    yield rep(piece, notes=m)
    m = n.copy()
    m["start"] += 480 * 100
    m["end"] += 480 * 100
    yield rep(piece, notes=m)
    m = n.copy()  # zero-length notes
    m["end"][::3] = m["start"][::3]
    yield rep(piece, notes=m)
    m = n.copy()  # pitches pushed past 127 (octave folding)
    m["pitch"] += 60
    yield rep(piece, notes=m)
    m = n.copy()  # ticks beyond float64's exact integers
    m["start"] += 2 ** 61
    m["end"] += 2 ** 61
    yield rep(piece, notes=m)
    m = n.copy()  # drums only
    m["channel"] = DRUM_CHANNEL
    yield rep(piece, notes=m)
    yield rep(piece, ticks_per_beat=97)   # the grid does not divide the beat
    yield rep(piece, ticks_per_beat=100)  # 16ths divide it, triplets do not
    tempos = np.zeros(80, TEMPO_DTYPE)
    tempos["tick"] = np.arange(80) * 97
    tempos["us_per_beat"] = rng.integers(200_000, 900_000, 80)
    yield rep(piece, tempos=tempos)                   # a long tempo map
    yield rep(piece, tempos=tempos[:7].copy())        # a short one
    yield rep(piece, tempos=tempos[:5][::-1].copy())  # one out of tick order
    ts = np.zeros(4, METER_DTYPE)
    ts["tick"], ts["numerator"] = [4800, 0, 9600, 4800], [3, 4, 6, 2]
    ts["denominator"] = [4, 4, 8, 2]
    yield rep(piece, time_signatures=ts)
    ts2 = ts.copy()
    ts2["tick"] = [0, 100, 200, 300]
    yield rep(piece, time_signatures=ts2)
    ks = np.zeros(3, KEY_DTYPE)
    ks["tick"], ks["sharps"], ks["minor"] = [50, 0, 0], [2, -9, 3], [0, 1, 0]
    yield rep(piece, key_signatures=ks)
    for k in (0, 1, 2, 3):
        yield rep(piece, notes=n[:k])


@pytest.fixture(scope="module")
def pieces() -> list[Piece]:
    decoded = [decode(random_midi(seed, n_notes=n, n_tracks=tracks))
               for seed, n, tracks in ((1, 60, 1), (2, 500, 3), (3, 500, 4), (4, 1500, 5),
                                       (5, 200, 2), (6, 40, 3))]
    decoded += [decode(w["midi"]) for w in chorales(100)[:8]]  # the suite's cached subset
    return [v for p in decoded for v in _variants(p)]


def _check(pieces, fast, plain):
    for i, p in enumerate(pieces):
        try:
            want = plain(p)
        except (ValueError, IndexError) as exc:  # both must fail the same way
            with pytest.raises(type(exc)):
                fast(p)
            continue
        got = fast(p)
        assert identical(got, want), f"piece {i}: {got!r} != {want!r}"


# --- the checks --------------------------------------------------------------------------------

@pytest.mark.parametrize("bass,final,beats", [(0.0, 0.0, 4.0), (1.0, 2.0, 4.0), (0.37, 0.0, 3.0),
                                              (0.0, 3.5, 1.0)])
def test_pitch_class_histogram(pieces, bass, final, beats):
    _check(pieces, lambda p: keymod.pitch_class_histogram(p, bass, final, beats),
           lambda p: plain_pitch_class_histogram(p, bass, final, beats))


@pytest.mark.parametrize("profile", sorted(keymod.PROFILES))
def test_key_from_histogram(pieces, profile):
    hists = [plain_pitch_class_histogram(p, 1.0, 2.0) for p in pieces[:40]]
    hists += [np.zeros(12), np.ones(12), np.eye(12)[3], np.arange(12.0), -np.arange(12.0)]
    for h in hists:  # ties (flat, single pitch class) included
        assert identical(keymod.estimate_key_from_histogram(h, profile),
                         plain_key_from_histogram(h, profile))


def test_declared_key_and_meter_from_file(pieces):
    _check(pieces, keymod.declared_key, plain_declared_key)
    _check(pieces, metermod.meter_from_file, plain_meter_from_file)


def test_accent_function_and_meter_estimate(pieces):
    _check(pieces, metermod.accent_function, plain_accent_function)
    _check(pieces, metermod.estimate_meter, plain_estimate_meter)


def test_tempo_and_grid(pieces):
    _check(pieces, timing.tempo_bpm, plain_tempo_bpm)
    _check(pieces, timing.grid_fraction, plain_grid_fraction)
    _check(pieces, lambda p: timing.grid_fraction(p, (4, 3, 5), 1 / 96),
           lambda p: plain_grid_fraction(p, (4, 3, 5), 1 / 96))
    _check(pieces, lambda p: timing.grid_fraction(p, (2,), 0.1),
           lambda p: plain_grid_fraction(p, (2,), 0.1))


def test_piece_stats(pieces):
    _check(pieces, statsmod.piece_stats, plain_piece_stats)


@pytest.mark.parametrize("spec", [shmod.ShingleSpec(), shmod.ShingleSpec(ngram=3, grid=8),
                                  shmod.ShingleSpec(ngram=1, grid=2, max_shingles=50),
                                  shmod.ShingleSpec(ngram=9, grid=3, max_interval=5)])
def test_shingles(pieces, spec):
    _check(pieces, lambda p: shmod.shingle_hashes(p, spec),
           lambda p: plain_shingle_hashes(p, spec))


def test_content_hash_and_signature(pieces):
    _check(pieces, shmod.content_hash, plain_content_hash)
    for opts in ({}, {"ngram": 3, "num_perm": 64, "seed": 7, "grid": 3}):
        spec = shmod.ShingleSpec(ngram=int(opts.get("ngram", 4)), grid=int(opts.get("grid", 4)))
        num_perm, seed = int(opts.get("num_perm", 128)), int(opts.get("seed", 1))
        _check(pieces, lambda p: signature_of(p, opts),
               lambda p: (plain_signature(plain_shingle_hashes(p, spec), num_perm, seed),
                          plain_shingle_hashes(p, spec), plain_content_hash(p)))


def plain_signature(shingles, num_perm, seed):
    """signature_of's layout: the whole set's MinHash, its first half replaced by the lead
    voice's (the shingles below 2**63) when it has 16 or more."""
    sig = plain_minhash(shingles, num_perm, seed)
    lead = shingles[shingles < np.uint64(1 << 63)]
    if len(lead) >= 16:
        sig[:num_perm // 2] = plain_minhash(lead, num_perm // 2, seed)
    return sig


def test_fmix64_keeps_shape_and_input():
    x = np.arange(12, dtype=np.int64).reshape(3, 4) - 5
    before = x.copy()
    assert identical(shmod.fmix64(x), plain_fmix64(x))
    assert identical(x, before)


@pytest.mark.parametrize("size", [1, 100, 255, 256, 257, 4096])
def test_minhash_layouts_equal_plain_and_datasketch(size):
    # Reference: datasketch.MinHash (scheme affine32) with an identity hash over the folded
    # 32-bit values, on both sides of the size where ``minhash`` changes its table layout.
    rng = np.random.default_rng(size)
    sh = np.unique(rng.integers(0, 2 ** 64, size, dtype=np.uint64))
    for num_perm, seed in ((128, 1), (64, 9)):
        ours = minhash(sh, num_perm, seed, compiled=False)  # the numpy layouts themselves
        assert identical(ours, plain_minhash(sh, num_perm, seed))
        ref = MinHash(num_perm=num_perm, seed=seed, hashfunc=int)
        ref.update_batch([int(v) for v in fold32(sh)])
        assert np.array_equal(ours, ref.digest())


SHIFTS = (-70, -11, -6, -1, 0, 1, 5, 11, 40)


def test_fold_count(pieces):
    for shift in SHIFTS:
        _check(pieces, lambda p: trmod.fold_count(p.notes, shift),
               lambda p: plain_fold_count(p.notes, shift))
    assert trmod.fold_count(empty_notes(), 5) == 0


def test_shift_notes_and_output_notes(pieces):
    for shift in SHIFTS:
        _check(pieces, lambda p: trmod.shift_notes(p.notes, shift),
               lambda p: plain_shift_notes(p.notes, shift))
    values = {"transpose": 3, "augment": [-11, -4, 1, 8]}
    _check(pieces, lambda p: Transpose.output_notes(p, values),
           lambda p: [(suffix, sort_notes(plain_shift_notes(p.notes, total)[0]), total)
                      for suffix, total in (("", 3), (".t-11", -8), (".t-4", -1), (".t+1", 4),
                                            (".t+8", 11))])


def test_in_canonical_order_is_what_sort_notes_leaves_unchanged(pieces):
    rng = np.random.default_rng(5)
    for p in pieces:
        n = p.notes
        tables = [n, n[::-1], plain_shift_notes(n, 7)[0], plain_shift_notes(n, -40)[0]]
        if len(n) > 3:
            t = n.copy()  # ties on start, pitch, track and channel: only ``end`` decides
            t["pitch"], t["track"], t["channel"] = 60, 1, 0
            t["start"] = np.sort(rng.integers(0, 4, len(t))) * 480
            tables += [t, sort_notes(t), t[rng.permutation(len(t))]]
        for t in tables:
            assert trmod.in_canonical_order(t) == bool(np.array_equal(sort_notes(t), t))
