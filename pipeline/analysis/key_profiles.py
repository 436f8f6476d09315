"""The vocabulary of key finding: the published key profiles, the names of keys and notes.

Profiles (Krumhansl & Kessler 1982; Temperley's Kostka-Payne profile, 2007; Aarden's Essen
profile, 2003; Bellman-Budge 2005; simple weights, as music21 tabulates them) are data;
``pipeline.analysis.key`` correlates with them and ``pipeline.analysis.modulation`` scores
segments with them.
"""
from __future__ import annotations

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

#: The name of the trained classifier among the ``profile`` choices.
LEARNED = "learned"
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
    """The canonical profile name for ``name`` (aliases allowed; ``learned`` is the trained
    classifier); ValueError if unknown."""
    key = PROFILE_ALIASES.get(name, name)
    if key not in PROFILES and key != LEARNED:
        raise ValueError(f"unknown key profile {name!r}; valid profiles: {LEARNED}, "
                         f"{', '.join(sorted(PROFILES))} (aliases: {', '.join(sorted(PROFILE_ALIASES))})")
    return key


def key_name(tonic_pc: int, mode: str) -> str:
    """Conventional name of a key, e.g. ``key_name(3, "major") == "Eb major"``."""
    names = MAJOR_TONIC_NAMES if mode == "major" else MINOR_TONIC_NAMES
    return f"{names[tonic_pc % 12]} {mode}"
