"""Meter: the declared time signature, an estimate from note onsets, tempo and quantization.

Meter estimate (autocorrelation of an accent function, after Brown 1993, "Determination of the
meter of musical scores by autocorrelation", JASA 94(4), and Toiviainen & Eerola 2006,
"Autocorrelation in meter induction: the role of accent structure", JASA 119(2)):

1. Onsets of pitched notes go on a grid of 1/12 quarter note (holds 16ths and 8th-note
   triplets exactly). Each onset's accent is the summed duration of its notes, capped at a
   half note (a durational accent, Parncutt 1994, Music Perception 11(4)), plus a bonus for
   the lowest note of the onset (bass).
2. The normalized autocorrelation r(lag) of that function is taken at beat-level lags of
   0.5, 1, 1.5, 2, 3, 4, 4.5 and 6 quarter notes (``LAGS``).
3. Each candidate meter predicts which lags are strong: its metrical levels (bar, beat,
   subdivision; ``MeterSpec.levels``) and which are weak: the other lags that are not a whole
   number of its bars. Its score is mean r(strong) - ``WEAK_WEIGHT`` * mean r(weak), plus a
   small prior (``MeterSpec.prior``; common practice: 4/4, 3/4, 6/8 are the usual notated
   meters). Counting the weak lags is what stops the long bars (3/2, 12/8, whose bar of six
   quarters is a multiple of both duple and triple bars) from winning everywhere.

4/4 and 2/2 predict the same lags; 2/2 is chosen only when the median inter-onset interval
is at least a quarter note (``ALLA_BREVE_MIN_IOI``), i.e. when the music moves in quarters and
halves, the notational habit for alla breve. The constants were set on Bach chorales and on
Aird's Airs books 1-3; the README figures are measured on held-out folk tunes as well.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..score import DRUM_CHANNEL, Piece

#: Grid resolution of the onset function, in bins per quarter note.
BINS_PER_BEAT = 12


@dataclass(frozen=True)
class MeterSpec:
    """A candidate meter: bar length and metrical levels in quarter-note beats, and a prior."""

    name: str
    family: str           # duple | triple | compound
    levels: tuple[float, ...]  # periods from bar down to the smallest subdivision, in quarters
    prior: float

    @property
    def bar(self) -> float:
        return self.levels[0]


#: The candidates (data). ``family``: simple duple/quadruple -> duple; simple triple -> triple;
#: compound (beats divided in three) -> compound (common practice classification).
METERS: tuple[MeterSpec, ...] = (
    MeterSpec("2/4", "duple", (2, 1, 0.5, 0.25), 0.02),
    MeterSpec("4/4", "duple", (4, 2, 1, 0.5, 0.25), 0.04),
    MeterSpec("2/2", "duple", (4, 2, 1, 0.5), 0.0),
    MeterSpec("3/4", "triple", (3, 1, 0.5, 0.25), 0.03),
    MeterSpec("3/8", "triple", (1.5, 0.5, 0.25), 0.0),
    MeterSpec("3/2", "triple", (6, 2, 1, 0.5), 0.0),
    MeterSpec("6/8", "compound", (3, 1.5, 0.5, 0.25), 0.03),
    MeterSpec("9/8", "compound", (4.5, 1.5, 0.5, 0.25), 0.0),
    MeterSpec("12/8", "compound", (6, 3, 1.5, 0.5, 0.25), 0.0),
)
METER_FAMILY = {m.name: m.family for m in METERS}
#: Lags (quarter notes) at which the accent autocorrelation is compared.
LAGS = (0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 4.5, 6.0)
#: Smallest metrical level counted among a meter's strong lags (16ths are shared by all).
MIN_LEVEL = 0.5
#: Weight of the mean autocorrelation at the lags a meter predicts to be weak.
WEAK_WEIGHT = 0.5
#: Accent of one note is its duration in beats, capped here (a whole note is no stronger).
ACCENT_CAP_BEATS = 2.0
#: Extra accent (multiple of its duration) for the lowest note of each onset.
BASS_ACCENT = 0.5
#: Median inter-onset interval (quarters) from which a 4-quarter bar is read as 2/2.
ALLA_BREVE_MIN_IOI = 1.0

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
    ts = ts[np.argsort(ts["tick"], kind="stable")]
    end = max(int(piece.end_tick), int(ts["tick"].max()) + 1,
              int(piece.notes["end"].max()) if len(piece.notes) else 0)
    spans = np.diff(np.append(ts["tick"], end))
    i = int(np.argmax(spans))
    return f"{int(ts['numerator'][i])}/{int(ts['denominator'][i])}"


@dataclass(frozen=True)
class MeterEstimate:
    """An estimated meter with its score and the margin over the runner-up candidate."""

    meter: str
    score: float
    confidence: float
    runner_up: str
    phase_beats: float  # offset of the first downbeat from tick 0, in quarter-note beats


def _squeeze_gaps(bins: np.ndarray) -> np.ndarray:
    """Shorten silent stretches longer than two common bars by whole common bars.

    The common bar is the least common multiple of every candidate bar length, so each onset
    keeps its position in every candidate bar and the lags the method looks at (up to two bars)
    see the same onsets; what is removed is silence. This bounds the accent function by the
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


def accent_function(piece: Piece) -> np.ndarray:
    """Accent strength per grid bin (1/12 quarter) of the pitched notes' onsets."""
    notes = piece.notes
    notes = notes[notes["channel"] != DRUM_CHANNEL]
    if len(notes) == 0:
        return np.zeros(0)
    tpb = float(piece.ticks_per_beat)
    bins = _squeeze_gaps(np.rint(notes["start"] / tpb * BINS_PER_BEAT).astype(np.int64))
    dur = np.minimum((notes["end"] - notes["start"]) / tpb, ACCENT_CAP_BEATS)
    acc = np.bincount(bins, weights=dur)
    # bass accent: the lowest note of each onset bin
    order = np.lexsort((notes["pitch"], bins))
    b_sorted = bins[order]
    first = np.ones(len(order), dtype=bool)
    first[1:] = b_sorted[1:] != b_sorted[:-1]
    acc += BASS_ACCENT * np.bincount(bins[order[first]], weights=dur[order[first]],
                                     minlength=len(acc))
    return acc


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
    a = acc - acc.mean()
    denom = float(np.add.reduce(a * a))
    return [0.0 if lag >= len(acc) else
            (float(np.add.reduce(a[:-lag] * a[lag:])) / denom if denom > 0 else 0.0)
            for lag in lags]


def _fold_match(acc: np.ndarray, spec: MeterSpec) -> tuple[float, int]:
    """Best Pearson correlation of the bar-folded accent histogram with the meter's
    metrical-hierarchy template (a position's weight is the number of levels with a beat
    there) over all phases; returns (correlation, phase in bins). Used for the downbeat phase."""
    tc, tc_norm, rolled = _ROLLED[spec.name]
    n = len(tc)
    folded = np.bincount(np.arange(len(acc)) % n, weights=acc, minlength=n)
    f = folded - folded.mean()
    denom = np.linalg.norm(f) * tc_norm
    if denom == 0:
        return 0.0, 0
    corr = rolled @ f / denom
    p = int(np.argmax(corr))
    return float(corr[p]), p


def meter_lags(spec: MeterSpec) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """(strong lags, weak lags) that a candidate meter predicts, in quarter notes."""
    strong = tuple(lv for lv in spec.levels if lv >= MIN_LEVEL)
    weak = tuple(lag for lag in LAGS if lag not in spec.levels
                 and abs(lag / spec.bar - round(lag / spec.bar)) > 1e-9)
    return strong, weak


_METER_LAGS = {m.name: meter_lags(m) for m in METERS}
_LAG_BINS = tuple(int(round(lag * BINS_PER_BEAT)) for lag in LAGS)


def _mean(values: list[float]) -> float:
    """``float(np.mean(values))`` without its per-call overhead (the same sum and division)."""
    return float(np.add.reduce(np.array(values, dtype=np.float64)) / len(values))


def estimate_meter(piece: Piece) -> MeterEstimate:
    """Estimate the meter from note onsets (see the module docstring for the method)."""
    acc = accent_function(piece)
    if len(acc) == 0 or not acc.any():
        return MeterEstimate("4/4", 0.0, 0.0, "3/4", 0.0)
    r = dict(zip(LAGS, _autocorrs(acc, _LAG_BINS)))
    scores: dict[str, tuple[float, int]] = {}
    for spec in METERS:
        strong, weak = _METER_LAGS[spec.name]
        score = _mean([r[lag] for lag in strong])
        if weak:
            score -= WEAK_WEIGHT * _mean([r[lag] for lag in weak])
        scores[spec.name] = (score + spec.prior, 0)
    _resolve_alla_breve(piece, scores)
    ranked = sorted(scores, key=lambda k: -scores[k][0])
    best, second = ranked[0], ranked[1]
    _, phase = _fold_match(acc, next(m for m in METERS if m.name == best))
    return MeterEstimate(best, scores[best][0], scores[best][0] - scores[second][0], second,
                         phase / BINS_PER_BEAT)


def _resolve_alla_breve(piece: Piece, scores: dict[str, tuple[float, int]]) -> None:
    """4/4 and 2/2 share a bar: keep one of them, by the prevailing note motion."""
    onsets = np.unique(piece.pitched["start"])
    ioi = np.diff(onsets) / float(piece.ticks_per_beat)
    alla_breve = len(ioi) > 0 and float(np.median(ioi)) >= ALLA_BREVE_MIN_IOI
    best = max(scores["4/4"][0], scores["2/2"][0])
    keep, drop = ("2/2", "4/4") if alla_breve else ("4/4", "2/2")
    scores[keep] = (best, scores[keep][1])
    scores[drop] = (-np.inf, 0)


def tempo_bpm(piece: Piece) -> float:
    """Average tempo in quarter-note beats per minute over the piece's span (tick 0 to the
    last note end): total beats divided by total minutes, i.e. the time-weighted harmonic
    mean of the tempo map. 120.0 for an empty piece with the default tempo."""
    end = int(piece.notes["end"].max()) if len(piece.notes) else 0
    tempos = piece.tempos
    if end <= 0:
        us = float(tempos["us_per_beat"][0]) if len(tempos) else 500_000.0
        return 60e6 / us
    seconds = float(piece.ticks_to_seconds(np.array([end]))[0])
    return (end / piece.ticks_per_beat) / (seconds / 60.0) if seconds > 0 else 0.0


#: Metrical grid for ``grid_fraction``: 16th notes and 8th-note triplets (divisions of a quarter).
GRID_DIVISIONS = (4, 3)
#: Default tolerance, as a fraction of a quarter note (1/48 beat: 10 ticks at 480 ticks per
#: beat, about 10 ms at 120 BPM).
GRID_TOLERANCE_BEATS = 1.0 / 48.0


def grid_fraction(piece: Piece, divisions: tuple[int, ...] = GRID_DIVISIONS,
                  tolerance_beats: float = GRID_TOLERANCE_BEATS) -> float:
    """Fraction of note onsets (all channels) within ``tolerance_beats`` of the metrical grid
    (multiples of a quarter divided by any of ``divisions``). 1.0 means fully quantized;
    randomly placed onsets give roughly the grid's coverage (about 0.27 with the defaults).
    An empty piece gives 1.0."""
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
