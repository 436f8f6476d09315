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

import bisect
import math
from dataclasses import dataclass

import numpy as np

from ..score import DRUM_CHANNEL, Piece, compiled_analyses

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


def _compiled_accents(piece: Piece) -> tuple[np.ndarray, list[float], bool] | None:
    """(accent function, ``_autocorrs`` at ``_LAG_BINS``, ``_alla_breve``) from the compiled
    module, for pitched onsets in time order; None where the numpy code must run (no compiled
    module, no pitched onsets, onsets out of order). The same values, bit for bit
    (tests/test_smf_accel.py)."""
    accel = compiled_analyses(piece.notes)
    if accel is None:
        return None
    got = accel.meter_accents(piece.notes, float(piece.ticks_per_beat), _LAG_BINS, COMMON_BAR_BINS)
    if got is None:
        return None
    acc, r, alla_breve = got
    return np.frombuffer(acc, dtype=np.float64).copy(), r, alla_breve


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


def _fold_match(acc: np.ndarray, spec: MeterSpec) -> tuple[float, int]:
    """Best Pearson correlation of the bar-folded accent histogram with the meter's
    metrical-hierarchy template (a position's weight is the number of levels with a beat
    there) over all phases; returns (correlation, phase in bins). Used for the downbeat phase."""
    tc, tc_norm, rolled = _ROLLED[spec.name]
    n = len(tc)
    folded = np.bincount(np.arange(len(acc)) % n, weights=acc, minlength=n)
    f = folded - np.add.reduce(folded) / n  # folded.mean(): the same sum and division
    denom = math.sqrt(f.dot(f)) * tc_norm  # np.linalg.norm(f) computes sqrt(f.dot(f)) too
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
_METER_BY_NAME = {m.name: m for m in METERS}
_LAG_BINS = tuple(int(round(lag * BINS_PER_BEAT)) for lag in LAGS)
#: Per candidate: (positions in ``LAGS`` of its strong lags, of its weak lags, prior).
_SCORE_PLAN = tuple((m.name, tuple(LAGS.index(x) for x in _METER_LAGS[m.name][0]),
                     tuple(LAGS.index(x) for x in _METER_LAGS[m.name][1]), m.prior)
                    for m in METERS)
#: numpy's float sum adds fewer than this many values one after the other, from 0.0 (pairwise
#: summation starts at blocks of 8), so a plain Python loop gives the same bits below it.
_SEQUENTIAL_SUM_BELOW = 8


def _mean(values: list[float]) -> float:
    """``float(np.mean(values))`` without its per-call overhead (the same sum and division):
    below 8 values numpy adds them in order starting from 0.0, which the loop repeats."""
    if len(values) >= _SEQUENTIAL_SUM_BELOW:
        return float(np.add.reduce(np.array(values, dtype=np.float64)) / len(values))
    total = 0.0
    for v in values:
        total += v
    return total / len(values)


def estimate_meter(piece: Piece) -> MeterEstimate:
    """Estimate the meter from note onsets (see the module docstring for the method)."""
    fast = _compiled_accents(piece)
    if fast is not None:
        acc, r, alla_breve = fast
        if not acc.any():
            return MeterEstimate("4/4", 0.0, 0.0, "3/4", 0.0)
    else:
        start, end, pitch = _pitched_columns(piece.notes)
        tpb = float(piece.ticks_per_beat)
        steps = _start_steps(start)
        acc = _accent(start, end, pitch, tpb, steps)
        if len(acc) == 0 or not acc.any():
            return MeterEstimate("4/4", 0.0, 0.0, "3/4", 0.0)
        r = _autocorrs(acc, _LAG_BINS)
        alla_breve = _alla_breve(start, steps, tpb)
    scores: dict[str, tuple[float, int]] = {}
    for name, strong, weak, prior in _SCORE_PLAN:
        # _mean of the strong and of the weak lags, its loop written out (fewer than 8 each)
        if len(strong) < _SEQUENTIAL_SUM_BELOW:
            total = 0.0
            for i in strong:
                total += r[i]
            score = total / len(strong)
        else:
            score = _mean([r[i] for i in strong])
        if weak:
            if len(weak) < _SEQUENTIAL_SUM_BELOW:
                total = 0.0
                for i in weak:
                    total += r[i]
                score -= WEAK_WEIGHT * (total / len(weak))
            else:
                score -= WEAK_WEIGHT * _mean([r[i] for i in weak])
        scores[name] = (score + prior, 0)
    _resolve_alla_breve(alla_breve, scores)
    # best and runner-up of a stable sort by descending score: the first maximum, then the
    # first maximum of the others (ties keep the order of METERS), as max() picks them
    best = second = None
    for k, (v, _) in scores.items():
        if best is None or v > scores[best][0]:
            best = k
    for k, (v, _) in scores.items():
        if k != best and (second is None or v > scores[second][0]):
            second = k
    _, phase = _fold_match(acc, _METER_BY_NAME[best])
    return MeterEstimate(best, scores[best][0], scores[best][0] - scores[second][0], second,
                         phase / BINS_PER_BEAT)


def _alla_breve(start: np.ndarray, steps: np.ndarray | None, tpb: float) -> bool:
    """Whether the median inter-onset interval of the pitched onsets ``start`` is at least
    ``ALLA_BREVE_MIN_IOI`` quarters (``steps`` from ``_start_steps``).

    The same value as ``np.median(np.diff(np.unique(start)) / tpb)``: for onsets in time order
    the gaps between distinct onsets are the non-zero steps; the median is the middle value,
    or the mean of the middle two (added, then halved, as ``np.mean`` does)."""
    gaps = steps[steps != 0] if steps is not None else np.diff(np.unique(start))
    m = len(gaps)
    if m == 0:
        return False
    gaps.sort()
    if m % 2:
        median = gaps[m // 2] / tpb  # numpy scalars: the array's int64 -> float64 division
    else:
        median = (gaps[m // 2 - 1] / tpb + gaps[m // 2] / tpb) / 2
    return bool(median >= ALLA_BREVE_MIN_IOI)


def _resolve_alla_breve(alla_breve: bool, scores: dict[str, tuple[float, int]]) -> None:
    """4/4 and 2/2 share a bar: keep one of them, by the prevailing note motion."""
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
    seconds = _seconds_at(end, tempos, piece.ticks_per_beat)
    if seconds is None:
        seconds = float(piece.ticks_to_seconds(np.array([end]))[0])
    return (end / piece.ticks_per_beat) / (seconds / 60.0) if seconds > 0 else 0.0


#: Tempo maps up to this many events are walked in plain Python by ``_seconds_at``.
_SCALAR_TEMPO_EVENTS = 64


def _seconds_at(tick: int, tempos: np.ndarray, ticks_per_beat: int) -> float | None:
    """``score.ticks_to_seconds`` at one tick, for a short tempo map in tick order: the same
    operations in the same order on Python floats (IEEE doubles, as numpy's), without a dozen
    numpy calls on arrays of a few elements. None for a long or unsorted map."""
    if not 0 < len(tempos) <= _SCALAR_TEMPO_EVENTS or not ticks_per_beat > 0:
        return None
    ticks = tempos["tick"].tolist()
    if any(b < a for a, b in zip(ticks, ticks[1:])):
        return None
    us = [float(u) for u in tempos["us_per_beat"].tolist()]
    scale = 1e6 * ticks_per_beat
    i = min(max(bisect.bisect_right(ticks, tick) - 1, 0), len(ticks) - 1)
    # start_sec[i]: 0.0, then the running sum of the segment seconds (np.cumsum's order)
    start_sec = 0.0
    if i > 0:
        start_sec = float(ticks[1] - ticks[0]) * us[0] / scale
        for k in range(1, i):
            start_sec = start_sec + float(ticks[k + 1] - ticks[k]) * us[k] / scale
    return start_sec + float(tick - ticks[i]) * us[i] / scale


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
    key = (int(piece.ticks_per_beat), tuple(divisions), float(tolerance_beats))
    table = _grid_table(*key)
    accel = compiled_analyses(piece.notes) if table is not None else None
    if accel is not None:  # the same count (tests/test_smf_accel.py)
        flags = _GRID_BYTES.get(key)
        if flags is None:
            flags = table.tobytes()
            if len(_GRID_BYTES) < 256:
                _GRID_BYTES[key] = flags
        got = accel.grid_count(piece.notes, flags)
        if got is not None:  # a numpy float, as count_nonzero(...) / len gives
            return np.float64(got / len(piece.notes))
    start = piece.notes["start"]
    if table is not None and 0 <= start.min() and start.max() < 2 ** 53:
        return np.count_nonzero(table[start % len(table)]) / len(start)
    return _grid_fraction_float(start.astype(np.float64), float(piece.ticks_per_beat),
                                divisions, tolerance_beats)


#: On-grid flag per tick position within a beat, by (ticks per beat, divisions, tolerance).
_GRID_TABLES: dict[tuple[int, tuple[int, ...], float], np.ndarray] = {}
#: The same flags as bytes, for the compiled count.
_GRID_BYTES: dict[tuple[int, tuple[int, ...], float], bytes] = {}


def _grid_table(tpb: int, divisions: tuple[int, ...], tolerance_beats: float) -> np.ndarray | None:
    """Whether each tick position ``0..tpb-1`` within a beat is on the grid, when every grid
    step is a whole number of ticks (then an onset's flag depends only on ``start % tpb``, and
    the float remainders ``_grid_fraction_float`` takes of whole-number floats are exact, so
    the table gives the same flags). None when a step is fractional."""
    key = (tpb, divisions, tolerance_beats)
    table = _GRID_TABLES.get(key)
    if table is None:
        if tpb <= 0 or any(d <= 0 or tpb % d for d in divisions):
            return None
        table = _grid_flags(np.arange(tpb, dtype=np.float64), float(tpb), divisions,
                            tolerance_beats)
        if len(_GRID_TABLES) < 256:
            _GRID_TABLES[key] = table
    return table


def _grid_flags(start: np.ndarray, tpb: float, divisions: tuple[int, ...],
                tolerance_beats: float) -> np.ndarray:
    tol = tolerance_beats * tpb
    on = np.zeros(len(start), dtype=bool)
    for d in divisions:
        step = tpb / d
        r = np.mod(start, step)
        on |= np.minimum(r, step - r) <= tol + 1e-9
    return on


def _grid_fraction_float(start: np.ndarray, tpb: float, divisions: tuple[int, ...],
                         tolerance_beats: float) -> float:
    """``grid_fraction`` on float onsets (any resolution)."""
    return float(_grid_flags(start, tpb, divisions, tolerance_beats).mean())
