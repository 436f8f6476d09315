"""Note shingles for piece identity, invariant by construction.

A piece is represented by what makes it that piece in each of its voices; every shingle is the
hash of ``ngram`` consecutive tokens of one *line*, tagged by the line's kind:

* **Voice lines** (kind ``line``): one line per pitched voice above the bass register, a voice
  being a (track, channel) stream (so a format-0 file's channels and a format-1 file's tracks
  give the same voices), following the voice's highest note at each onset. A melody keeps its
  shingles whatever the accompaniment beside it, and a melody-only or chords-only file holds a
  subset of its full arrangement's shingles. Bass voices (median pitch more than ``bass_gap``
  semitones below the median of all the piece's pitched notes) make none: bass lines over
  common progressions are shared by many distinct pieces. The register is the piece's own, so
  a transposed copy has the same bass voices (a fixed pitch, MIDI 48, made voices near it
  bass or not by the key a file was in, and the normalized outputs' sets other than their
  sources'; found by an audit through ``midisift leakage``).
* **Contours** (kind ``pitch``): the same lines' intervals alone, repeated notes left out, in
  windows ``pitch_extra`` tokens longer: a tune re-notated with other note values keeps them.
* **The lead** (kind ``lead``): the line shingles of the voice that carries the tune
  (``lead_voice``) once more, marked by a clear top bit (``LEAD_LIMIT``) so they form the
  prefix of the sorted set; ``pipeline.similarity.sets`` compares files on them on their own too.
* Measured and not used by default (``ShingleSpec.kinds``): ``bass``, the lowest note at each
  onset of all voices merged; ``harmony``, per beat the pitch-class set of the notes sounding,
  relative to their lowest note, one token per chord change; ``top``, the highest note of all
  voices merged (the skyline of dedup version 1).

Invariances: pitch enters as intervals (transposition); onsets are ``ticks / ticks_per_beat`` on
a grid of ``2 * grid`` steps per beat (tempo events, resolution, small timing jitter); rhythm
enters as the ratio of each onset gap to the one before (so the same line encoded at double or
half time gives the same tokens); programs, velocities and channel numbers are not read; drums
are left out (a groove is shared by many pieces).

Generic material: a window whose tokens take at most ``min_distinct`` distinct values (a
repeated note or chord, a two-note alternation, an even scale run, a repeated block chord) is
dropped: such figures are shared by unrelated pieces and carry little of a piece's identity.

The canonical content hash, by contrast, keeps absolute pitch and exact beat positions: two
files with the same notes but other metadata, velocities, programs, tempo events, resolution or
format hash equal.
"""
from __future__ import annotations

import functools
import hashlib
import re
import sys
from dataclasses import dataclass, replace

import numpy as np

from ..midi.accel import compiled_analyses
from ..midi.piece import DRUM_CHANNEL, Piece

_M64 = np.uint64(0xFFFFFFFFFFFFFFFF)
_MIX1 = np.uint64(0xFF51AFD7ED558CCD)
_MIX2 = np.uint64(0xC4CEB9FE1A85EC53)
_ROLL = np.uint64(0x9E3779B97F4A7C15)
#: Content hash resolution: positions rounded to 1/960 beat (finer than any file grid in
#: common use, so only true note-content differences change the hash).
CONTENT_STEPS_PER_BEAT = 960


@dataclass(frozen=True)
class ShingleSpec:
    """How shingles are cut. ``ngram``: tokens per shingle; ``grid``: onset steps per beat (the
    grid onsets are rounded to has twice as many, so a line at half time still fits);
    ``max_ratio``: ratios of successive onset gaps beyond this many half octaves are one
    token; ``min_distinct``:
    windows with at most this many distinct tokens are dropped (generic figures; at most
    ``ngram - 2``, so short windows are all kept); ``pitch_extra``: pitch-only windows are this
    many tokens longer; ``bass_gap``: voices whose median pitch lies more than this many
    semitones below the piece's median pitch (the bass register) make no line shingles
    (``bass_below``, when set, is that pitch limit itself, absolute: tests and tools);
    ``max_shingles``: at most this many shingles are kept (the smallest hashes, a consistent
    sample); ``kinds``: the line kinds emitted."""

    ngram: int = 4
    grid: int = 4
    max_ratio: int = 6
    max_interval: int = 24
    min_distinct: int = 2
    pitch_extra: int = 2
    bass_gap: int = 12
    bass_below: int | None = None
    lead_monophony: float = 0.9
    max_shingles: int = 4096
    kinds: tuple[str, ...] = ("line", "pitch", "lead")


#: Tag of each kind, mixed into its shingles' hashes so kinds never match each other.
KIND_TAGS = {"line": 1, "bass": 2, "harmony": 3, "top": 4, "pitch": 5, "lead": 6, "lead_pitch": 7}
#: Shingles of the lead voice (also present as ordinary line shingles) are marked by a clear top
#: bit, every other shingle by a set one: a sorted set holds the lead's copies first, so a
#: comparison of the leads alone reads a prefix of each set (``similarity.sets.lead_part``).
LEAD_LIMIT = np.uint64(1 << 63)
#: A held note counts in at most this many beats of the harmony (memory: long pads).
_HELD_BEATS = 4


_S33 = np.uint64(33)


def fmix64(x: np.ndarray) -> np.ndarray:
    """MurmurHash3's 64-bit finalizer (an avalanching bijection), vectorized."""
    with np.errstate(over="ignore"):
        return _fmix64_inplace(x.astype(np.uint64, copy=True))


def _fmix64_inplace(x: np.ndarray) -> np.ndarray:
    """``fmix64`` overwriting ``x``, a uint64 array the caller owns, so no copy is made.
    Integer array arithmetic wraps modulo 2**64 without a warning (only numpy scalars warn)."""
    x ^= x >> _S33
    x *= _MIX1
    x ^= x >> _S33
    x *= _MIX2
    x ^= x >> _S33
    return x


def _grid(ticks: np.ndarray, tpb: int, steps: int) -> np.ndarray:
    """Tick positions rounded (half up, in integers) to ``steps`` per beat."""
    return (ticks * (2 * steps) + tpb) // (2 * tpb)


def _pitched(piece: Piece, *fields: str) -> list[np.ndarray]:
    """The columns ``fields`` of the notes not on the drum channel (no copy of the table)."""
    notes = piece.notes
    drum = notes["channel"] == DRUM_CHANNEL
    if not drum.any():
        return [notes[f] for f in fields]
    keep = ~drum
    return [notes[f][keep] for f in fields]


def line_tokens(q: np.ndarray, pitch: np.ndarray, voice: np.ndarray, spec: ShingleSpec,
                lowest: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Tokens of the lines of each voice: ``(tokens, line id of each token)``, the tokens of
    one line consecutive and in time order.

    A line follows its voice's highest note per onset (``lowest``: the lowest). A token is
    ``(interval + 128) * 4096 + rhythm``: the pitch interval from the previous onset (clipped to
    ``max_interval``) and the ratio of this onset gap to the previous one, in half octaves
    (``round(2 log2(gap / previous gap))``, clipped to +-``max_ratio``; ``RATIO_FIRST`` for a
    line's first gap). Only ratios of gaps enter, so the same line at double or half time (or
    any tempo scale) gives the same tokens, and a changed note changes the tokens next to it
    only."""
    empty = np.zeros(0, dtype=np.int64)
    if len(q) < 2:
        return empty, empty
    order = np.lexsort((pitch, q, voice))
    v, qq, p = voice[order], q[order], pitch[order].astype(np.int64)
    new = np.empty(len(v), dtype=bool)
    new[0] = True
    new[1:] = (v[1:] != v[:-1]) | (qq[1:] != qq[:-1])
    first = np.flatnonzero(new)
    if lowest:
        gp = p[first]
    else:
        gp = p[np.append(first[1:] - 1, len(v) - 1)]
    gv, gq = v[first], qq[first]
    same = gv[1:] == gv[:-1]
    if not same.any():
        return empty, empty
    interval = np.clip(gp[1:] - gp[:-1], -spec.max_interval, spec.max_interval)[same]
    step = (gq[1:] - gq[:-1])[same]
    line = gv[1:][same]
    rhythm = np.full(len(step), RATIO_FIRST, dtype=np.int64)
    cont = np.flatnonzero(line[1:] == line[:-1]) + 1  # tokens with a previous gap in their line
    rhythm[cont] = ratio_class(step[cont] / step[cont - 1], spec.max_ratio) + 16
    return (interval + 128) * 4096 + rhythm, line


def ratio_class(ratio: np.ndarray, max_ratio: int) -> np.ndarray:
    """``round(2 log2(ratio))`` clipped to +-``max_ratio``, by comparing with the class
    boundaries ``2 ** ((c + 0.5) / 2)`` (exact float comparisons, no logarithm)."""
    bounds = np.array([2.0 ** ((c + 0.5) / 2) for c in range(-max_ratio, max_ratio)])
    return np.searchsorted(bounds, ratio, side="right").astype(np.int64) - max_ratio


#: The rhythm part of a line's first token (no previous gap to compare with).
RATIO_FIRST = 64


def harmony_tokens(q_start: np.ndarray, q_end: np.ndarray, pitch: np.ndarray, steps: int
                   ) -> np.ndarray:
    """One token per chord change: the pitch-class set of the notes sounding in a beat,
    relative to their lowest note (a 12-bit mask), and the move of that lowest note's pitch
    class from the previous chord; beats with the same chord as the one before are one chord.
    A note counts in the beats it sounds in (at most ``_HELD_BEATS``)."""
    if len(pitch) < 2:
        return np.zeros(0, dtype=np.int64)
    b0 = q_start // steps
    b1 = np.maximum(b0, (np.maximum(q_end, q_start + 1) - 1) // steps)
    span = np.minimum(b1 - b0, _HELD_BEATS - 1) + 1
    idx = np.repeat(np.arange(len(pitch)), span)
    offset = np.arange(len(idx)) - np.repeat(np.cumsum(span) - span, span)
    beat = b0[idx] + offset
    p = pitch[idx].astype(np.int64)
    order = np.lexsort((p, beat))
    beat, p = beat[order], p[order]
    first = np.flatnonzero(np.concatenate(([True], beat[1:] != beat[:-1])))
    sizes = np.diff(np.append(first, len(beat)))
    bass = p[first]
    mask = np.bitwise_or.reduceat(np.left_shift(1, (p - np.repeat(bass, sizes)) % 12), first)
    chord = mask * 16 + bass % 12
    change = np.concatenate(([True], chord[1:] != chord[:-1]))
    bass, mask = bass[change], mask[change]
    if len(bass) < 2:
        return np.zeros(0, dtype=np.int64)
    return mask[1:] * 16 + (bass[1:] - bass[:-1]) % 12


def voice_stats(voice: np.ndarray, q: np.ndarray, pitch: np.ndarray) -> dict[str, np.ndarray]:
    """Per voice (sorted ids): ``voice``, ``median`` pitch (the lower middle note), ``notes``
    and ``onsets`` (distinct grid steps)."""
    if not len(voice):
        z = np.zeros(0, dtype=np.int64)
        return {"voice": z, "median": z, "notes": z, "onsets": z}
    order = np.lexsort((pitch, voice))
    v, p = voice[order], pitch[order]
    start = np.flatnonzero(np.concatenate(([True], v[1:] != v[:-1])))
    size = np.diff(np.append(start, len(v)))
    order = np.lexsort((q, voice))
    v2, q2 = voice[order], q[order]
    onset = np.concatenate(([True], (v2[1:] != v2[:-1]) | (q2[1:] != q2[:-1])))
    onsets = np.add.reduceat(onset.astype(np.int64), start)
    return {"voice": v[start], "median": p[start + (size - 1) // 2].astype(np.int64),
            "notes": size, "onsets": onsets}


#: Words of a track name that mark the tune's track (common practice in MIDI files, e.g.
#: "Melody", "Lead Vocal", "Soprano"); matched as whole words, casefolded.
LEAD_NAMES = ("melody", "melodie", "lead", "vocal", "vocals", "voice", "soprano")


def lead_voice(stats: dict[str, np.ndarray], spec: ShingleSpec,
               track_names: tuple[str, ...] = ()) -> int | None:
    """The voice that carries the tune, or None (``spec.bass_below``: the piece's bass limit,
    ``bass_limit``; bass voices never carry it).

    A track named like the tune's (``LEAD_NAMES``) wins when one of its voices has more than
    ``ngram`` onsets (the first such track; its busiest voice). Otherwise: among the voices
    above the bass register that are nearly monophonic (at least ``lead_monophony`` of their
    notes start alone) and have at least half the onsets of the busiest such voice, the highest
    (by median pitch; then more onsets, then the smaller id): the melody-on-top rule (common
    practice, the "skyline"), applied to whole voices so an accompaniment rising above the
    tune now and then does not take over."""
    ok = (stats["median"] >= spec.bass_below) & (stats["onsets"] > spec.ngram)
    if not ok.any():
        return None
    for t, name in enumerate(track_names):
        if set(re.findall(r"[a-z]+", name.casefold())) & set(LEAD_NAMES):
            mine = np.flatnonzero(ok & (stats["voice"] // 16 == t))
            if len(mine):
                return int(stats["voice"][mine[np.argmax(stats["onsets"][mine])]])
    ok &= stats["onsets"] >= spec.lead_monophony * stats["notes"]
    if not ok.any():
        return None
    ok &= 2 * stats["onsets"] >= stats["onsets"][ok].max()
    idx = np.flatnonzero(ok)
    best = idx[np.lexsort((stats["voice"][idx], -stats["onsets"][idx], -stats["median"][idx]))[0]]
    return int(stats["voice"][best])


def _windows(tokens: np.ndarray, line: np.ndarray, kind: str, spec: ShingleSpec,
             n: int | None = None, lead: int | None = None, lead_kind: str = ""
             ) -> tuple[np.ndarray, np.ndarray]:
    """Hashes (uint64, not yet mixed) of the ``n``-token windows (default ``ngram``) inside
    one line, the generic ones (at most ``min_distinct`` distinct tokens) left out; and the
    windows of line ``lead`` hashed as ``lead_kind`` (empty without ``lead``). A window hash
    is linear in its start value, so the lead's hashes are the line hashes plus a constant."""
    n = n or spec.ngram
    empty = np.zeros(0, dtype=np.uint64)
    if len(tokens) < n:
        return empty, empty
    count = len(tokens) - n + 1
    ok = line[:count] == line[n - 1:]
    limit = min(spec.min_distinct, n - 2)  # short windows: no filter
    if limit >= 1:
        # distinct tokens per window: 1 + the changes along each sorted window
        srt = np.sort(np.lib.stride_tricks.sliding_window_view(tokens, n), axis=1)
        ok &= np.count_nonzero(srt[:, 1:] != srt[:, :-1], axis=1) >= limit
    t = tokens.view(np.uint64)
    h = np.full(count, _seed(n, kind), dtype=np.uint64)
    for j in range(n):  # array arithmetic wraps modulo 2**64
        h *= _ROLL
        h += t[j:j + count]
    if lead is None:
        return h[ok], empty
    mine = h[ok & (line[:count] == lead)]
    mine += np.uint64(((int(_seed(n, lead_kind)) - int(_seed(n, kind))) * pow(int(_ROLL), n, 1 << 64))
                      % (1 << 64))
    return h[ok], mine


#: The kinds the compiled kernel (``_smf_accel.voice_shingles``) computes.
_COMPILED_KINDS = ("line", "pitch", "lead")


@functools.lru_cache(maxsize=16)
def _kernel_constants(max_ratio: int) -> tuple[np.ndarray, dict[str, int]]:
    """The kernel's rhythm-class bounds and the kinds' hash bases, made once per setting
    (speed: not once per file)."""
    bounds = np.array([2.0 ** ((c + 0.5) / 2) for c in range(-max_ratio, max_ratio)])
    base = {k: (KIND_TAGS[k] * 0x632BE59BD9B4E019) & 0xFFFFFFFFFFFFFFFF for k in ("line", "pitch", "lead")}
    return bounds, base


@functools.lru_cache(maxsize=1024)
def _named_lead_tracks(track_names: tuple[str, ...]) -> tuple[int, ...]:
    """Indexes of the tracks named like a lead voice (``LEAD_NAMES``, whole words), for the
    kernel (collections repeat the same few names)."""
    return tuple(t for t, name in enumerate(track_names)
                 if set(re.findall(r"[a-z]+", name.casefold())) & set(LEAD_NAMES))


def _compiled_shingles(piece: Piece, spec: ShingleSpec) -> np.ndarray | None:
    """``shingle_hashes`` through the compiled kernel when it applies (default kinds, the
    extension built, a little-endian machine), else None. The numpy code below is the
    specification; tests/test_smf_accel.py holds both paths equal."""
    if spec.kinds != _COMPILED_KINDS or sys.byteorder != "little":
        return None
    accel = compiled_analyses(piece.notes)
    if accel is None:
        return None
    bounds, base = _kernel_constants(spec.max_ratio)
    named = _named_lead_tracks(tuple(piece.track_names))
    args = (int(piece.ticks_per_beat), 2 * spec.grid, spec.max_interval, spec.max_ratio, bounds,
            spec.bass_below, spec.ngram, spec.ngram + spec.pitch_extra, spec.min_distinct,
            float(spec.lead_monophony), named, base["line"], base["pitch"], base["lead"],
            spec.max_shingles)
    if not all(type(a) is int for a in args[:4] + args[5:9] + args[14:]):
        return None
    got = accel.voice_shingles(piece.notes, *args)
    return None if got is None else np.frombuffer(got, dtype=np.uint64).copy()


def _seed(n: int, kind: str) -> np.uint64:
    """The start value of a window hash: its length and its kind's tag, modulo 2**64."""
    return np.uint64((n + KIND_TAGS[kind] * 0x632BE59BD9B4E019) & 0xFFFFFFFFFFFFFFFF)


def bass_limit(pitch: np.ndarray, spec: ShingleSpec) -> int:
    """The median pitch below which a voice is a bass voice: ``spec.bass_below`` when set, else
    ``spec.bass_gap`` semitones below the lower middle of ``pitch`` (the piece's pitched notes),
    so it moves with a transposition."""
    if spec.bass_below is not None:
        return int(spec.bass_below)
    if not len(pitch):
        return 0
    return int(np.partition(pitch, (len(pitch) - 1) // 2)[(len(pitch) - 1) // 2]) - spec.bass_gap


def for_piece(piece: Piece, spec: ShingleSpec) -> ShingleSpec:
    """``spec`` with ``bass_below`` set to the piece's bass limit (``bass_limit``), as
    ``lead_voice`` and the line rules read it."""
    if spec.bass_below is not None:
        return spec
    return replace(spec, bass_below=bass_limit(_pitched(piece, "pitch")[0], spec))


def shingle_hashes(piece: Piece, spec: ShingleSpec = ShingleSpec()) -> np.ndarray:
    """The piece's shingle set: sorted unique uint64 hashes of the windows of every line kind
    in ``spec.kinds`` (see the module docstring).

    A piece whose lines are all shorter than ``ngram`` gets one shingle of its first line's
    tokens (if any), so short pieces still compare; a piece with none (drums only, one onset)
    gets an empty set.
    """
    spec = for_piece(piece, spec)
    got = _compiled_shingles(piece, spec)
    if got is not None:  # the same hashes (tests/test_smf_accel.py)
        return got
    start, pitch, track, channel = _pitched(piece, "start", "pitch", "track", "channel")
    tpb = int(piece.ticks_per_beat)
    steps = 2 * spec.grid
    q = _grid(start, tpb, steps)
    parts, lead_parts = [], []
    if "line" in spec.kinds:
        voice = track.astype(np.int64) * 16 + channel
        stats = voice_stats(voice, q, pitch)
        upper = stats["median"] >= spec.bass_below
        if not upper.all():
            kept_voices = stats["voice"][upper]  # sorted
            pos = np.minimum(np.searchsorted(kept_voices, voice), max(len(kept_voices) - 1, 0))
            keep = kept_voices[pos] == voice if len(kept_voices) else np.zeros(len(voice), bool)
            q_l, p_l, v_l = q[keep], pitch[keep], voice[keep]
        else:
            q_l, p_l, v_l = q, pitch, voice
        tok, line = line_tokens(q_l, p_l, v_l, spec)
        lead = lead_voice(stats, spec, tuple(piece.track_names)) if "lead" in spec.kinds else None
        h, lead_h = _windows(tok, line, "line", spec, lead=lead, lead_kind="lead")
        parts.append(h)
        lead_parts.append(lead_h)
        if not len(h) and len(tok):  # every line shorter than ngram: one shingle
            t = tok[line == line[0]][:spec.ngram].view(np.uint64)
            h = np.full(1, _seed(len(t), "line"), dtype=np.uint64)
            for x in t:
                h *= _ROLL
                h += x
            parts[-1] = h
        if "pitch" in spec.kinds:
            interval = tok // 4096
            moved = interval != 128
            h, lead_h = _windows(interval[moved], line[moved], "pitch", spec,
                                 spec.ngram + spec.pitch_extra,
                                 lead if "lead_pitch" in spec.kinds else None, "lead_pitch")
            parts.append(h)
            lead_parts.append(lead_h)
    zero = np.zeros(len(q), dtype=np.int64)
    if "top" in spec.kinds:
        tok, line = line_tokens(q, pitch, zero, spec)
        parts.append(_windows(tok, line, "top", spec)[0])
    if "bass" in spec.kinds:
        tok, line = line_tokens(q, pitch, zero, spec, lowest=True)
        parts.append(_windows(tok, line, "bass", spec)[0])
    if "harmony" in spec.kinds:
        tok = harmony_tokens(q, _grid(_pitched(piece, "end")[0], tpb, steps), pitch, steps)
        parts.append(_windows(tok, np.zeros(len(tok), dtype=np.int64), "harmony", spec)[0])
    h = np.concatenate(parts) if parts else np.zeros(0, dtype=np.uint64)
    h = _fmix64_inplace(h)
    h |= LEAD_LIMIT  # the lead's copies take the lower half of the hash range
    if lead_parts and sum(len(x) for x in lead_parts):
        lead_h = _fmix64_inplace(np.concatenate(lead_parts))
        lead_h &= ~LEAD_LIMIT
        h = np.concatenate((lead_h, h))
    if not len(h):
        return h
    h.sort()  # np.unique: sorted, then the first of each run of equal values
    if len(h) > 1:
        keep = np.empty(len(h), dtype=bool)
        keep[0] = True
        keep[1:] = h[1:] != h[:-1]
        h = h[keep]
    if len(h) > spec.max_shingles:
        h = h[:spec.max_shingles]
    return h


def content_hash(piece: Piece) -> str:
    """Canonical note-content hash (hex): absolute pitch, drum flag and start/end in beats.

    Ignores metadata, track names and layout, channels (except drum vs pitched), programs,
    velocities, tempo events and the ticks-per-beat resolution. Each note becomes a 64-bit
    hash of its fields; the sorted multiset of those is hashed with SHA-256, so note order
    (which differs between format 0 and 1 layouts) does not matter.
    """
    n = piece.notes
    tpb = int(piece.ticks_per_beat)
    accel = compiled_analyses(n) if sys.byteorder == "little" else None
    if accel is not None:
        got = accel.content_rows(n, tpb, CONTENT_STEPS_PER_BEAT)
        if got is not None:  # the same sorted row hashes, as little-endian bytes
            return hashlib.sha256(got).hexdigest()[:32]
    # start and end rounded in one pass: positions in 1/960 beat, rounded half up in integers
    se = (np.concatenate((n["start"], n["end"])) * (2 * CONTENT_STEPS_PER_BEAT) + tpb) // (2 * tpb)
    se = se.view(np.uint64)  # int64 -> uint64 keeps the bits, as astype does, without a copy
    row = _fmix64_inplace(se[:len(n)])
    row *= _ROLL
    row += se[len(n):]
    row = _fmix64_inplace(row)
    code = n["pitch"].astype(np.uint64)
    code *= np.uint64(2)
    code += n["channel"] == DRUM_CHANNEL  # + 1 for a drum note
    row *= _ROLL
    row += code
    row = _fmix64_inplace(row)
    row.sort()
    return hashlib.sha256(np.ascontiguousarray(row, dtype="<u8")).hexdigest()[:32]


def duration_beats(piece: Piece) -> float:
    """Beats from 0 to the end of the last note."""
    return float(piece.notes["end"].max()) / piece.ticks_per_beat if len(piece.notes) else 0.0
