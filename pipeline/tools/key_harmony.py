"""Harmony on the bar grid, scored beside the shipped key classifier (issue 21, seventh round).

    python -m pipeline.tools.key_harmony --pop ../shared/data/pop909-dev [--only NAME ...]
        [--fold-seeds 1 2 3]

In pop a minor song and its relative major share the chord set; what tells them apart is
which chord opens the loop (a bar at the start of a 4- or 8-bar group), what the bass holds
on the downbeats, and where progressions resolve (IV-V-I against the Aeolian bVI-bVII-i, the
same two chords before a different target). The shipped features read triads per beat over the
whole piece, the first and last triad and V-I cadences; none reads the bar or the hypermeter
(the second round tried triads at downbeats and at every fourth bar counted from the start; here
the 4- and 8-bar grid is placed by the melody's phrase starts). The distributions (12 bins
each, by root or pitch class, normalized to sum 1 like ``key.key_features``' rows):

- ``down_major`` / ``down_minor``: the major / minor triads sounding in the first beat of each
  bar (bar length and first downbeat from ``meter.estimate_meter``);
- ``hyper4_major`` / ``hyper4_minor``: the same at the bars that open a 4-bar group, the group
  grid placed where most of the melody's phrases start (a phrase start goes to the nearest
  downbeat, so a pickup counts for the bar it leads into);
- ``hyper8_major`` / ``hyper8_minor``: the same for 8-bar groups;
- ``down_bass``: the lowest note sounding at each downbeat, weighted by its duration in beats
  (the bass's held notes on the strong beats);
- ``hyper4_bass``: the same at the bars that open a 4-bar group;
- ``step_major`` / ``step_minor``: the chord reached after two major triads a whole tone apart
  (the IV-V of a major key, the bVI-bVII of a minor one), over the sequence of beat chords
  (beats holding exactly one triad, repeats merged): a major target on its root
  (IV-V-I) and a minor target on its root (bVI-bVII-i);
- ``change_major`` / ``change_minor``: the triads at the beats where the chord changes
  (the harmonic rhythm: a chord counts once per arrival, however long it lasts);
- ``opening`` / ``closing``: the duration distribution of the first / last 8 bars (Albrecht
  and Shanahan 2013, "The use of large corpora to train a new type of key-finding
  algorithm", Music Perception 31(1), cited from memory: the start and the end of a
  piece state its key);
  ``opening_major`` / ``opening_minor``: the downbeat triads of the first 8 bars.

Each variant appends some of these, read from the candidate tonic (``key._ROTATE``), as extra
per-key columns (a major and a minor block) and is scored by ``key_variants.cross_validate``
(5-fold and leave-one-genre-out) with the shipped linear model (``--only minor-errors`` prints
where the evidence sits in pop's minor songs called their relative major); ``scaled`` fits the
shipped features with each column divided by its standard deviation over the training rows (a
genre-agnostic scale for the L2 penalty, at three strengths) and ``versions`` adds the other
arrangements of the training songs (``NNN/versions/``) to the pop training rows.
``--fold-seeds`` scores under other fold assignments (DEVELOPERS.md, Measurement
history, Key detection, seventh round).
These are experiments: nothing here is on the run path.
"""
from __future__ import annotations

import copy
import time

import numpy as np

from . import eval_sets, key_phrase, key_variants, train_key
from ..analysis import key as keymod
from ..analysis import meter as metermod
from ..midi.piece import DRUM_CHANNEL, Piece

HARMONY_FEATURES = ("down_major", "down_minor", "hyper4_major", "hyper4_minor", "hyper8_major",
                    "hyper8_minor", "down_bass", "hyper4_bass", "step_major", "step_minor",
                    "change_major", "change_minor", "opening", "closing", "opening_major",
                    "opening_minor")
_HF = {f: i for i, f in enumerate(HARMONY_FEATURES)}
#: Bars read at the start and at the end (Albrecht and Shanahan 2013: the first and last 8).
OPENING_BARS = 8
_BAR_BEATS = {m.name: m.bar for m in metermod.METERS}


def window_sets(start: np.ndarray, end: np.ndarray, pc: np.ndarray, windows: np.ndarray,
                width: float) -> np.ndarray:
    """The set of pitch classes (12-bit number) sounding in each window [w, w + width) of the
    sorted window starts ``windows`` (ticks)."""
    n = len(windows)
    if n == 0:
        return np.zeros(0, np.int64)
    first = np.searchsorted(windows + width, start, side="right")  # first window ending after start
    last = np.searchsorted(windows, end, side="left")               # windows starting before end
    size = (n + 1) * 12
    count = (np.bincount(np.minimum(first, n) * 12 + pc, minlength=size)
             - np.bincount(np.maximum(last, first) * 12 + pc, minlength=size)).reshape(-1, 12)[:-1]
    return (np.cumsum(count, axis=0) > 0).astype(np.int64) @ keymod._BITS


def group_phase(bar_of_starts: np.ndarray, group: int) -> int:
    """The bar (mod ``group``) where most phrase starts fall (the smallest on a tie)."""
    if len(bar_of_starts) == 0:
        return 0
    return int(np.argmax(np.bincount(bar_of_starts % group, minlength=group)))


def harmony_features(piece: Piece, meter: str, phase_beats: float) -> np.ndarray:
    """(len(HARMONY_FEATURES), 12) distributions of a piece (see the module docstring), each
    row summing to 1 (or all zero without such an event)."""
    out = np.zeros((len(HARMONY_FEATURES), 12))
    notes = piece.notes[piece.notes["channel"] != DRUM_CHANNEL]
    if len(notes) == 0:
        return out
    tpb = float(piece.ticks_per_beat)
    start, end = notes["start"].astype(np.float64), notes["end"].astype(np.float64)
    pitch = notes["pitch"].astype(np.int64)
    pc = pitch % 12
    bar = _BAR_BEATS.get(meter, 4.0) * tpb
    phase = phase_beats * tpb
    k0 = np.floor((start.min() - phase) / bar)
    downbeats = phase + bar * np.arange(k0, np.ceil((end.max() - phase) / bar))
    bar_no = np.arange(len(downbeats))
    sets = window_sets(start, end, pc, downbeats, tpb)
    triads = keymod._TRIADS[sets]  # (bars, 24)
    # the group grids, placed by the melody's phrase starts (nearest downbeat)
    ls, le, _ = key_phrase.melody_line(piece)
    if len(ls):
        ends = key_phrase.phrase_end_mask(ls, le, int(tpb), 1.0, None)
        begins = np.zeros(len(ls), dtype=bool)
        begins[0] = True
        begins[1:] = ends[:-1]
        starts_bar = np.rint((ls[begins] - downbeats[0]) / bar).astype(np.int64)
        starts_bar = starts_bar[(starts_bar >= 0) & (starts_bar < len(downbeats))]
    else:
        starts_bar = np.zeros(0, np.int64)
    h4 = bar_no % 4 == group_phase(starts_bar, 4)
    h8 = bar_no % 8 == group_phase(starts_bar, 8)
    out[0:2] = triads.sum(axis=0).reshape(2, 12)
    out[2:4] = triads[h4].sum(axis=0).reshape(2, 12)
    out[4:6] = triads[h8].sum(axis=0).reshape(2, 12)
    # the lowest note sounding in each downbeat's first beat, weighted by its duration
    sounding = (start[None, :] < downbeats[:, None] + tpb) & (end[None, :] > downbeats[:, None])
    has = sounding.any(axis=1)
    low = np.argmin(np.where(sounding, pitch[None, :], 1 << 30), axis=1)
    held = (end - start)[low] / tpb
    out[6] = np.bincount(pc[low[has]], weights=held[has], minlength=12)
    out[7] = np.bincount(pc[low[has & h4]], weights=held[has & h4], minlength=12)
    # beat chords (beats holding exactly one triad), repeats merged
    beats = np.arange(np.floor(start.min() / tpb), np.ceil(end.max() / tpb)) * tpb
    bt = keymod._TRIADS[window_sets(start, end, pc, beats, tpb)]
    one = bt.sum(axis=1) == 1
    chords = np.argmax(bt[one], axis=1)  # 0-11 major roots, 12-23 minor roots
    if len(chords):
        keep = np.ones(len(chords), dtype=bool)
        keep[1:] = chords[1:] != chords[:-1]
        seq = chords[keep]
        out[10:12] = np.bincount(seq, minlength=24).reshape(2, 12)
        if len(seq) >= 3:
            a, b, c = seq[:-2], seq[1:-1], seq[2:]
            step = (a < 12) & (b < 12) & (b == (a + 2) % 12)
            out[8:10] = np.bincount(c[step], minlength=24).reshape(2, 12)
    # the first and last 8 bars (Albrecht and Shanahan 2013), duration in beats
    span = OPENING_BARS * bar
    dur = np.minimum(end, start.min() + span) - start
    out[12] = np.bincount(pc, weights=np.maximum(dur, 0) / tpb, minlength=12)
    dur = end - np.maximum(start, end.max() - span)
    out[13] = np.bincount(pc, weights=np.maximum(dur, 0) / tpb, minlength=12)
    out[14:16] = triads[:OPENING_BARS].sum(axis=0).reshape(2, 12)
    return keymod._normalized(out)


class HarmonyData(key_variants.Data):
    """``key_variants.Data`` plus the harmony distributions (``harmony[set]``: (N,
    len(HARMONY_FEATURES), 12)), from the same decoded pieces."""

    def __init__(self, pop: str | None, folk: int) -> None:
        self.harmony = {}
        super().__init__(pop, folk)
        self.versions = pop_versions(pop, [w["name"] for w in self.works["pop"] if w["truth"]]) if pop else None

    def add_features(self, name: str, pieces: list) -> None:
        meters = [metermod.estimate_meter(p) for p in pieces]
        self.harmony[name] = np.stack([harmony_features(p, m.meter, m.phase_beats)
                                       for p, m in zip(pieces, meters)])

    def with_features(self, names: tuple[str, ...]) -> key_variants.Data:
        """A copy whose class rows carry the named harmony distributions too."""
        idx = [_HF[f] for f in names]
        out = copy.copy(self)
        out.phi = {s: np.concatenate([phi, key_phrase.rotated_blocks(self.harmony[s][:, idx])],
                                     axis=2) for s, phi in self.phi.items()}
        return out


def pop_versions(folder: str, mains: list[str]) -> dict:
    """The other arrangements of the pop songs (``NNN/versions/``, labelled with their song's
    key): ``phi`` (M, 24, D), ``y`` (M,) and ``song`` (M,), the index of their song's main file
    in ``mains``."""
    import json
    from pathlib import Path
    from .eval_midi import decode
    labels = json.loads((Path(folder) / "labels.json").read_text(encoding="utf-8"))["files"]
    song_of = {labels[rel]["song"]: i for i, rel in enumerate(mains)}
    rels = sorted(rel for rel, lab in labels.items()
                  if lab.get("role") == "version" and lab["song"] in song_of)
    phi = np.stack([keymod.class_features(keymod.key_features(decode((Path(folder) / rel).read_bytes())))
                    for rel in rels])
    y = np.array([int(labels[r]["tonic_pc"]) + (12 if labels[r]["mode"] == "minor" else 0) for r in rels])
    return {"phi": phi, "y": y, "song": np.array([song_of[labels[r]["song"]] for r in rels])}


class WithVersions(key_variants.Linear):
    """The shipped model whose pop training rows also hold the other arrangements of the
    training songs (never of a held-out song); pop still weighs as one set."""

    def fit(self, parts: list[key_variants.Part]) -> "WithVersions":
        d = self.data
        phis, ys = [], []
        for n, i in parts:
            phi, y = d.phi[n][i], d.y[n][i]
            if n == "pop":
                v = d.versions
                extra = np.isin(v["song"], i)
                phi, y = np.concatenate([phi, v["phi"][extra]]), np.concatenate([y, v["y"][extra]])
            phis.append(phi)
            ys.append(y)
        self.w = train_key.fit(np.concatenate(phis), np.concatenate(ys),
                               train_key.balanced_weights(ys), self.l2)
        return self


class Scaled(key_variants.Linear):
    """The shipped model fitted on columns divided by their standard deviation over the
    training rows (the same L2 then weighs every column alike, whatever its genre's scale)."""

    def fit(self, parts: list[key_variants.Part]) -> "Scaled":
        d = self.data
        phi = np.concatenate([d.phi[n][i] for n, i in parts])
        sd = phi.reshape(-1, phi.shape[2]).std(axis=0)
        self.scale = np.where(sd > 0, 1 / np.where(sd > 0, sd, 1), 0.0)
        self.w = train_key.fit(phi * self.scale, np.concatenate([d.y[n][i] for n, i in parts]),
                               train_key.balanced_weights([d.y[n][i] for n, i in parts]), self.l2)
        return self

    def proba(self, name: str, idx: np.ndarray) -> np.ndarray:
        return train_key.probabilities(self.data.phi[name][idx] * self.scale, self.w)


def shuffled(data: key_variants.Data, seed: int) -> key_variants.Data:
    """``key_phrase.shuffled`` (another fold assignment), the pop versions following their
    songs to their new places."""
    out = key_phrase.shuffled(data, seed)
    versions = getattr(data, "versions", None)
    if versions is not None:
        rng = np.random.default_rng(seed)  # the permutations key_phrase.shuffled drew
        for s in data.sets:
            if s != "chorales":
                order = rng.permutation(len(data.y[s]))
                if s == "pop":
                    place = np.empty_like(order)
                    place[order] = np.arange(len(order))
                    out.versions = dict(versions, song=place[versions["song"]])
    return out


#: The variants: harmony distributions appended (None: the shipped features).
VARIANTS = {
    "linear": None,
    "down": ("down_major", "down_minor"),
    "hyper4": ("hyper4_major", "hyper4_minor"),
    "hyper8": ("hyper8_major", "hyper8_minor"),
    "down-bass": ("down_bass",),
    "hyper4-bass": ("hyper4_bass",),
    "hyper4+bass": ("hyper4_major", "hyper4_minor", "hyper4_bass"),
    "step": ("step_major", "step_minor"),
    "change": ("change_major", "change_minor"),
    "step+change": ("step_major", "step_minor", "change_major", "change_minor"),
    "scaled": None,
    "scaled-l2-0.03": None,
    "scaled-l2-0.3": None,
    "versions": None,
    "opening": ("opening",),
    "opening+closing": ("opening", "closing"),
    "opening-triads": ("opening_major", "opening_minor"),
    "hyper8+opening-triads": ("hyper8_major", "hyper8_minor", "opening_major", "opening_minor"),
    "hyper8+step+change": ("hyper8_major", "hyper8_minor", "step_major", "step_minor",
                           "change_major", "change_minor"),
}
MODELS = {"scaled": Scaled, "versions": WithVersions,
          "scaled-l2-0.03": lambda d: Scaled(d, l2=0.03), "scaled-l2-0.3": lambda d: Scaled(d, l2=0.3)}


def minor_errors(data: HarmonyData, pop: str) -> None:
    """Print where the harmony evidence sits in pop's minor songs that the shipped model
    (5-fold) calls right and those it calls their relative major, how the same fold models
    call those songs' other arrangements (``NNN/versions/``, never trained on with their song),
    and how music21's analyzers (cached, evaluate_key's 150-song sample) call the songs."""
    y = data.y["pop"]
    n, every, v = len(y), {s: np.arange(len(data.y[s])) for s in data.sets}, data.versions
    pred, pred_v = np.zeros(n, np.int64), np.zeros(len(v["y"]), np.int64)
    for f in range(5):  # key_variants.cross_validate's pop folds
        test = np.arange(n) % 5 == f
        parts = [(s, every[s]) for s in data.sets if s != "pop"] + [("pop", np.flatnonzero(~test))]
        model = key_variants.Linear(data).fit(parts)
        pred[test] = model.proba("pop", np.flatnonzero(test)).argmax(1)
        held = np.isin(v["song"], np.flatnonzero(test))
        pred_v[held] = train_key.probabilities(v["phi"][held], model.w).argmax(1)
    rows, tonic = np.arange(n), y % 12
    relative = (tonic + 3) % 12  # the relative major's tonic (its class index)
    groups = {"right": (y >= 12) & (pred == y), "called relative major": (y >= 12) & (pred == relative)}
    h = data.harmony["pop"]
    for feature, minor_row, major_row in (("hyper4 triads", "hyper4_minor", "hyper4_major"),
                                          ("downbeat bass", "down_bass", "down_bass")):
        a, b = h[rows, _HF[minor_row], tonic], h[rows, _HF[major_row], relative]
        print(f"{feature}: " + "; ".join(
            f"minor songs {g} ({m.sum()}): minor tonic {a[m].mean():.3f}, relative major "
            f"{b[m].mean():.3f}, minor tonic more in {(a[m] > b[m]).sum()}" for g, m in groups.items()))
    for g, m in groups.items():
        songs = np.isin(v["song"], np.flatnonzero(m))
        truth = v["y"][songs]
        print(f"versions of the minor songs {g}: {songs.sum()}, right {(pred_v[songs] == truth).sum()}, "
              f"relative major {(pred_v[songs] == (truth % 12 + 3) % 12).sum()}")
    print(f"pop exact (5-fold): main files {np.mean(pred == y):.3f}, versions {np.mean(pred_v == v['y']):.3f}")
    works = [w for w in eval_sets.pop(pop, None, music21_count=150) if w["truth"] is not None]
    wrong = {works[i]["name"] for i in np.flatnonzero(groups["called relative major"])}
    calls: dict[str, dict[str, int]] = {}
    for w in works:
        if w["name"] in wrong and w["music21"]:
            tonic_pc, mode = w["truth"]
            for method, (pc, m) in w["music21"].items():
                said = ("annotated" if (pc, m) == (tonic_pc, mode) else "relative major"
                        if (pc, m) == ((tonic_pc + 3) % 12, "major") else "other")
                calls.setdefault(method, {}).setdefault(said, 0)
                calls[method][said] += 1
    for method, counts in calls.items():
        print(f"music21 {method} on the songs called relative major in its sample: {counts}")


def main(argv: list[str] | None = None) -> None:
    ap = key_variants.parser(__doc__, fold_seeds=True)
    args = ap.parse_args(argv)
    t0 = time.process_time()
    data = HarmonyData(args.pop, args.folk)
    print(f"features: {time.process_time() - t0:.0f} s CPU", flush=True)
    if args.only == ["minor-errors"]:
        minor_errors(data, args.pop)
        return
    key_variants.print_header(data)
    key_variants.print_variants(
        args.only or list(VARIANTS),
        lambda name: data if VARIANTS[name] is None else data.with_features(VARIANTS[name]),
        lambda name, d: MODELS.get(name, key_variants.Linear)(d), shuffled, args.fold_seeds)


if __name__ == "__main__":
    main()
