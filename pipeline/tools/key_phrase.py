"""Phrase-level key evidence, scored beside the shipped key classifier (issue 21, sixth round).

    python -m pipeline.tools.key_phrase --pop ../shared/data/pop909-dev [--only NAME ...]

None of the shipped features (``key.FEATURES``) reads a phrase: they use the whole piece, the
first or last onset, or the last note. In tonal melodies phrases end on stable degrees (tonic,
third, fifth) and a minor piece's phrases close on its own tonic, with the bass and the chord
under the phrase end marking the key too (common practice: the cadence closes the phrase).
Here the melody is the shipped melody voice (``key.melody_voice``) reduced to its highest note
per onset (the line), and a line note ends a phrase when

- it is followed by a rest of at least ``rest`` beats before the line's next onset, or
- (``long`` set) it lasts at least ``long`` beats, or
- it is the line's last note.

The distributions (each 12 bins, normalized to sum 1 like ``key.key_features``' rows):

- ``phrase_end``: the pitch classes of the phrase-end notes, counted;
- ``phrase_end_dur``: the same, each weighted by its duration in beats;
- ``phrase_end_bass``: the lowest pitch class sounding (any voice) at each phrase end's onset;
- ``phrase_end_major`` / ``phrase_end_minor``: per root, how many phrase ends have that major
  / minor triad sounding within the beat from their onset (all three pitch classes);
- ``phrase_start``: the pitch classes of the line notes that begin a phrase (the first note
  and each note after a phrase end), counted.

Each variant appends some of these, read from the candidate tonic (``key._ROTATE``), as extra
per-key columns (a major and a minor block, like ``class_features``) and is scored by
``key_variants.cross_validate`` (5-fold and leave-one-genre-out) with the shipped linear
model; ``--only minor-errors`` prints where the phrase evidence sits in pop's minor songs
called their relative major, ``--fold-seeds`` also scores each variant under other fold
assignments (DEVELOPERS.md, Measurement history, Key detection, sixth round). These are experiments: nothing here is on the run path.
"""
from __future__ import annotations

import copy
import time

import numpy as np

from . import key_variants
from ..analysis import key as keymod
from ..midi.piece import DRUM_CHANNEL, Piece

PHRASE_FEATURES = ("phrase_end", "phrase_end_dur", "phrase_end_bass", "phrase_end_major",
                   "phrase_end_minor", "phrase_start")
#: The phrase-end rules tried: (rest in beats, long note in beats or None).
RULES = {"rest1": (1.0, None), "rest1-long2": (1.0, 2.0), "rest2": (2.0, None)}


def melody_line(piece: Piece) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(start, end, pitch) of the melody line: the highest note of each onset of the melody
    voice (``key.melody_voice``), in time order."""
    notes = piece.notes[piece.notes["channel"] != DRUM_CHANNEL]
    if len(notes) == 0:
        return (np.zeros(0, np.int64),) * 3
    pitch = notes["pitch"].astype(np.int64)
    voice = notes["track"].astype(np.int64) * 16 + notes["channel"]
    mel = notes[keymod.melody_voice(voice, pitch)]
    order = np.lexsort((-mel["pitch"].astype(np.int64), mel["start"]))
    mel = mel[order]
    first = np.ones(len(mel), dtype=bool)
    first[1:] = mel["start"][1:] != mel["start"][:-1]
    mel = mel[first]
    return (mel["start"].astype(np.int64), mel["end"].astype(np.int64),
            mel["pitch"].astype(np.int64))


def phrase_end_mask(start: np.ndarray, end: np.ndarray, tpb: int, rest: float = 1.0,
                    long: float | None = None) -> np.ndarray:
    """Mask of the line notes that end a phrase (see the module docstring)."""
    n = len(start)
    mask = np.zeros(n, dtype=bool)
    if n == 0:
        return mask
    mask[:-1] = start[1:] - end[:-1] >= rest * tpb
    if long is not None:
        mask |= end - start >= long * tpb
    mask[-1] = True
    return mask


def phrase_features(piece: Piece, rest: float = 1.0, long: float | None = None) -> np.ndarray:
    """(len(PHRASE_FEATURES), 12) phrase distributions of a piece, each row summing to 1 (or
    all zero when it has no such event)."""
    out = np.zeros((len(PHRASE_FEATURES), 12))
    start, end, pitch = melody_line(piece)
    if len(start) == 0:
        return out
    tpb = piece.ticks_per_beat
    ends = phrase_end_mask(start, end, tpb, rest, long)
    pc = pitch % 12
    out[0] = np.bincount(pc[ends], minlength=12)
    out[1] = np.bincount(pc[ends], weights=(end - start)[ends] / tpb, minlength=12)
    begins = np.zeros(len(start), dtype=bool)
    begins[0] = True
    begins[1:] = ends[:-1]
    out[5] = np.bincount(pc[begins], minlength=12)
    notes = piece.notes[piece.notes["channel"] != DRUM_CHANNEL]
    ns, ne = notes["start"].astype(np.int64), notes["end"].astype(np.int64)
    npitch = notes["pitch"].astype(np.int64)
    t = start[ends][:, None]
    sounding = (ns[None, :] <= t) & (ne[None, :] > t)  # (ends, notes); the end note itself sounds
    low = np.where(sounding, npitch[None, :], 1 << 30).min(axis=1)
    out[2] = np.bincount(low % 12, minlength=12)
    in_beat = (ns[None, :] < t + tpb) & (ne[None, :] > t)
    sets = ((in_beat[:, :, None] & ((npitch % 12)[None, :, None] == np.arange(12)[None, None, :]))
            .any(axis=1).astype(np.int64) @ keymod._BITS)
    out[3:5] = keymod._TRIADS[sets].sum(axis=0).reshape(2, 12)
    return keymod._normalized(out)


def rotated_blocks(extra: np.ndarray) -> np.ndarray:
    """(N, 24, 2 * m * 12) per-key columns of extra distributions (N, m, 12): read from each
    candidate tonic, in a major block (major rows) and a minor block (minor rows)."""
    n, m = extra.shape[:2]
    rot = extra[:, :, keymod._ROTATE].transpose(0, 2, 1, 3).reshape(n, 12, m * 12)
    out = np.zeros((n, 24, 2 * m * 12))
    out[:, :12, :m * 12] = rot
    out[:, 12:, m * 12:] = rot
    return out


class PhraseData(key_variants.Data):
    """``key_variants.Data`` plus each rule's phrase distributions (``phrase[rule][set]``:
    (N, len(PHRASE_FEATURES), 12)), from the same decoded pieces."""

    def __init__(self, pop: str | None, folk: int) -> None:
        self.phrase = {rule: {} for rule in RULES}
        super().__init__(pop, folk)

    def add_features(self, name: str, pieces: list) -> None:
        for rule, (rest, long) in RULES.items():
            self.phrase[rule][name] = np.stack([phrase_features(p, rest, long) for p in pieces])

    def with_features(self, rule: str, names: tuple[str, ...]) -> key_variants.Data:
        """A copy whose class rows carry the named phrase distributions of ``rule`` too."""
        idx = [PHRASE_FEATURES.index(f) for f in names]
        out = copy.copy(self)
        out.phi = {s: np.concatenate([phi, rotated_blocks(self.phrase[rule][s][:, idx])], axis=2)
                   for s, phi in self.phi.items()}
        return out


def shuffled(data: key_variants.Data, seed: int) -> key_variants.Data:
    """A copy whose folk, classical and pop pieces are in a random order (``seed``), so that
    ``cross_validate``'s folds (piece i in fold i % 5) are another assignment; the
    leave-one-genre-out figures stay the same."""
    out = copy.copy(data)
    out.raw, out.phi, out.y = dict(data.raw), dict(data.phi), dict(data.y)
    rng = np.random.default_rng(seed)
    for s in data.sets:
        if s != "chorales":
            order = rng.permutation(len(data.y[s]))
            out.raw[s], out.phi[s], out.y[s] = data.raw[s][order], data.phi[s][order], data.y[s][order]
    return out


#: The variants: (rule, phrase distributions appended).
VARIANTS = {
    "linear": None,
    "end-rest1": ("rest1", ("phrase_end",)),
    "end-rest1-long2": ("rest1-long2", ("phrase_end",)),
    "end-dur-rest1-long2": ("rest1-long2", ("phrase_end_dur",)),
    "end+bass-rest1-long2": ("rest1-long2", ("phrase_end", "phrase_end_bass")),
    "bass-rest1-long2": ("rest1-long2", ("phrase_end_bass",)),
    "bass+triads-rest1-long2": ("rest1-long2", ("phrase_end_bass", "phrase_end_major",
                                                "phrase_end_minor")),
    "triads-rest1-long2": ("rest1-long2", ("phrase_end_major", "phrase_end_minor")),
    "end+bass+triads-rest1-long2": ("rest1-long2", ("phrase_end", "phrase_end_bass",
                                                    "phrase_end_major", "phrase_end_minor")),
    "start-rest1-long2": ("rest1-long2", ("phrase_start",)),
    "bass+triads-rest1": ("rest1", ("phrase_end_bass", "phrase_end_major", "phrase_end_minor")),
    "triads-rest1": ("rest1", ("phrase_end_major", "phrase_end_minor")),
    "end+triads-rest1": ("rest1", ("phrase_end", "phrase_end_major", "phrase_end_minor")),
    "end-rest2": ("rest2", ("phrase_end",)),
    "end+bass+triads-rest2": ("rest2", ("phrase_end", "phrase_end_bass", "phrase_end_major",
                                        "phrase_end_minor")),
}


def minor_errors(data: PhraseData, rule: str = "rest1") -> None:
    """Print where the phrase evidence sits in pop's minor songs, those the shipped model
    (5-fold) calls right and those it calls their relative major: the mean share of the
    phrase ends, of the bass under them and of the phrase starts on the minor tonic and on the
    relative major's tonic, and of the two tonic triads at the phrase ends."""
    probs = key_variants.cross_validate(data, lambda: key_variants.Linear(data))
    y = data.y["pop"]
    pred = probs[("5-fold", "pop")].argmax(1)
    f = data.phrase[rule]["pop"]
    n, tonic = np.arange(len(y)), y % 12
    relative = (tonic + 3) % 12  # the relative major's tonic is a minor third up (its class index)
    groups = {"right": (y >= 12) & (pred == y), "called relative major": (y >= 12) & (pred == relative)}
    for feature in ("phrase_end", "phrase_end_bass", "phrase_start"):
        a = f[n, PHRASE_FEATURES.index(feature), tonic]
        b = f[n, PHRASE_FEATURES.index(feature), relative]
        print(f"{rule} {feature}: " + "; ".join(
            f"minor songs {g} ({m.sum()}): minor tonic {a[m].mean():.3f}, relative major tonic "
            f"{b[m].mean():.3f}, minor tonic more in {(a[m] > b[m]).sum()}" for g, m in groups.items()))
    i = f[n, PHRASE_FEATURES.index("phrase_end_minor"), tonic]
    iii = f[n, PHRASE_FEATURES.index("phrase_end_major"), relative]
    print(f"{rule} triads at the phrase ends: " + "; ".join(
        f"{g}: minor tonic triad {i[m].mean():.3f}, relative major's {iii[m].mean():.3f}"
        for g, m in groups.items()))


def main(argv: list[str] | None = None) -> None:
    ap = key_variants.parser(__doc__, fold_seeds=True)
    args = ap.parse_args(argv)
    t0 = time.process_time()
    data = PhraseData(args.pop, args.folk)
    print(f"features: {time.process_time() - t0:.0f} s CPU", flush=True)
    if args.only == ["minor-errors"]:
        minor_errors(data)
        return
    key_variants.print_header(data)
    key_variants.print_variants(
        args.only or list(VARIANTS),
        lambda name: data if VARIANTS[name] is None else data.with_features(*VARIANTS[name]),
        lambda name, d: key_variants.Linear(d), shuffled, args.fold_seeds)


if __name__ == "__main__":
    main()
