"""Meter: the declared time signature, an estimate from note onsets, tempo and quantization.

Meter estimate: a linear classifier over autocorrelation and accent-position features, the
approach of Toiviainen & Eerola 2006 ("Autocorrelation in meter induction: the role of accent
structure", JASA 119(2), discriminant functions over autocorrelation values), with the
autocorrelation of an accent function after Brown 1993 ("Determination of the meter of musical
scores by autocorrelation", JASA 94(4)):

1. Onsets of pitched notes go on a grid of 1/12 quarter note (holds 16ths and 8th-note
   triplets exactly). Each onset's accent is the summed duration of its notes, capped at a
   half note (a durational accent, Parncutt 1994, Music Perception 11(4)), plus a bonus for
   the lowest note of the onset (bass).
2. Features (``meter_features``): the normalized autocorrelation of that function at beat and
   bar lags from a 16th to 12 quarters; the median inter-onset interval; where in the quarter
   note the accent falls; and downbeat contrasts (the accent function folded at each
   candidate bar: does one beat of the bar stand out, or do the halves look alike?). The
   contrasts carry the evidence against doubled or halved periods (6/8 vs 12/8, 2/4 vs 4/4)
   and between triple and compound (3/4 vs 6/8).
3. A multinomial logistic regression (weights in ``meter_weights.py``, trained by
   ``python -m pipeline.tools.evaluate_meter --train`` on development parts of four
   genres; see that module) gives a probability per candidate meter; the most probable wins.
   Its intercepts are the priors that favour the common meter when the evidence is ambiguous.

The downbeat phase comes from matching the bar-folded accents with the chosen meter's
metrical-hierarchy template.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..midi.accel import compiled_analyses
from ..midi.piece import DRUM_CHANNEL, Piece
from . import meter_weights as _weights

#: Grid resolution of the onset function, in bins per quarter note.
BINS_PER_BEAT = 12


@dataclass(frozen=True)
class MeterSpec:
    """A candidate meter: bar length and metrical levels in quarter-note beats."""

    name: str
    family: str           # duple | triple | compound
    levels: tuple[float, ...]  # periods from bar down to the smallest subdivision, in quarters

    @property
    def bar(self) -> float:
        return self.levels[0]


#: The candidates (data). ``family``: simple duple/quadruple -> duple; simple triple -> triple;
#: compound (beats divided in three) -> compound (common practice classification).
METERS: tuple[MeterSpec, ...] = (
    MeterSpec("2/4", "duple", (2, 1, 0.5, 0.25)),
    MeterSpec("4/4", "duple", (4, 2, 1, 0.5, 0.25)),
    MeterSpec("2/2", "duple", (4, 2, 1, 0.5)),
    MeterSpec("3/4", "triple", (3, 1, 0.5, 0.25)),
    MeterSpec("3/8", "triple", (1.5, 0.5, 0.25)),
    MeterSpec("3/2", "triple", (6, 2, 1, 0.5)),
    MeterSpec("6/8", "compound", (3, 1.5, 0.5, 0.25)),
    MeterSpec("9/8", "compound", (4.5, 1.5, 0.5, 0.25)),
    MeterSpec("12/8", "compound", (6, 3, 1.5, 0.5, 0.25)),
)
METER_FAMILY = {m.name: m.family for m in METERS}
#: Accent of one note is its duration in beats, capped here (a whole note is no stronger).
ACCENT_CAP_BEATS = 2.0
#: Extra accent (multiple of its duration) for the lowest note of each onset.
BASS_ACCENT = 0.5

#: ``family`` of a meter string not among the candidates: by numerator (common practice).
_COMPOUND_NUMERATORS = {6, 9, 12}


def meter_family(meter: str) -> str:
    """``duple``, ``triple`` or ``compound`` for a meter such as ``"6/8"``."""
    if meter in METER_FAMILY:
        return METER_FAMILY[meter]
    num = int(meter.split("/")[0])
    if num in _COMPOUND_NUMERATORS:
        return "compound"
    return "triple" if num % 3 == 0 else "duple"


def meter_from_file(piece: Piece) -> str | None:
    """The declared time signature that governs most of the piece, e.g. ``"3/4"``; None if
    the file declares none. (A file may change meter; the longest-lasting one wins.)"""
    ts = piece.time_signatures
    if len(ts) == 0:
        return None
    if len(ts) == 1:  # the usual case: one declaration governs the whole piece
        return f"{int(ts['numerator'][0])}/{int(ts['denominator'][0])}"
    # a handful of events: plain Python ints (exact) instead of numpy calls on tiny arrays
    ticks = ts["tick"].tolist()
    order = sorted(range(len(ticks)), key=ticks.__getitem__)  # stable, like argsort "stable"
    ticks = [ticks[i] for i in order]
    end = max(int(piece.end_tick), ticks[-1] + 1,
              int(piece.notes["end"].max()) if len(piece.notes) else 0)
    spans = [b - a for a, b in zip(ticks, ticks[1:] + [end])]
    i = order[spans.index(max(spans))]  # first longest, like argmax
    return f"{int(ts['numerator'][i])}/{int(ts['denominator'][i])}"


#: Declared meters that look like sequencer defaults rather than the music's meter: a bar of
#: one beat (1/4, also 1/8, 1/2) is no meter; many sequencers write 1/4 when no meter was set
#: (693 of the 909 songs of the pop-arrangement collection declare it).
def is_default_meter(meter: str) -> bool:
    """Whether a declared meter looks like a sequencer default (numerator 1, e.g. ``1/4``)."""
    return meter.split("/")[0] == "1"


#: Default of ``declared_meter_issue``'s ``min_family_probability``: 0, no declared meter is
#: overruled by the estimate. Chosen by measurement across the evaluation sets, the demo and
#: synthetic corpora (README, Meter estimation, Declared meters): every value that overruled
#: anything overruled more true declarations than wrong ones.
CONTRADICTION_PROBABILITY = 0.0


def compatible_meters(declared: str) -> frozenset[str]:
    """The candidate meters (``CLASSES``) that do not contradict a declared meter: those of its
    family, and across the triple and compound families the dotted-quarter meters: a 3/8 bar
    is one dotted-quarter beat and two of them make a 6/8 bar (as two 2/4 bars make a 4/4
    one), so 3/8 and 6/8, 9/8, 12/8 are one choice of bar length over the same beat."""
    family = meter_family(declared)
    out = {c for c in CLASSES if meter_family(c) == family}
    if declared == "3/8" or family == "compound":
        out |= {c for c in CLASSES if c == "3/8" or meter_family(c) == "compound"}
    return frozenset(out)


def declared_meter_issue(declared: str | None, estimate: "MeterEstimate",
                         min_family_probability: float = CONTRADICTION_PROBABILITY) -> str | None:
    """Why a declared meter should not be reported: ``"default"`` (``is_default_meter``),
    ``"contradicted"`` (the classifier gives the meters compatible with it,
    ``compatible_meters``, less than ``min_family_probability`` together), else None (also
    without a declaration, and when the notes gave no estimate). Within a family the notation
    is an editor's choice (2/4, 4/4 and 2/2 of one march), so a declared meter is only
    overruled across families."""
    if declared is None:
        return None
    if is_default_meter(declared):
        return "default"
    if estimate.probabilities and \
            estimate.support(compatible_meters(declared)) < min_family_probability:
        return "contradicted"
    return None


@dataclass(frozen=True)
class MeterEstimate:
    """An estimated meter with its score and the margin over the runner-up candidate; ``meter``
    None (and ``confidence`` 0, no ``probabilities``) when the notes are too few to tell
    (fewer than ``MIN_ONSETS`` distinct pitched onsets)."""

    meter: str | None
    score: float
    confidence: float
    runner_up: str | None
    phase_beats: float  # offset of the first downbeat from tick 0, in quarter-note beats
    probabilities: tuple[float, ...] = field(default=(), repr=False)  # per ``CLASSES``

    def support(self, meters: frozenset[str]) -> float:
        """Probability the classifier gives to these meters together (0.0 without an
        estimate)."""
        return sum(p for c, p in zip(CLASSES, self.probabilities) if c in meters)


def _squeeze_gaps(bins: np.ndarray) -> np.ndarray:
    """Shorten silent stretches longer than two common bars by whole common bars.

    The common bar is the least common multiple of every candidate bar length, so each onset
    keeps its position in every candidate bar and the lags the method looks at (up to two bars)
    see the same onsets (the longest lag, 32 quarters, is shorter than a common bar); what is
    removed is silence. This bounds the accent function by the
    number of onsets, not by the file's tick span (a valid 197-byte file with one note at tick
    268 million would otherwise ask for gigabytes)."""
    if len(bins) == 0:
        return bins
    order = np.argsort(bins, kind="stable")
    b = bins[order]
    gaps = np.diff(b, prepend=0)
    excess = np.where(gaps > 2 * COMMON_BAR_BINS, (gaps - COMMON_BAR_BINS) // COMMON_BAR_BINS, 0)
    out = np.empty_like(bins)
    out[order] = b - np.cumsum(excess) * COMMON_BAR_BINS
    return out


def _pitched_columns(notes: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Contiguous ``start``, ``end``, ``pitch`` of the pitched notes (no structured-row copy)."""
    drum = notes["channel"] == DRUM_CHANNEL
    if drum.any():
        keep = ~drum
        return notes["start"][keep], notes["end"][keep], notes["pitch"][keep]
    return (np.ascontiguousarray(notes["start"]), np.ascontiguousarray(notes["end"]),
            np.ascontiguousarray(notes["pitch"]))


def accent_function(piece: Piece) -> np.ndarray:
    """Accent strength per grid bin (1/12 quarter) of the pitched notes' onsets."""
    fast = _compiled_accents(piece)
    if fast is not None:
        return fast[0]
    start, end, pitch = _pitched_columns(piece.notes)
    return _accent(start, end, pitch, float(piece.ticks_per_beat), _start_steps(start))


def _compiled_accents(piece: Piece) -> tuple[np.ndarray, list[float], float] | None:
    """(accent function, ``_autocorrs`` at ``_LAG_BINS``, ``_median_ioi``) from the compiled
    module, for pitched onsets in time order; None where the numpy code must run (no compiled
    module, no pitched onsets, onsets out of order). The same values, bit for bit
    (tests/test_smf_accel.py)."""
    accel = compiled_analyses(piece.notes)
    if accel is None:
        return None
    got = accel.meter_accents(piece.notes, float(piece.ticks_per_beat), _LAG_BINS, COMMON_BAR_BINS)
    if got is None:
        return None
    acc, r, median_ioi = got
    return np.frombuffer(acc, dtype=np.float64).copy(), r, median_ioi


def _start_steps(start: np.ndarray) -> np.ndarray | None:
    """``start[1:] - start[:-1]`` when the onsets are in time order (as the decoder gives
    them), else None."""
    steps = start[1:] - start[:-1]
    return steps if len(steps) == 0 or steps.min() >= 0 else None


def _accent(start: np.ndarray, end: np.ndarray, pitch: np.ndarray, tpb: float,
            steps: np.ndarray | None) -> np.ndarray:
    """``accent_function`` on the pitched columns; ``steps`` from ``_start_steps``.

    For onsets in time order (``steps`` given) the bins are already sorted, so the sort of
    ``_squeeze_gaps`` is the identity and is skipped, and when each bin's notes are in pitch
    order (the decoder sorts by start, then pitch) the lowest note of a bin is its first one,
    so the lexsort is skipped too. The sums are the same ``bincount``s in the same order."""
    if len(start) == 0:
        return np.zeros(0)
    bins = np.rint(start / tpb * BINS_PER_BEAT).astype(np.int64)
    dur = np.minimum((end - start) / tpb, ACCENT_CAP_BEATS)
    if steps is None:  # not in time order: the general path
        bins = _squeeze_gaps(bins)
        order = np.lexsort((pitch, bins))
        b_sorted = bins[order]
        first = np.ones(len(order), dtype=bool)
        first[1:] = b_sorted[1:] != b_sorted[:-1]
        low = order[first]
    else:
        gaps = bins[1:] - bins[:-1]  # >= 0: rint(start / tpb * 12) keeps the time order
        if bins[0] > 2 * COMMON_BAR_BINS or (len(gaps) and gaps.max() > 2 * COMMON_BAR_BINS):
            bins = _squeeze_sorted(bins, gaps)  # keeps equal bins equal, distinct distinct
        same = gaps == 0
        low = np.ones(len(bins), dtype=bool)
        np.logical_not(same, out=low[1:])  # the first note of each bin
        if np.logical_or.reduce(pitch[1:] < pitch[:-1], where=same):  # a bin not in pitch order
            order = np.lexsort((pitch, bins))
            b_sorted = bins[order]
            first = np.ones(len(order), dtype=bool)
            first[1:] = b_sorted[1:] != b_sorted[:-1]
            low = order[first]
    acc = np.bincount(bins, weights=dur)
    acc += BASS_ACCENT * np.bincount(bins[low], weights=dur[low], minlength=len(acc))
    return acc


def _squeeze_sorted(bins: np.ndarray, gaps: np.ndarray) -> np.ndarray:
    """``_squeeze_gaps`` for sorted ``bins`` whose successive differences are ``gaps``."""
    gaps = np.concatenate((bins[:1], gaps))
    excess = np.where(gaps > 2 * COMMON_BAR_BINS, (gaps - COMMON_BAR_BINS) // COMMON_BAR_BINS, 0)
    return bins - np.cumsum(excess) * COMMON_BAR_BINS


def _template(spec: MeterSpec) -> np.ndarray:
    n = int(round(spec.bar * BINS_PER_BEAT))
    pos = np.arange(n)
    t = np.zeros(n)
    for period in spec.levels:
        step = int(round(period * BINS_PER_BEAT))
        t += (pos % step == 0)
    return t


_TEMPLATES = {m.name: _template(m) for m in METERS}
#: Least common multiple of all candidate bar lengths, in bins (see ``_squeeze_gaps``).
COMMON_BAR_BINS = int(np.lcm.reduce([len(t) for t in _TEMPLATES.values()]))


def _rolled(t: np.ndarray) -> tuple[np.ndarray, float, np.ndarray]:
    """Centred template, its norm, and all its rotations (row p: downbeat at bin p), built
    once per candidate instead of once per file."""
    tc = t - t.mean()
    return tc, np.linalg.norm(tc), np.stack([np.roll(tc, p) for p in range(len(tc))])


_ROLLED = {name: _rolled(t) for name, t in _TEMPLATES.items()}


def _autocorr(acc: np.ndarray, lag: int) -> float:
    """Normalized autocorrelation of the accent function at ``lag`` bins."""
    return _autocorrs(acc, (lag,))[0]


def _autocorrs(acc: np.ndarray, lags: tuple[int, ...]) -> list[float]:
    """``_autocorr`` at several lags, centring the accent function once.

    The products are summed by numpy (pairwise summation), not by a BLAS dot product: BLAS
    switches to several threads for long vectors (above about 10,000 bins, i.e. long pieces),
    which costs milliseconds of thread start-up per call in a busy worker and makes the last
    bits depend on the machine's thread count."""
    n = len(acc)
    a = acc - np.add.reduce(acc) / n  # acc.mean(): the same sum and division
    denom = float(np.add.reduce(a * a))
    if not denom > 0:
        return [0.0] * len(lags)
    return [0.0 if lag >= n else float(np.add.reduce(a[:-lag] * a[lag:])) / denom
            for lag in lags]


def bar_fold(acc: np.ndarray) -> np.ndarray:
    """The accent function folded at the common bar (``COMMON_BAR_BINS``): the summed accent
    at each position of it. Every candidate bar and beat divides the common bar, so any of
    their folds is a sum of this one's rows (``fold.reshape(-1, n).sum(0)``)."""
    k = -(-len(acc) // COMMON_BAR_BINS) * COMMON_BAR_BINS
    buf = np.zeros(k)
    buf[:len(acc)] = acc
    return np.add.reduce(buf.reshape(-1, COMMON_BAR_BINS), axis=0)


def _fold_match(fold: np.ndarray, spec: MeterSpec) -> tuple[float, int]:
    """Best Pearson correlation of the bar-folded accent histogram (from ``bar_fold``) with
    the meter's metrical-hierarchy template (a position's weight is the number of levels with
    a beat there) over all phases; returns (correlation, phase in bins). Used for the downbeat
    phase."""
    tc, tc_norm, rolled = _ROLLED[spec.name]
    n = len(tc)
    folded = np.add.reduce(fold.reshape(-1, n), axis=0)
    f = folded - np.add.reduce(folded) / n  # folded.mean(): the same sum and division
    denom = math.sqrt(f.dot(f)) * tc_norm  # np.linalg.norm(f) computes sqrt(f.dot(f)) too
    if denom == 0:
        return 0.0, 0
    corr = rolled @ f / denom
    p = int(np.argmax(corr))
    return float(corr[p]), p


#: Lags (quarter notes) at which the accent autocorrelation is taken as a feature: the
#: subdivisions (16th, triplet 8th, 8th, dotted 8th), the beats (quarter, dotted quarter, half)
#: and the bars and bar pairs of every candidate.
FEATURE_LAGS = (0.25, 1 / 3, 0.5, 2 / 3, 0.75, 1.0, 1.5, 2.0, 3.0, 4.0, 4.5, 6.0, 8.0, 9.0, 12.0,
                16.0, 24.0, 32.0)
_LAG_BINS = tuple(int(round(lag * BINS_PER_BEAT)) for lag in FEATURE_LAGS)
#: (bar length in quarters, number of equal beats) whose downbeat contrast is a feature.
CONTRASTS = ((1.0, 2), (1.0, 3), (1.5, 3), (2.0, 2), (3.0, 3), (3.0, 2), (4.0, 2), (4.0, 4),
             (4.5, 3), (6.0, 2), (6.0, 3), (9.0, 2))
FEATURE_NAMES = (tuple(f"r({lag:.3g})" for lag in FEATURE_LAGS)
                 + ("log2 median ioi", "grid on", "grid 8th", "grid 1st triplet",
                    "grid 2nd triplet", "grid 1st 16th", "grid 3rd 16th")
                 + tuple(f"contrast {bar:g}/{k}" for bar, k in CONTRASTS))


def meter_features(acc: np.ndarray, r: list[float], median_ioi: float) -> np.ndarray:
    """The feature vector of the meter classifier (``FEATURE_NAMES``) from the accent
    function, its autocorrelations at ``FEATURE_LAGS`` and the median inter-onset interval.

    - autocorrelation at beat and bar lags (Brown 1993; Toiviainen & Eerola 2006, who
      classified duple and triple meters by discriminant functions over such values);
    - the median inter-onset interval in quarters (log2): the notated level of the beat;
    - the share of accent at each position of the quarter note, the strongest position taken
      as the beat (quantized files are not needed): on the beat, 8th, triplet 8ths, 16ths;
    - downbeat contrasts: folding the accent function at a bar of k equal beats, how much the
      strongest position exceeds the same position in the other beats (share of all accent).
      A 6/8 jig folded at 6 quarters shows equal halves (no 12/8 downbeat); a waltz folded at
      3 quarters shows one strong beat in three, not two dotted halves.
    """
    return _features(bar_fold(acc), r, median_ioi)


def _contrast_plan() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Index arrays that compute every downbeat contrast from one ``np.bincount``.

    Folding the common-bar fold at each bar length n and beat length n/k used by ``CONTRASTS``
    gives, for contrast (n, k) and position j of its bar, the accent at j (``h_n[j]``) and its
    sum over the k beats at that position (``h_{n/k}[j mod n/k]``); the contrast row is
    ``h_n[j] * k/(k-1) - h_{n/k}[j mod n/k] / (k-1)`` (the accent at j minus the mean of the
    other beats) and the contrast the largest of its rows. Returns (fold index, its length,
    row positions in the folds, beat-sum positions, the two coefficients per row, first row
    of each contrast)."""
    bars = [(int(round(bar * BINS_PER_BEAT)), beats) for bar, beats in CONTRASTS]
    lengths = sorted({n for n, _ in bars} | {n // k for n, k in bars})
    offset, total = {}, 0
    for n in lengths:
        offset[n] = total
        total += n
    pos = np.arange(COMMON_BAR_BINS)
    fold_index = np.concatenate([offset[n] + pos % n for n in lengths])
    at, col, ca, cb, starts = [], [], [], [], []
    for n, k in bars:
        starts.append(len(at))
        for j in range(n):
            at.append(offset[n] + j)
            col.append(offset[n // k] + j % (n // k))
            ca.append(k / (k - 1))
            cb.append(1 / (k - 1))
    return (fold_index, len(lengths), np.array(at), np.array(col),
            np.array([ca, cb]), np.array(starts))


_FOLD_INDEX, _N_FOLDS, _ROW_AT, _ROW_BEATS, _ROW_COEF, _CONTRAST_STARTS = _contrast_plan()


def _contrasts(fold: np.ndarray) -> np.ndarray:
    """The downbeat contrasts of a common-bar fold (not divided by its total), see
    ``_contrast_plan``. One ``bincount`` and a few vector operations: no BLAS call, whose
    threads would cost start-up time in a busy worker and make the last bits depend on the
    machine."""
    h = np.bincount(_FOLD_INDEX, weights=np.tile(fold, _N_FOLDS))
    rows = h[_ROW_AT] * _ROW_COEF[0] - h[_ROW_BEATS] * _ROW_COEF[1]
    return np.maximum.reduceat(rows, _CONTRAST_STARTS)


#: Positions within the quarter read as grid features, relative to the strongest position.
_GRID_POS = np.array([0, 6, 4, 8, 3, 9])


def _features(fold: np.ndarray, r: list[float], median_ioi: float) -> np.ndarray:
    """``meter_features`` from the common-bar fold."""
    total = float(np.add.reduce(fold))
    if not total > 0:
        return np.zeros(len(FEATURE_NAMES))
    q = np.add.reduce(fold.reshape(-1, BINS_PER_BEAT), axis=0)
    grid = q[(_GRID_POS + int(np.argmax(q))) % BINS_PER_BEAT] / total
    contrasts = _contrasts(fold) / total
    ioi = math.log2(min(max(median_ioi, 1 / 16), 8.0))
    return np.concatenate((r, (ioi,), grid, contrasts))


def _classify(x: np.ndarray) -> np.ndarray:
    """Class probabilities (``meter_weights.CLASSES``) of a feature vector: multinomial
    logistic regression with the shipped weights."""
    z = _W @ ((x - _MEAN) / _SCALE) + _B
    z = np.exp(z - z.max())
    return z / np.add.reduce(z)


_METER_BY_NAME = {m.name: m for m in METERS}
_W = np.array(_weights.W, dtype=np.float64)
_B = np.array(_weights.B, dtype=np.float64)
_MEAN = np.array(_weights.MEAN, dtype=np.float64)
_SCALE = np.array(_weights.SCALE, dtype=np.float64)
CLASSES: tuple[str, ...] = tuple(_weights.CLASSES)


def piece_features(piece: Piece) -> np.ndarray | None:
    """``meter_features`` of a piece; None when it has no pitched onset with accent."""
    got = _accents_lags_ioi(piece)
    return None if got is None else meter_features(*got)


def _accents_lags_ioi(piece: Piece) -> tuple[np.ndarray, list[float], float] | None:
    fast = _compiled_accents(piece)
    if fast is not None:
        acc, r, median = fast
        return (acc, r, median) if acc.any() else None
    start, end, pitch = _pitched_columns(piece.notes)
    tpb = float(piece.ticks_per_beat)
    steps = _start_steps(start)
    acc = _accent(start, end, pitch, tpb, steps)
    if len(acc) == 0 or not acc.any():
        return None
    return acc, _autocorrs(acc, _LAG_BINS), _median_ioi(start, steps, tpb)


#: Fewest distinct pitched onset positions (on the 1/12-quarter grid) the meter is estimated
#: from: with fewer there is too little rhythm to read (one chord gave 3/4 at probability 1.0).
#: The fewest at which the estimate's family beats always answering 4/4 on each held-out
#: music21 set (README, Meter estimation, Declared meters).
MIN_ONSETS = 12
#: The estimate of a piece with too few onsets: no meter, no confidence, overrules nothing.
NO_ESTIMATE = MeterEstimate(None, 0.0, 0.0, None, 0.0, ())


def estimate_meter(piece: Piece) -> MeterEstimate:
    """Estimate the meter from note onsets (see the module docstring for the method)."""
    got = _accents_lags_ioi(piece)
    if got is None or np.count_nonzero(got[0]) < MIN_ONSETS:
        return NO_ESTIMATE
    fold = bar_fold(got[0])
    p = _classify(_features(fold, got[1], got[2]))
    order = np.argsort(-p, kind="stable")
    best, second = CLASSES[int(order[0])], CLASSES[int(order[1])]
    _, phase = _fold_match(fold, _METER_BY_NAME[best])
    return MeterEstimate(best, float(p[order[0]]), float(p[order[0]] - p[order[1]]), second,
                         phase / BINS_PER_BEAT, tuple(float(v) for v in p))


def _median_ioi(start: np.ndarray, steps: np.ndarray | None, tpb: float) -> float:
    """Median interval between distinct pitched onsets ``start``, in quarters (0.0 with
    fewer than two onsets); ``steps`` from ``_start_steps``.

    The same value as ``np.median(np.diff(np.unique(start)) / tpb)``: for onsets in time order
    the gaps between distinct onsets are the non-zero steps; the median is the middle value,
    or the mean of the middle two (added, then halved, as ``np.mean`` does)."""
    gaps = steps[steps != 0] if steps is not None else np.diff(np.unique(start))
    m = len(gaps)
    if m == 0:
        return 0.0
    gaps.sort()
    if m % 2:
        return float(gaps[m // 2] / tpb)  # numpy scalars: int64 -> float64 division
    return float((gaps[m // 2 - 1] / tpb + gaps[m // 2] / tpb) / 2)
