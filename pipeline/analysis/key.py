"""Key detection: a trained key classifier (default) and the Krumhansl-Schmuckler method.

The method (Krumhansl 1990, *Cognitive Foundations of Musical Pitch*, ch. 4, after Krumhansl &
Schmuckler): build a duration-weighted pitch-class distribution of the piece and correlate it
(Pearson) with the 24 rotations of a major and a minor key profile; the best correlation names
the key. Durations are in quarter-note beats (``ticks / ticks_per_beat``), as in music21's
implementation, so both see the same distribution for the same file.

On top of the plain method two optional weightings (measured on Bach chorales, see
``evaluate_key``): the *bass* weighting adds extra weight to the lowest note of each onset
(the bass carries the harmonic roots), and the *final* weighting adds extra weight to the
notes sounding in the last few beats (pieces end on the tonic, common practice). Both only
change the histogram, so the correlation step stays one (24 x 12) matrix product.

The default method, ``learned``, is a small multinomial logistic regression over 24 keys
(trained with numpy by ``python -m pipeline.tools.train_key``, weights shipped in
``key_weights.json`` with the sets they were trained on). Its per-key evidence is
transposition-invariant: the pitch-class distributions of ``FEATURES`` (duration, bass, final
bars, onsets, on-beat notes, first and last bass note, triads and cadences, the windowed key
path, the melody voice and its last note) read from the candidate tonic, plus the
Krumhansl-Schmuckler correlations of the duration and bass distributions with the five published
profiles. The distributions and the windowed path are summed in one pass by the compiled
extension where it is built (``features_and_path``; the numpy code is the specification). Its
confidence is the model's probability of the chosen key (0..1), calibrated by training across
four genres (see README, Key detection).

Tonic spelling rule: the spelling whose key signature has the fewest accidentals; the tie at
six accidentals goes to F# major and Eb minor (music21's ``KeyWeightKeyAnalysis`` makes the same
choice: "favor F#", "favor eb minor").
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from ..midi.accel import compiled_analyses
from ..midi.piece import DRUM_CHANNEL, Piece, distinct

# the names of keys are part of this module's interface (callers read ``key.MODES``, ...)
from .key_profiles import (LEARNED, MAJOR_BY_SHARPS, MAJOR_TONIC_NAMES, MINOR_BY_SHARPS,  # noqa: F401
                           MINOR_TONIC_NAMES, MODES, PROFILES, key_name, note_name_to_pc,
                           resolve_profile)
from .modulation import PRESENCE_TABLE, SWITCH_COST, WINDOW_BEATS, windowed_path

#: The default method, chosen by leave-one-genre-out cross-validation over four sets (README,
#: Key detection; ``python -m pipeline.tools.evaluate_key``).
DEFAULT_PROFILE = LEARNED
#: The weighting of the correlation methods when a published profile is chosen: measured on a
#: development subset of 100 Bach chorales (``chorales(100, offset=2)``); the learned method
#: reads these distributions separately and does not use these two numbers.
DEFAULT_BASS_WEIGHT = 1.0
DEFAULT_FINAL_WEIGHT = 2.0
#: Length of the "final" window in quarter-note beats (about the last bar in 4/4).
FINAL_BEATS = 4.0

def _rotation_matrix(profile: str) -> np.ndarray:
    """(24, 12) matrix: rows 0-11 major keys on tonic 0..11, rows 12-23 minor; each row
    centred and scaled to unit norm so a dot product with a centred unit histogram is Pearson's r."""
    major, minor = (np.asarray(p, dtype=np.float64) for p in PROFILES[profile])
    idx = (np.arange(12)[None, :] - np.arange(12)[:, None]) % 12  # row t: weight of pc j in key t
    rows = np.vstack([major[idx], minor[idx]])
    rows = rows - rows.mean(axis=1, keepdims=True)
    return rows / np.linalg.norm(rows, axis=1, keepdims=True)


_MATRICES = {name: _rotation_matrix(name) for name in PROFILES}


@dataclass(frozen=True)
class KeyEstimate:
    """A key estimate.

    ``confidence``: for the learned method the model's probability of the chosen key (0..1,
    calibrated across genres); for a published profile the margin between the best and the
    runner-up correlation (``r_best - r_second``, 0..2; 0 means a tie).
    ``scores`` holds the 24 per-key scores (probabilities or correlations): major keys on
    C..B, then minor keys on C..B.
    """

    tonic: str
    tonic_pc: int
    mode: str
    confidence: float
    runner_up: str
    correlation: float
    profile: str
    scores: tuple[float, ...] = ()
    #: The learned method's windowed key path (``modulation.windowed_path``), reused by
    #: key_meter's modulation flag; None for the correlation methods.
    windowed: tuple | None = field(default=None, compare=False, repr=False)

    @property
    def name(self) -> str:
        return f"{self.tonic} {self.mode}"

    def confidence_of(self, index: int) -> float:
        """``confidence`` as it would read for key ``index`` (0-23, as ``scores``): for the
        learned method its probability; for a published profile its correlation minus the
        best other key's (negative when another key correlates better). The estimate's own
        key gives ``confidence``."""
        if self.profile == LEARNED:
            return self.scores[index]
        return self.scores[index] - self.scores[best_other(self.scores, index)]

    def runner_up_to(self, index: int) -> str:
        """The most likely key other than key ``index`` (the first on a tie): ``runner_up``
        for the estimate's own key, else the estimate's key."""
        best = best_other(self.scores, index)
        return key_name(best % 12, MODES[best // 12])


def best_other(scores: Sequence[float], index: int) -> int:
    """The index of the highest of the 24 ``scores`` other than ``index`` (the first on a tie)."""
    return max((i for i in range(24) if i != index), key=scores.__getitem__)


def pitch_class_histogram(piece: Piece, bass_weight: float = 0.0, final_weight: float = 0.0,
                          final_beats: float = FINAL_BEATS) -> np.ndarray:
    """Duration-weighted (quarter-note beats) pitch-class histogram of the pitched notes.

    ``bass_weight`` adds that multiple of each onset's lowest note duration again;
    ``final_weight`` adds that multiple for notes sounding in the last ``final_beats`` beats.
    """
    notes = piece.notes
    accel = compiled_analyses(notes)
    if accel is not None:  # the same sums in the same order (tests/test_smf_accel.py)
        got = accel.pc_histogram(notes, float(piece.ticks_per_beat), float(bass_weight),
                                 float(final_weight), float(final_beats))
        if got is not None:
            return np.frombuffer(got, dtype=np.float64).copy()
    drum = notes["channel"] == DRUM_CHANNEL
    if drum.any():  # columns of the pitched notes (no copy of whole structured rows)
        keep = ~drum
        start, end, pitch = notes["start"][keep], notes["end"][keep], notes["pitch"][keep]
    else:
        start, end, pitch = (np.ascontiguousarray(notes[f]) for f in ("start", "end", "pitch"))
    if len(start) == 0:
        return np.zeros(12)
    tpb = float(piece.ticks_per_beat)
    dur = (end - start) / tpb  # int64 / float: each difference as float64, then divided
    # weight 1, plus bass_weight for each onset's lowest note, plus final_weight for the final
    # notes: the same sums (1.0 + bass_weight, then + final_weight) as adding them in place
    if bass_weight:
        weight = np.where(_lowest_of_each_onset(start, pitch), 1.0 + float(bass_weight), 1.0)
    else:
        weight = np.ones(len(start))
    if final_weight:
        last = end.max()
        final = end > last - final_beats * tpb
        weight[final] += final_weight
    return np.bincount(pitch % 12, weights=dur * weight, minlength=12)


def _lowest_of_each_onset(start: np.ndarray, pitch: np.ndarray) -> np.ndarray:
    """Mask of the lowest note among the notes starting at each tick (the first such note on a
    tie): the group minimum of a stable lexsort by (start, pitch). Notes already in (start,
    pitch) order, as the decoder gives them, need no sort: then it is each onset's first note."""
    ds = start[1:] - start[:-1]
    if len(ds) and (ds.min() < 0 or np.logical_or.reduce(pitch[1:] < pitch[:-1], where=ds == 0)):
        order = np.lexsort((pitch, start))
        s_sorted = start[order]
        first = np.ones(len(order), dtype=bool)
        first[1:] = s_sorted[1:] != s_sorted[:-1]
        lowest = np.zeros(len(start), dtype=bool)
        lowest[order[first]] = True
        return lowest
    first = np.ones(len(start), dtype=bool)
    first[1:] = ds != 0
    return first


def estimate_key_from_histogram(hist: np.ndarray, profile: str = DEFAULT_PROFILE) -> KeyEstimate:
    """Key from a 12-bin pitch-class histogram by correlation with the 24 rotated profiles.

    An empty or flat histogram gives C major with confidence 0 (no evidence either way).
    """
    profile = resolve_profile(profile)
    h = np.asarray(hist, dtype=np.float64)
    h = h - np.add.reduce(h) / len(h)  # h.mean(): the same sum and division
    norm = math.sqrt(h.dot(h))  # np.linalg.norm(h) computes sqrt(h.dot(h)) too
    scores = (_MATRICES[profile] @ (h / norm) if norm > 0 else np.zeros(24)).tolist()
    # the first maximum, then the first maximum of the rest: a stable argsort of -scores,
    # so ties resolve to the lower index (major before minor, C first)
    best = 0  # max(range(24), key=scores.__getitem__): replaced only by a greater score
    for i in range(1, 24):
        if scores[i] > scores[best]:
            best = i
    second = 1 if best == 0 else 0
    for i in range(second + 1, 24):
        if i != best and scores[i] > scores[second]:
            second = i
    mode = MODES[best // 12]
    pc = best % 12
    names = MAJOR_TONIC_NAMES if mode == "major" else MINOR_TONIC_NAMES
    return KeyEstimate(tonic=names[pc], tonic_pc=pc, mode=mode,
                       confidence=scores[best] - scores[second],
                       runner_up=key_name(second % 12, MODES[second // 12]),
                       correlation=scores[best], profile=profile, scores=tuple(scores))


def estimate_key(piece: Piece, profile: str = DEFAULT_PROFILE,
                 bass_weight: float = DEFAULT_BASS_WEIGHT,
                 final_weight: float = DEFAULT_FINAL_WEIGHT) -> KeyEstimate:
    """Estimate tonic and mode of a decoded piece (drums excluded).

    ``profile="learned"`` (the default) runs the trained classifier (the two weights are not
    used); a published profile runs the Krumhansl-Schmuckler correlation, and with
    ``bass_weight=0, final_weight=0`` this is the plain Krumhansl-Schmuckler method.
    """
    if resolve_profile(profile) == LEARNED:
        return estimate_key_learned(piece)
    return estimate_key_from_histogram(
        pitch_class_histogram(piece, bass_weight=bass_weight, final_weight=final_weight), profile)


def declared_key(piece: Piece) -> str | None:
    """The key the file declares at its start, e.g. ``"Eb major"``: of the key-signature
    events at the earliest tick, the last in file order (it supersedes the others, as a player
    applies them in order: an audit found a sequencer's C major written before the real D major
    at tick 0 reported as the declared key).

    None when the file has no key-signature event. Note that a sequencer default (C major,
    zero sharps) is reported as declared: only comparison with the estimate can tell.
    """
    ks = piece.key_signatures
    if len(ks) == 0:
        return None
    ticks = ks["tick"].tolist()
    earliest = min(ticks)
    first = ks[len(ticks) - 1 - ticks[::-1].index(earliest)]  # the last at the earliest tick
    sharps = min(max(int(first["sharps"]), -7), 7)
    if first["minor"]:
        return f"{MINOR_BY_SHARPS[sharps]} minor"
    return f"{MAJOR_BY_SHARPS[sharps]} major"


def parse_key(text: str) -> tuple[int, str]:
    """``"Eb major"`` -> ``(3, "major")``. ValueError on anything else."""
    parts = str(text).split()
    if len(parts) != 2 or parts[1] not in MODES:
        raise ValueError(f"{text!r} is not a key: write a tonic and a mode, e.g. 'Eb major'")
    return note_name_to_pc(parts[0]), parts[1]


# ---------------------------------------------------------------------------------------------
# The learned method

#: The distributions the classifier reads, each a 12-bin vector over pitch classes (or chord
#: roots) normalized to sum 1 (all zero when the piece has no such event):
#:
#: - ``duration``: duration-weighted pitch classes (quarter-note beats); ``onsets``: note counts;
#:   ``bass`` / ``top``: duration of each onset's lowest / highest note; ``final``: duration of
#:   the notes sounding in the last FINAL_BEATS beats; ``on_beat``: duration of notes starting
#:   on a beat;
#: - ``first_bass``, ``last_bass``, ``last_top``: one-hot pitch class of the lowest note of the
#:   first onset, the lowest and the highest note of the last onset;
#: - ``major_triads`` / ``minor_triads``: per root, the share of the beats where a note starts
#:   in which a major / minor triad on that root sounds (all three pitch classes sound at some
#:   point in the beat);
#:   ``first_major_triad`` ... ``last_minor_triad``: the roots of the triads of the first and
#:   of the last beat that holds one; ``cadence_major`` / ``cadence_minor``: per root, how
#:   often a major / minor triad on it follows a major triad on its fifth (V-I, common practice)
#:   from one beat with a triad to the next;
#: - ``path_major`` / ``path_minor``: per tonic, the share of the 8-beat segments the
#:   windowed key path (``modulation.windowed_path``) assigns to the major / minor key on it;
#: - ``melody``: duration of the notes of the melody voice (``melody_voice``);
#:   ``melody_last``: one-hot pitch class of its last note (the highest of its last onset).
FEATURES = ("duration", "onsets", "bass", "top", "final", "on_beat", "first_bass", "last_bass",
            "last_top", "major_triads", "minor_triads", "first_major_triad", "first_minor_triad",
            "last_major_triad", "last_minor_triad", "cadence_major", "cadence_minor",
            "path_major", "path_minor", "melody", "melody_last")
#: The melody voice is the voice (track and channel) of the highest mean pitch among those
#: holding at least this share of the pitched notes (the skyline-by-voice guess of common
#: practice; 0.1 chosen against 0, README, Key detection).
MELODY_MIN_SHARE = 0.1
#: Published profiles whose correlations (of the duration and of the bass distribution) with
#: each candidate key are features too, in this order.
CORRELATION_PROFILES = tuple(sorted(PROFILES))
#: Length of one class's feature vector: a major block and a minor block of rotated
#: distributions (only the block of the candidate's mode is filled), the correlations, and
#: a minor-mode bias.
N_CLASS_FEATURES = 2 * len(FEATURES) * 12 + 2 * len(CORRELATION_PROFILES) + 1
#: ``_ROTATE[t]``: the indexes that read a 12-bin distribution from tonic t (bin 0 = tonic).
_ROTATE = (np.arange(12)[None, :] + np.arange(12)[:, None]) % 12
#: (profiles, 24, 12): each correlation profile's rotation matrix, in CORRELATION_PROFILES order.
_CORRELATION_STACK = np.stack([_MATRICES[name] for name in CORRELATION_PROFILES])
_BITS = 1 << np.arange(12, dtype=np.int64)


def _triad_table() -> np.ndarray:
    """(4096, 24) float table: for each set of pitch classes (bit pc set), which major (columns
    0-11, by root) and minor (12-23) triads it contains (root, third and fifth all present)."""
    sets = np.arange(4096)[:, None]
    has = (sets >> np.arange(12)[None, :]) & 1  # (4096, 12)
    root = np.arange(12)
    major = has[:, root] & has[:, (root + 4) % 12] & has[:, (root + 7) % 12]
    minor = has[:, root] & has[:, (root + 3) % 12] & has[:, (root + 7) % 12]
    return np.hstack([major, minor]).astype(np.float64)


_TRIADS = _triad_table()
_FIFTH_ABOVE = (np.arange(12) + 7) % 12
_HAS_TRIAD = _TRIADS.any(axis=1)


def _onset_extremes(start: np.ndarray, pitch: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Masks of one lowest and one highest note among the notes starting at each tick. Notes
    in (start, pitch) order, as the decoder gives them, need no sort: each onset's first and
    last note; others are sorted first."""
    ds = start[1:] - start[:-1]
    if len(ds) and (ds.min() < 0 or np.logical_or.reduce(pitch[1:] < pitch[:-1], where=ds == 0)):
        return _lowest_of_each_onset(start, pitch), _lowest_of_each_onset(start, -pitch)
    new = ds != 0
    first = np.ones(len(start), dtype=bool)
    first[1:] = new
    last = np.ones(len(start), dtype=bool)
    last[:-1] = new
    return first, last


def key_features(piece: Piece, windowed: tuple[np.ndarray, ...] | None = None) -> np.ndarray:
    """(len(FEATURES), 12) distributions of the pitched notes (see FEATURES). ``windowed``:
    ``modulation.windowed_path(piece)`` when already computed."""
    if windowed is None:
        return features_and_path(piece)[0]
    return _normalized(_feature_sums(piece, windowed))


def features_and_path(piece: Piece) -> tuple[np.ndarray, tuple[np.ndarray, ...]]:
    """(``key_features(piece)``, ``modulation.windowed_path(piece)``): from the compiled
    module in one pass over the notes where it runs (the same values to the last bit,
    tests/test_smf_accel.py), else from the numpy code, which stays the specification."""
    notes = piece.notes
    accel = compiled_analyses(notes)
    window = WINDOW_BEATS * piece.ticks_per_beat
    if accel is not None and window == int(window):
        got = accel.key_features(notes, int(piece.ticks_per_beat), FINAL_BEATS, int(window),
                                 PRESENCE_TABLE, SWITCH_COST, MELODY_MIN_SHARE)
        if got is not None:
            sums, numbers, sets, path = (np.frombuffer(b, dtype=d) for b, d in
                                         zip(got, (np.float64, np.int64, np.int64, np.int64)))
            return _normalized(sums.reshape(len(FEATURES), 12)), (numbers, sets, path)
    windowed = windowed_path(piece)
    return _normalized(_feature_sums(piece, windowed)), windowed


def _normalized(out: np.ndarray) -> np.ndarray:
    """Each row of the feature sums divided by its total (rows without events stay zero)."""
    total = out.sum(axis=1, keepdims=True)
    np.divide(out, total, out=out, where=total > 0)
    return out


def _feature_sums(piece: Piece, windowed: tuple[np.ndarray, ...]) -> np.ndarray:
    """``key_features`` before each row is divided by its total: durations in beats and
    counts."""
    notes = piece.notes
    keep = notes["channel"] != DRUM_CHANNEL
    if keep.all():
        start, end, pitch = notes["start"], notes["end"], notes["pitch"].astype(np.int64)
    else:
        start, end, pitch = notes["start"][keep], notes["end"][keep], notes["pitch"][keep].astype(np.int64)
    out = np.zeros((len(FEATURES), 12))
    if len(start) == 0:
        return out
    tpb = piece.ticks_per_beat
    pc = pitch % 12
    dur = (end - start) / float(tpb)
    lowest, highest = _onset_extremes(start, pitch)
    final = end > end.max() - FINAL_BEATS * tpb
    on_beat = start % tpb == 0
    # rows 0-5 in one weighted count: (row * 12 + pitch class, weight) pairs
    rows = np.concatenate([pc, pc + 12, pc[lowest] + 24, pc[highest] + 36, pc[final] + 48,
                           pc[on_beat] + 60])
    weights = np.concatenate([dur, np.ones(len(pc)), dur[lowest], dur[highest], dur[final],
                              dur[on_beat]])
    out[:6] = np.bincount(rows, weights=weights, minlength=72).reshape(6, 12)
    first, last = start == start[0], start == start[-1]
    if start[0] != start.min() or start[-1] != start.max():  # not in time order
        first, last = start == start.min(), start == start.max()
    out[6, pitch[first].min() % 12] = 1.0
    out[7, pitch[last].min() % 12] = 1.0
    out[8, pitch[last].max() % 12] = 1.0
    # pitch classes sounding in each beat where a note starts (other beats only lose notes):
    # over those beats in order, +1 at the note's first beat, -1 at the first one after its
    # last (numbered by rank, so huge tick values cost nothing)
    b0 = start // tpb
    b1 = np.maximum(b0, (end - 1) // tpb) + 1
    beats = distinct(b0)
    first_beat = np.searchsorted(beats, b0)
    after_beat = np.searchsorted(beats, b1)
    size = (len(beats) + 1) * 12
    count = (np.bincount(first_beat * 12 + pc, minlength=size)
             - np.bincount(after_beat * 12 + pc, minlength=size)).reshape(-1, 12)[:-1]
    # each beat's set of sounding pitch classes as a 12-bit number, then its triads by table
    sets = (np.cumsum(count, axis=0) > 0).astype(np.int64) @ _BITS
    triads = _TRIADS[sets]  # (beats, 24): major roots, then minor roots
    out[9:11] = triads.sum(axis=0).reshape(2, 12)
    chord_beats = np.flatnonzero(_HAS_TRIAD[sets])
    if len(chord_beats):
        out[11:13] = triads[chord_beats[0]].reshape(2, 12)
        out[13:15] = triads[chord_beats[-1]].reshape(2, 12)
        # authentic cadences: a major triad on the fifth, then the triad on its tonic
        before, after = triads[chord_beats[:-1]], triads[chord_beats[1:]]
        dominant = before[:, _FIFTH_ABOVE]  # column r: a major triad on r + 7 before
        out[15:17] = (after.reshape(-1, 2, 12) * dominant[:, None, :]).sum(axis=0)
    out[17:19] = np.bincount(windowed[2], minlength=24).reshape(2, 12)
    track = notes["track"] if keep.all() else notes["track"][keep]
    channel = notes["channel"] if keep.all() else notes["channel"][keep]
    melody = melody_voice(track.astype(np.int64) * 16 + channel, pitch)
    out[19] = np.bincount(pc[melody], weights=dur[melody], minlength=12)
    last = melody & (start == start[melody].max())
    out[20, pitch[last].max() % 12] = 1.0
    return out


def melody_voice(voice: np.ndarray, pitch: np.ndarray) -> np.ndarray:
    """Mask of the notes of the melody voice: of the voices (``voice``: one number per voice,
    here track * 16 + channel) holding at least MELODY_MIN_SHARE of the notes, the one of the
    highest mean pitch (the lowest voice number on a tie; the lowest voice number when none
    holds that share)."""
    voices, index, count = np.unique(voice, return_inverse=True, return_counts=True)
    mean = np.bincount(index, weights=pitch) / count
    mean[count < MELODY_MIN_SHARE * len(pitch)] = -np.inf
    return index == int(np.argmax(mean))


def class_features(features: np.ndarray) -> np.ndarray:
    """(24, N_CLASS_FEATURES) evidence for each candidate key (rows: major on C..B, minor on
    C..B): the distributions read from the candidate tonic in the block of its mode, the
    correlations of the duration and bass distributions with each published profile's
    rotation for that key, and a 1 for minor keys."""
    n = len(FEATURES) * 12
    phi = np.zeros((24, N_CLASS_FEATURES))
    rotated = features[:, _ROTATE].transpose(1, 0, 2).reshape(12, n)  # [t, f*12 + j]
    phi[:12, :n] = rotated
    phi[12:, n:2 * n] = rotated
    h = features[[0, 2]]  # duration, bass
    h = h - h.mean(axis=1, keepdims=True)
    norm = np.sqrt(np.einsum("ij,ij->i", h, h))
    h = np.divide(h, norm[:, None], out=np.zeros_like(h), where=norm[:, None] > 0)
    col = 2 * n + 2 * len(CORRELATION_PROFILES)
    phi[:, 2 * n:col] = (_CORRELATION_STACK @ h.T).transpose(1, 0, 2).reshape(24, -1, order="F")
    phi[12:, col] = 1.0
    return phi


_WEIGHTS: np.ndarray | None = None


def learned_weights() -> np.ndarray:
    """The shipped classifier weights (``key_weights.json``, written by train_key)."""
    global _WEIGHTS
    if _WEIGHTS is None:
        import json
        from pathlib import Path
        path = Path(__file__).with_name("key_weights.json")
        data = json.loads(path.read_text(encoding="utf-8"))
        if tuple(data["features"]) != FEATURES or tuple(data["profiles"]) != CORRELATION_PROFILES:
            raise ValueError(f"{path}: weights were trained for features {data['features']} "
                             f"and profiles {data['profiles']}; retrain with "
                             f"python -m pipeline.tools.train_key")
        w = np.asarray(data["weights"], dtype=np.float64)
        if w.shape != (N_CLASS_FEATURES,):
            raise ValueError(f"{path}: {w.shape[0]} weights, expected {N_CLASS_FEATURES}")
        _WEIGHTS = w
    return _WEIGHTS


def key_probabilities(features: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
    """The classifier's 24 key probabilities (softmax of the linear scores)."""
    w = learned_weights() if weights is None else weights
    z = class_features(features) @ w
    z = np.exp(z - z.max())
    return z / z.sum()


def estimate_from_probabilities(probs: np.ndarray) -> KeyEstimate:
    """The KeyEstimate of 24 key probabilities: the most probable key (the first on a tie),
    its probability as confidence."""
    scores = probs.tolist()
    best = scores.index(max(scores))
    second = best_other(scores, best)
    mode = MODES[best // 12]
    pc = best % 12
    names = MAJOR_TONIC_NAMES if mode == "major" else MINOR_TONIC_NAMES
    return KeyEstimate(tonic=names[pc], tonic_pc=pc, mode=mode, confidence=scores[best],
                       runner_up=key_name(second % 12, MODES[second // 12]),
                       correlation=scores[best], profile=LEARNED, scores=tuple(scores))


def estimate_key_learned(piece: Piece, weights: np.ndarray | None = None) -> KeyEstimate:
    """Key of a piece by the trained classifier. An empty piece gives C major with
    confidence 1/24 (no evidence either way)."""
    feats, windowed = features_and_path(piece)
    if not feats.any():
        return replace(estimate_from_probabilities(np.full(24, 1.0 / 24)), windowed=windowed)
    return replace(estimate_from_probabilities(key_probabilities(feats, weights)), windowed=windowed)
