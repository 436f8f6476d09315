"""Key detection: the Krumhansl-Schmuckler key-profile method, vectorized with numpy.

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

Tonic spelling rule: the spelling whose key signature has the fewest accidentals; the tie at
six accidentals goes to F# major and Eb minor (music21's ``KeyWeightKeyAnalysis`` makes the same
choice: "favor F#", "favor eb minor").
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..score import DRUM_CHANNEL, Piece, compiled_analyses

# ---------------------------------------------------------------------------------------------
# Profile tables: name -> (major[12], minor[12]), index 0 = tonic, ascending semitones.
PROFILES: dict[str, tuple[tuple[float, ...], tuple[float, ...]]] = {
    # Krumhansl & Kessler (1982) probe-tone ratings, as tabulated in Krumhansl 1990,
    # Cognitive Foundations of Musical Pitch, Table 2.1 (p. 30).
    "krumhansl_kessler": (
        (6.35, 2.23, 3.48, 2.33, 4.38, 4.09, 2.52, 5.19, 2.39, 3.66, 2.29, 2.88),
        (6.33, 2.68, 3.52, 5.38, 2.60, 3.53, 2.54, 4.75, 3.98, 2.69, 3.34, 3.17),
    ),
    # Temperley 2007, Music and Probability, ch. 4: pitch-class proportions in the
    # Kostka-Payne harmony textbook excerpts ("Temperley-Kostka-Payne").
    "temperley_kostka_payne": (
        (0.748, 0.060, 0.488, 0.082, 0.670, 0.460, 0.096, 0.715, 0.104, 0.366, 0.057, 0.400),
        (0.712, 0.084, 0.474, 0.618, 0.049, 0.460, 0.105, 0.747, 0.404, 0.067, 0.133, 0.330),
    ),
    # Aarden 2003, Dynamic Melodic Expectancy (PhD dissertation, Ohio State University):
    # pitch-class frequencies in the Essen folksong collection ("Aarden-Essen").
    "aarden_essen": (
        (17.7661, 0.145624, 14.9265, 0.160186, 19.8049, 11.3587,
         0.291248, 22.062, 0.145624, 8.15494, 0.232998, 4.95122),
        (18.2648, 0.737619, 14.0499, 16.8599, 0.702494, 14.4362,
         0.702494, 18.6161, 4.56621, 1.93186, 7.37619, 1.75623),
    ),
    # Bellman 2005, "About the determination of key of a musical excerpt" (CMMR 2005,
    # LNCS 3902): chord-based profiles ("Bellman-Budge").
    "bellman_budge": (
        (16.80, 0.86, 12.95, 1.41, 13.49, 11.93, 1.25, 20.28, 1.80, 8.04, 0.62, 10.57),
        (18.16, 0.69, 12.99, 13.34, 1.07, 11.15, 1.38, 21.07, 7.49, 1.53, 0.92, 10.21),
    ),
    # Sapp 2011, Computational Methods for the Analysis of Musical Structure (PhD
    # dissertation, Stanford), "simple" weights: tonic/dominant 2, other scale steps 1.
    "simple": (
        (2, 0, 1, 0, 1, 1, 0, 2, 0, 1, 0, 1),
        (2, 0, 1, 1, 0, 1, 0, 2, 1, 0, 0.5, 0.5),
    ),
}
PROFILE_ALIASES = {"kk": "krumhansl_kessler", "tkp": "temperley_kostka_payne",
                   "aarden": "aarden_essen", "bb": "bellman_budge"}

#: The default profile and weighting, chosen by measurement: the best exact accuracy on a
#: development subset of 100 Bach chorales (``chorales(100, offset=2)``), disjoint from the
#: evaluation subset the README figures and the tests use (``python -m
#: pipeline.analysis.evaluate_key``). The final-bars weight helps most; note that the ground
#: truth also reads the final bass note, so part of that gain is the evaluation's own cue.
DEFAULT_PROFILE = "simple"
DEFAULT_BASS_WEIGHT = 1.0
DEFAULT_FINAL_WEIGHT = 2.0
#: Length of the "final" window in quarter-note beats (about the last bar in 4/4).
FINAL_BEATS = 4.0

PITCH_NAMES_SHARP = ("C", "C#", "D", "D#", "E", "F", "F#", "G", "G#", "A", "A#", "B")
PITCH_NAMES_FLAT = ("C", "Db", "D", "Eb", "E", "F", "Gb", "G", "Ab", "A", "Bb", "B")
#: Conventional tonic spelling per pitch class (fewest key-signature accidentals; ties at six
#: accidentals go to F# major and Eb minor).
MAJOR_TONIC_NAMES = ("C", "Db", "D", "Eb", "E", "F", "F#", "G", "Ab", "A", "Bb", "B")
MINOR_TONIC_NAMES = ("C", "C#", "D", "Eb", "E", "F", "F#", "G", "G#", "A", "Bb", "B")
#: Key-signature spelling by number of sharps (-7..7), as a key-signature event declares it.
MAJOR_BY_SHARPS = {-7: "Cb", -6: "Gb", -5: "Db", -4: "Ab", -3: "Eb", -2: "Bb", -1: "F", 0: "C",
                   1: "G", 2: "D", 3: "A", 4: "E", 5: "B", 6: "F#", 7: "C#"}
MINOR_BY_SHARPS = {-7: "Ab", -6: "Eb", -5: "Bb", -4: "F", -3: "C", -2: "G", -1: "D", 0: "A",
                   1: "E", 2: "B", 3: "F#", 4: "C#", 5: "G#", 6: "D#", 7: "A#"}
MODES = ("major", "minor")

_NOTE_PC = {"C": 0, "D": 2, "E": 4, "F": 5, "G": 7, "A": 9, "B": 11}


def note_name_to_pc(name: str) -> int:
    """Pitch class of a note name such as ``C``, ``F#``, ``Bb``, ``Eb``, ``Cb`` or ``E#``.

    Raises ValueError for anything else (the message lists the accepted form).
    """
    text = str(name).strip()
    if not text or text[0].upper() not in _NOTE_PC:
        raise ValueError(f"{name!r} is not a note name: use a letter A-G followed by optional "
                         f"'#' or 'b' accidentals, e.g. one of {', '.join(VALID_NOTE_NAMES)}")
    pc = _NOTE_PC[text[0].upper()]
    for ch in text[1:]:
        if ch == "#":
            pc += 1
        elif ch in "b-":
            pc -= 1
        else:
            raise ValueError(f"{name!r} is not a note name: use a letter A-G followed by "
                             f"optional '#' or 'b' accidentals, e.g. one of "
                             f"{', '.join(VALID_NOTE_NAMES)}")
    return pc % 12


VALID_NOTE_NAMES = tuple(dict.fromkeys(PITCH_NAMES_SHARP + PITCH_NAMES_FLAT))


def resolve_profile(name: str) -> str:
    """The canonical profile name for ``name`` (aliases allowed); ValueError if unknown."""
    key = PROFILE_ALIASES.get(name, name)
    if key not in PROFILES:
        raise ValueError(f"unknown key profile {name!r}; valid profiles: "
                         f"{', '.join(sorted(PROFILES))} (aliases: {', '.join(sorted(PROFILE_ALIASES))})")
    return key


def key_name(tonic_pc: int, mode: str) -> str:
    """Conventional name of a key, e.g. ``key_name(3, "major") == "Eb major"``."""
    names = MAJOR_TONIC_NAMES if mode == "major" else MINOR_TONIC_NAMES
    return f"{names[tonic_pc % 12]} {mode}"


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

    ``confidence`` is the margin between the best and the runner-up correlation
    (``r_best - r_second``, 0..2; 0 means a tie, above about 0.1 is a clear decision).
    ``scores`` holds the 24 correlations: major keys on C..B, then minor keys on C..B.
    """

    tonic: str
    tonic_pc: int
    mode: str
    confidence: float
    runner_up: str
    correlation: float
    profile: str
    scores: tuple[float, ...] = ()

    @property
    def name(self) -> str:
        return f"{self.tonic} {self.mode}"


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

    With ``bass_weight=0, final_weight=0`` this is the plain Krumhansl-Schmuckler method.
    """
    return estimate_key_from_histogram(
        pitch_class_histogram(piece, bass_weight=bass_weight, final_weight=final_weight), profile)


def declared_key(piece: Piece) -> str | None:
    """The key the file declares in its first key-signature event, e.g. ``"Eb major"``.

    None when the file has no key-signature event. Note that a sequencer default (C major,
    zero sharps) is reported as declared: only comparison with the estimate can tell.
    """
    ks = piece.key_signatures
    if len(ks) == 0:
        return None
    ticks = ks["tick"].tolist()
    first = ks[ticks.index(min(ticks))]  # the first earliest, like argmin
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
