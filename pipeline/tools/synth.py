"""Procedural MIDI corpus generator with planted cases and a truth file (``midisift synth``).

Why: every stage of midisift needs a corpus whose right answers are known. This module writes
procedural pieces (melody, chords, bass, GM drums on channel index 9) in all 12 keys, major and
minor, in simple and compound meters with metrically coherent accents, plus planted defects,
duplicates and tolerated quirks, and records what each file is in ``truth.json``. It has its
own minimal Standard MIDI File writer (no dependency on the pipeline's decoder or encoder), so
tests that compare the pipeline against the truth are meaningful.

Output is a pure function of ``(count, seed, profile, naming, mix)``: every cluster of files is
built from its own ``random.Random`` seeded with a string, so the bytes are identical across
runs, machines and Python hash seeds.

truth.json shape::

    {"generator": {"count": N, "seed": S, "profile": "small", "naming": "plain", "version": 1},
     "files": {"<relpath>": {
        "expect": "kept" | "<reason code>",       # what the pipeline should decide
        "stage": "validate" | "dedup" | "filter" | null,   # the dropping stage (STAGE_OF_REASON)
        "piece": "P00012",                         # the musical piece the bytes came from
        "variant": "original" | "exact_copy" | "same_content" | "transposed" | "tempo" |
                   "reorchestrated" | "requantized" | "edited" | "excerpt" | "corrupt" |
                   "no_notes" | "drums_only" | "too_short" | "too_long" | "too_few_notes",
        "duplicate_of": "<relpath of the kept member>" | null,
        "cluster": "P00012" | null,                # all copies/variants of one piece share it
        "transform": {...},                        # e.g. {"semitones": 3, "dropped_notes": 1}
        "quirk": null | "rmid" | "kar" | "smpte" | "missing_eot" | "hanging_notes" |
                 "running_status" | "ext_upper" | "ext_midi",
        "defect": null | "html" | "png" | "empty" | "text" | "cut_mid_track" |
                  "garbage_chunk_id" | "bad_header_length" | "status_f4" | "status_f5" |
                  "running_status_at_track_start" | "format_2",
        "tonic": "Eb", "tonic_pc": 3, "mode": "major" | "minor",   # of the sounding music
        "meter": "6/8", "meter_declared": true,    # false: no time-signature event in the file
        "key_declared": "Eb major" | "C major" | null,   # the key-signature event, if any
        "bpm": 96.0,                               # first tempo, quarter notes per minute
        "duration_s": 41.2,                        # end of the last note (hanging notes end
                                                   # at their track's end), seconds
        "notes": 512,                              # note count, drums included
        "family": "F0003" | null}}}                # style family (shared changes/key/meter)

Musical fields are null for files the validate stage must reject. Tonics are spelled with the
fixed names of ``TONIC_NAMES``; ``tonic_pc`` is authoritative.

Who is kept in a cluster: the dedup stage keeps the member with most notes, then the longest,
then the smallest sha256 (then the smallest relpath for byte-identical copies). The generator
makes the original strictly richest against its near-duplicates: edited copies delete more than
they insert, excerpts are shorter, and the kinds that keep every note (transposed, tempo,
re-orchestrated, re-quantized) drop the final crash-cymbal hit (``"dropped_notes": 1``).
Same-content copies tie with the original on notes and duration, so the truth names the member
with the smallest sha256 as kept (it may be a copy; ``variant`` still says what each file is).

The mix: ``DEFAULT_MIX`` gives each planted kind a fraction of the corpus and a minimum count
(so a 90-file demo still has every kind); by default about a third of the files are planted
and the rest are clean originals (a few of them carry a tolerated quirk). ``planted=`` rescales
all fractions to one total. ``STAGE_OF_REASON`` says which stage we expect to drop each reason.
Planted filter cases are each a fresh piece, so none is a duplicate of another file (the
default config runs dedup before filter).

Cost: about 650 small files per CPU-second (2 ms a file); 100,000 small files take about
2.5 CPU-minutes and 1.4 GB of memory (all bytes are held until names are assigned).
"""
from __future__ import annotations

import hashlib
import json
import random
import struct
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Iterable

from ..errors import OutputError, UsageError

VERSION = 1
TONIC_NAMES = ("C", "Db", "D", "Eb", "E", "F", "F#", "G", "Ab", "A", "Bb", "B")
#: Key-signature sharps (negative = flats) of each major tonic pitch class.
MAJOR_SHARPS = {0: 0, 7: 1, 2: 2, 9: 3, 4: 4, 11: 5, 6: 6, 1: -5, 8: -4, 3: -3, 10: -2, 5: -1}
MAJOR_SCALE = (0, 2, 4, 5, 7, 9, 11)
MINOR_SCALE = (0, 2, 3, 5, 7, 8, 10)
DRUMS = 9
KICK, SNARE, RIM, HAT, RIDE, CRASH, TOM = 36, 38, 37, 42, 51, 49, 45

#: Meter table: pulse strengths per bar (pulse = the denominator's note) and pulses per beat
#: (3 for compound meters, which group eighths in threes). Quarter-note BPM range per meter.
METERS: dict[str, dict[str, Any]] = {
    "2/4": {"strength": (3, 1), "per_beat": 1, "bpm": (80, 150)},
    "3/4": {"strength": (3, 1, 1), "per_beat": 1, "bpm": (84, 170)},
    "4/4": {"strength": (3, 1, 2, 1), "per_beat": 1, "bpm": (72, 160)},
    "2/2": {"strength": (3, 1), "per_beat": 1, "bpm": (140, 220)},
    "3/2": {"strength": (3, 1, 1), "per_beat": 1, "bpm": (120, 200)},
    "3/8": {"strength": (3, 1, 1), "per_beat": 3, "bpm": (72, 132)},
    "6/8": {"strength": (3, 1, 1, 2, 1, 1), "per_beat": 3, "bpm": (80, 165)},
    "9/8": {"strength": (3, 1, 1, 2, 1, 1, 2, 1, 1), "per_beat": 3, "bpm": (80, 160)},
    "12/8": {"strength": (3, 1, 1, 2, 1, 1, 2, 1, 1, 2, 1, 1), "per_beat": 3, "bpm": (70, 150)},
}
METER_WEIGHTS = {"4/4": 5, "3/4": 3, "2/4": 2, "6/8": 3, "2/2": 1, "3/2": 1, "3/8": 1,
                 "9/8": 1, "12/8": 2}
#: Velocity by metric strength (3 downbeat, 2 secondary beat, 1 weak beat, 0 off the pulse).
ACCENT = {3: 104, 2: 90, 1: 78, 0: 66}
#: Chord progressions as scale degrees, one chord per bar.
PROGRESSIONS = {
    "major": ((1, 6, 2, 5), (2, 5, 1, 1), (1, 4, 5, 1), (1, 5, 6, 4), (1, 6, 4, 5),
              (3, 6, 2, 5), (1, 4, 1, 5, 1, 4, 5, 1), (1, 1, 4, 4, 2, 5, 1, 5)),
    "minor": ((1, 4, 5, 1), (1, 6, 3, 7), (1, 4, 7, 3, 6, 2, 5, 1), (1, 6, 4, 5),
              (2, 5, 1, 1), (1, 7, 6, 5)),
}
#: Rhythm cells of the melody, as fractions of one beat (simple) or one dotted beat (compound).
CELLS_SIMPLE = ((1,), (0.5, 0.5), (0.5, 0.5), (0.75, 0.25), (0.5, 0.25, 0.25), (0.25, 0.25, 0.5),
                (1,), (2,))
CELLS_COMPOUND = ((1,), (2 / 3, 1 / 3), (2 / 3, 1 / 3), (1 / 3, 1 / 3, 1 / 3), (0.5, 1 / 6, 1 / 3),
                  (2,))
#: GM programs by role.
PROGRAMS = {"melody": (0, 11, 24, 40, 56, 64, 65, 66, 71, 73, 80),
            "chords": (0, 2, 4, 5, 16, 19, 24, 26, 46, 48),
            "bass": (32, 33, 34, 35, 43),
            "pad": (48, 49, 50, 52, 88, 89, 91),
            "arp": (6, 8, 11, 12, 13, 46)}
#: Planted kinds, (fraction of the corpus, minimum count when the corpus is big enough).
DEFAULT_MIX: dict[str, tuple[float, int]] = {
    "transposed": (0.04, 2), "tempo": (0.025, 1), "reorchestrated": (0.025, 1),
    "requantized": (0.025, 1), "edited": (0.025, 1), "excerpt": (0.025, 1),
    "exact_copy": (0.025, 1), "same_content": (0.03, 2),
    "not_midi": (0.015, 4), "truncated": (0.012, 1), "bad_chunk": (0.012, 2),
    "bad_event": (0.012, 3), "unsupported_format": (0.008, 1),
    "no_notes": (0.008, 1), "drums_only": (0.008, 1), "too_short": (0.008, 1),
    "too_long": (0.004, 1), "too_few_notes": (0.008, 1),
    "rmid": (0.004, 1), "kar": (0.004, 1), "smpte": (0.004, 1), "missing_eot": (0.004, 1),
    "hanging_notes": (0.004, 1), "running_status": (0.01, 1), "ext_upper": (0.006, 1),
    "ext_midi": (0.006, 1),
}
NEAR_KINDS = ("transposed", "tempo", "reorchestrated", "requantized", "edited", "excerpt")
EXACT_KINDS = ("exact_copy", "same_content")
CORRUPT_FORMS = {"not_midi": ("html", "png", "empty", "text"), "truncated": ("cut_mid_track",),
                 "bad_chunk": ("garbage_chunk_id", "bad_header_length"),
                 "bad_event": ("status_f4", "status_f5", "running_status_at_track_start"),
                 "unsupported_format": ("format_2",)}
FILTER_KINDS = ("no_notes", "drums_only", "too_short", "too_long", "too_few_notes")
QUIRKS = ("rmid", "kar", "smpte", "missing_eot", "hanging_notes", "running_status",
          "ext_upper", "ext_midi")
#: The stage expected to drop a file for each reason code (our reading of DESIGN.md).
STAGE_OF_REASON = {"not_midi": "validate", "truncated": "validate", "bad_chunk": "validate",
                   "bad_event": "validate", "unsupported_format": "validate",
                   "no_notes": "validate", "exact_duplicate": "dedup",
                   "near_duplicate": "dedup", "drums_only": "filter", "too_short": "filter",
                   "too_long": "filter", "too_few_notes": "filter"}
#: Size targets per profile: notes per piece (min, max), extra parts for the large profile.
PROFILES = {"small": {"notes": (380, 620), "extra_parts": 0},
            "large": {"notes": (7000, 9000), "extra_parts": 3}}


def variant_kinds() -> tuple[str, ...]:
    """The near-duplicate kinds the generator plants (for the dedup benchmark)."""
    return NEAR_KINDS


# ----------------------------------------------------------------------------- the song model
@dataclass
class Part:
    """One instrument part: ``notes`` are (start_tick, end_tick, pitch, velocity)."""
    name: str
    program: int
    channel: int
    notes: list[tuple[int, int, int, int]]
    track: int = 0  # 0-based index among part tracks (format 1); parts may share a track


@dataclass
class Song:
    """A piece plus how to write it; variants are copies with some fields changed."""
    tpb: int
    tempos: list[tuple[int, int]]           # (tick, microseconds per quarter)
    meter: str
    tonic_pc: int
    mode: str
    parts: list[Part]
    end_tick: int
    title: str = ""
    family: str | None = None
    meter_declared: bool = True
    key_declared: tuple[int, int] | None = None   # (sharps, minor) written to the file
    fmt: int = 1
    note_off: str = "off"                   # "off": 0x8n; "on0": note-on velocity 0
    running_status: bool = False
    eot: bool = True
    tempo_track: int = 0                    # 0: conductor track; 1: first part track
    track_names: bool = True
    extra_meta: list[tuple[int, bytes]] = field(default_factory=list)
    lyrics: list[tuple[int, str]] = field(default_factory=list)
    hanging: list[tuple[int, int, int, int]] = field(default_factory=list)  # (part, tick, pitch, vel)
    division: bytes | None = None           # raw 2-byte division (SMPTE); None: tpb
    corrupt_event: str | None = None        # "status_f4" | "status_f5" | "rs_start"
    controls: list[tuple[int, int, int, int]] = field(default_factory=list)  # (tick, status, d1, d2)

    @property
    def n_notes(self) -> int:
        return sum(len(p.notes) for p in self.parts) + len(self.hanging)


def key_name(tonic_pc: int, mode: str) -> str:
    return f"{TONIC_NAMES[tonic_pc % 12]} {mode}"


def key_signature(tonic_pc: int, mode: str) -> tuple[int, int]:
    """(sharps, minor) of a key; a minor key uses its relative major's signature."""
    major_pc = tonic_pc % 12 if mode == "major" else (tonic_pc + 3) % 12
    return MAJOR_SHARPS[major_pc], int(mode == "minor")


def signature_name(sig: tuple[int, int]) -> str:
    sharps, minor = sig
    major_pc = next(pc for pc, s in MAJOR_SHARPS.items() if s == sharps)
    return key_name((major_pc - 3) % 12 if minor else major_pc, "minor" if minor else "major")


def seconds_at(song: Song, tick: int) -> float:
    """Seconds at ``tick`` through the song's tempo map (SMPTE: 1000 ticks per second)."""
    if song.division is not None:
        return tick / smpte_rate(song.division)
    total, prev_tick, prev_us = 0.0, 0, song.tempos[0][1]
    for t, us in song.tempos[1:]:
        if t >= tick:
            break
        total += (t - prev_tick) * prev_us / (1e6 * song.tpb)
        prev_tick, prev_us = t, us
    return total + (tick - prev_tick) * prev_us / (1e6 * song.tpb)


def smpte_rate(division: bytes) -> int:
    """Ticks per second of a raw SMPTE division (negative frames, ticks per frame)."""
    return -struct.unpack(">b", division[:1])[0] * division[1]


def last_note_end(song: Song) -> int:
    ends = [n[1] for p in song.parts for n in p.notes]
    if song.hanging:
        ends.append(song.end_tick)
    return max(ends, default=0)


# ----------------------------------------------------------------------------- composition
def _scale(mode: str, harmonic: bool) -> tuple[int, ...]:
    if mode == "major":
        return MAJOR_SCALE
    return MINOR_SCALE[:6] + (11,) if harmonic else MINOR_SCALE


def _chord(tonic: int, scale: tuple[int, ...], degree: int, seventh: bool) -> list[int]:
    """Pitch classes of the chord on a scale degree (stacked thirds from the scale)."""
    idx = [degree - 1, degree + 1, degree + 3] + ([degree + 5] if seventh else [])
    return [(tonic + scale[i % 7]) % 12 for i in idx]


def _near(pc: int, around: int) -> int:
    """The pitch of class ``pc`` nearest to ``around``."""
    p = around - ((around - pc) % 12)
    return p + 12 if around - p > 6 else p


@dataclass
class Style:
    """What a style family shares: key, mode, meter, progression, minor colouring."""
    tonic_pc: int
    mode: str
    meter: str
    progression: tuple[int, ...]
    harmonic: bool
    bpm: float


def random_style(rng: random.Random, meter: str | None = None) -> Style:
    mode = "major" if rng.random() < 0.6 else "minor"
    meter = meter or rng.choices(list(METER_WEIGHTS), list(METER_WEIGHTS.values()))[0]
    lo, hi = METERS[meter]["bpm"]
    return Style(rng.randrange(12), mode, meter, rng.choice(PROGRESSIONS[mode]),
                 rng.random() < 0.75, float(rng.randrange(lo, hi + 1)))


def compose(rng: random.Random, style: Style, *, target_notes: int | None = None,
            n_bars: int | None = None, extra_parts: int = 0, tpb: int = 480,
            parts: tuple[str, ...] = ("melody", "chords", "bass", "drums"),
            hats: bool = True) -> Song:
    """Write a piece bar by bar until ``target_notes`` (or ``n_bars``) is reached.

    Downbeats get the loudest velocities and the densest onsets; compound meters place
    bass, chords and kick on each dotted beat and hats on every eighth.
    """
    num, den = (int(x) for x in style.meter.split("/"))
    spec = METERS[style.meter]
    strength, per_beat = spec["strength"], spec["per_beat"]
    pulse = tpb * 4 // den
    bar = pulse * num
    beat = pulse * per_beat
    scale = _scale(style.mode, style.harmonic)
    tonic = style.tonic_pc
    seventh = rng.random() < 0.6
    cells = CELLS_COMPOUND if per_beat == 3 else CELLS_SIMPLE
    comp_style = rng.choice(("strong", "every", "hold"))
    bass_style = rng.choice(("root", "root_fifth", "walk"))
    # melody range: a 12th above a tonic between 60 and 71
    mel_low = 60 + (tonic - 60) % 12
    mel_pitches = [p for p in range(mel_low - 5, mel_low + 20) if (p - tonic) % 12 in scale]
    cur = len(mel_pitches) // 2
    names = {"melody": "Lead", "chords": "Comp", "bass": "Bass", "drums": "Drums",
             "pad": "Pad", "arp": "Arpeggio", "counter": "Counter"}
    roles = list(parts) + ["pad", "arp", "counter"][:extra_parts]
    chans = iter((0, 1, 2, 3, 4, 5, 6, 7, 8, 10, 11))
    song_parts: dict[str, Part] = {}
    for role in roles:
        ch = DRUMS if role == "drums" else next(chans)
        prog = 0 if role == "drums" else rng.choice(PROGRAMS.get(role, PROGRAMS["melody"]))
        song_parts[role] = Part(names[role], prog, ch, [])
    mel = song_parts.get("melody")
    rnd = rng.random
    kick_on_2 = rng.random() < 0.5
    extra_kick = rng.uniform(0.0, 0.3)  # syncopated kicks off the pulse, per piece
    ghost_p = rng.uniform(0.0, 0.15)
    fill_every = rng.choice((4, 8))
    total = 0
    b = 0
    while True:
        if n_bars is not None and b >= n_bars - 1:
            break
        if n_bars is None and total >= (target_notes or 0) and b >= 2:
            break
        t0 = b * bar
        degree = style.progression[b % len(style.progression)]
        chord = _chord(tonic, scale, degree, seventh)
        nxt = _chord(tonic, scale, style.progression[(b + 1) % len(style.progression)], False)
        before = sum(len(p.notes) for p in song_parts.values())
        targets = [i for i, p in enumerate(mel_pitches) if p % 12 in chord]
        if mel is not None:
            pos = 0
            while pos < bar:
                cell = rng.choice(cells)
                if pos + sum(cell) * beat > bar:
                    cell = ((bar - pos) / beat,)
                for frac in cell:
                    ioi = int(round(frac * beat))
                    on_pulse = (pos % pulse) == 0
                    st = strength[pos // pulse] if on_pulse else 0
                    if rng.random() < 0.08 and st < 3:
                        pos += ioi
                        continue
                    if st >= 2 or pos == 0:
                        cur = min(targets, key=lambda i: (abs(i - cur), i))
                    else:
                        step = rng.choice((-2, -1, -1, 1, 1, 2))
                        cur = min(max(cur + step, 0), len(mel_pitches) - 1)
                    vel = ACCENT[st] + int(rnd() * 11) - 5
                    mel.notes.append((t0 + pos, t0 + pos + max(ioi * 9 // 10, 1),
                                      mel_pitches[cur], vel))
                    pos += ioi
        if "chords" in song_parts:
            part = song_parts["chords"]
            if comp_style == "hold":
                hits = [0]
            elif comp_style == "every":
                hits = list(range(0, bar, beat))
            else:
                hits = [i * pulse for i, s in enumerate(strength) if s >= 2]
            base = 55 + rng.randint(-2, 2)
            voicing = sorted(_near(pc, base) for pc in chord)
            for i, h in enumerate(hits):
                end = hits[i + 1] if i + 1 < len(hits) else bar
                st = strength[h // pulse]
                for p in voicing:
                    part.notes.append((t0 + h, t0 + end - pulse // 8, p,
                                       ACCENT[st] - 14 + int(rnd() * 9) - 4))
        if "bass" in song_parts:
            part = song_parts["bass"]
            root = _near(chord[0], 40)
            fifth = _near(chord[2], root + 7)
            if bass_style == "walk":
                hits = list(range(0, bar, beat))
            else:
                hits = [i * pulse for i, s in enumerate(strength) if s >= 2]
            for i, h in enumerate(hits):
                end = hits[i + 1] if i + 1 < len(hits) else bar
                if i == 0:
                    p = root
                elif bass_style == "root":
                    p = root
                elif bass_style == "root_fifth":
                    p = fifth
                elif i == len(hits) - 1:
                    p = _near(nxt[0], root) + rng.choice((-1, 1))
                else:
                    p = _near(rng.choice(chord), root + 4)
                st = strength[h // pulse]
                part.notes.append((t0 + h, t0 + end - pulse // 10, p, ACCENT[st] - 6 + int(rnd() * 9) - 4))
        if "drums" in song_parts:
            part = song_parts["drums"]
            sub = pulse // 2 if per_beat == 1 and den <= 4 else pulse
            fill = (b + 1) % fill_every == 0
            for i, s in enumerate(strength):
                t = t0 + i * pulse
                if s == 3 or (s == 2 and kick_on_2):
                    part.notes.append((t, t + pulse // 4, KICK, ACCENT[s] + int(rnd() * 7) - 3))
                if (per_beat == 1 and s < 3 and (len(strength) == 2 or i % 2 == 1)) or \
                        (per_beat == 3 and s == 2):
                    part.notes.append((t, t + pulse // 4, SNARE, ACCENT[s] + 6 + int(rnd() * 7) - 3))
            if hats:
                for k, t in enumerate(range(0, bar, sub)):
                    st = strength[t // pulse] if t % pulse == 0 else 0
                    if fill and t >= bar - beat:
                        part.notes.append((t0 + t, t0 + t + sub // 2, TOM if k % 2 else TOM + 2,
                                           ACCENT[st] + int(rnd() * 9) - 4))
                    else:
                        part.notes.append((t0 + t, t0 + t + sub // 2, HAT,
                                           ACCENT[st] - 20 + int(rnd() * 9) - 4))
                    if t % pulse and rnd() < ghost_p:
                        part.notes.append((t0 + t, t0 + t + sub // 4, RIM, 40 + rng.randint(0, 12)))
                    if t % pulse and rnd() < extra_kick:
                        part.notes.append((t0 + t, t0 + t + sub // 4, KICK, ACCENT[0] + int(rnd() * 9) - 4))
        for role in roles[len(parts):]:
            part = song_parts[role]
            if role == "pad":
                for p in sorted(_near(pc, 64) for pc in chord):
                    part.notes.append((t0, t0 + bar - pulse // 8, p, 60 + int(rnd() * 9) - 4))
            elif role == "arp":
                tones = sorted(_near(pc, 67) for pc in chord)
                tones += [t + 12 for t in tones]
                step = pulse // 4 if den <= 4 else pulse // 2
                for k, t in enumerate(range(0, bar, step)):
                    st = strength[t // pulse] if t % pulse == 0 else 0
                    part.notes.append((t0 + t, t0 + t + step - step // 8, tones[k % len(tones)],
                                       ACCENT[st] - 24 + int(rnd() * 7) - 3))
            else:  # counter line: chord tones on each beat, an octave below the melody
                for t in range(0, bar, beat):
                    st = strength[t // pulse]
                    part.notes.append((t0 + t, t0 + t + beat * 9 // 10,
                                       _near(rng.choice(chord), 52), ACCENT[st] - 12))
        total += sum(len(p.notes) for p in song_parts.values()) - before
        b += 1
    # final bar: tonic chord, root, melody tonic, kick + crash (the crash is the last note)
    t0 = b * bar
    final = _chord(tonic, scale, 1, False)
    if mel is not None:
        mel.notes.append((t0, t0 + bar - pulse // 4, _near(tonic, mel_pitches[cur]), ACCENT[3]))
    if "chords" in song_parts:
        for p in sorted(_near(pc, 55) for pc in final):
            song_parts["chords"].notes.append((t0, t0 + bar - pulse // 4, p, ACCENT[3] - 10))
    if "bass" in song_parts:
        song_parts["bass"].notes.append((t0, t0 + bar - pulse // 4, _near(tonic, 40), ACCENT[3]))
    for role in roles[len(parts):]:
        if role == "pad":
            for p in sorted(_near(pc, 64) for pc in final):
                song_parts["pad"].notes.append((t0, t0 + bar - pulse // 4, p, 64))
    if "drums" in song_parts:
        song_parts["drums"].notes.append((t0, t0 + pulse // 2, KICK, ACCENT[3]))
        song_parts["drums"].notes.append((t0, t0 + bar // 2, CRASH, ACCENT[3] + 8))
    ordered = [p for p in song_parts.values() if p.notes]
    for i, p in enumerate(ordered):
        p.track = i
    us = int(round(60e6 / style.bpm))
    tempos = [(0, us)]
    if rng.random() < 0.2:  # ritardando into the final bar
        tempos += [(t0 - bar + k * pulse, int(us * (1 + 0.06 * (k + 1)))) for k in range(num)]
    return Song(tpb=tpb, tempos=tempos, meter=style.meter, tonic_pc=tonic, mode=style.mode,
                parts=ordered, end_tick=t0 + bar)


# ----------------------------------------------------------------------------- the SMF writer
_VLQ = []
for _n in range(1 << 14):
    _VLQ.append(bytes((_n,)) if _n < 0x80 else bytes(((_n >> 7) | 0x80, _n & 0x7F)))


def vlq(n: int) -> bytes:
    """A MIDI variable-length quantity (SMF 1.0 spec, 'Variable Length Quantity')."""
    if n < 16384:
        return _VLQ[n]
    out = [n & 0x7F]
    n >>= 7
    while n:
        out.append((n & 0x7F) | 0x80)
        n >>= 7
    return bytes(reversed(out))


def _meta(kind: int, data: bytes) -> bytes:
    return bytes((0xFF, kind)) + vlq(len(data)) + data


def _encode_track(events: list[tuple], end_tick: int, *, running: bool, eot: bool,
                  corrupt: str | None = None) -> bytes:
    """Encode events (tick, 0, 0, meta_bytes, 0) or (tick, prio, status, d1, d2 or -1)."""
    events.sort()
    out = bytearray()
    last_t, rs = 0, -1
    for t, prio, st, d1, d2 in events:
        d = t - last_t
        out += _VLQ[d] if d < 16384 else vlq(d)
        last_t = t
        if not prio:
            out += d1
            rs = -1
            continue
        if st != rs or not running:
            out.append(st)
            rs = st
        if d2 < 0:
            out.append(d1)
        else:
            out.extend((d1, d2))
    if corrupt == "rs_start" and events:
        # a data byte where the first status byte belongs (the first event is a channel event)
        n = len(vlq(events[0][0]))
        del out[n]
    if corrupt in ("status_f4", "status_f5"):
        # an undefined system-common status byte as a new event after a complete event
        out = _insert_after_event(bytes(out), len(out) // 2, 0xF4 if corrupt == "status_f4" else 0xF5)
    if eot:
        d = max(end_tick - last_t, 0)
        out += vlq(d) + b"\xff\x2f\x00"
    return b"MTrk" + struct.pack(">I", len(out)) + bytes(out)


def _insert_after_event(data: bytes, pos: int, status: int) -> bytearray:
    """Re-walk an encoded track and insert ``00 <status> 40 40`` at the first event boundary
    at or after ``pos`` (so the bytes before it stay a valid event stream)."""
    i, rs = 0, 0
    while i < len(data):
        if i >= pos:
            break
        while data[i] & 0x80:
            i += 1
        i += 1
        b = data[i]
        if b == 0xFF:
            i += 2
            ln = 0
            while data[i] & 0x80:
                ln = (ln << 7) | (data[i] & 0x7F)
                i += 1
            ln = (ln << 7) | data[i]
            i += 1 + ln
            continue
        if b & 0x80:
            rs = b
            i += 1
        i += 1 if (rs & 0xF0) in (0xC0, 0xD0) else 2
    return bytearray(data[:i] + bytes((0, status, 0x40, 0x40)) + data[i:])


def render(song: Song) -> bytes:
    """Encode a song as a Standard MIDI File (format 0, 1 or 2), honouring its quirk fields."""
    off_status = 0x80 if song.note_off == "off" else 0x90
    conductor: list[tuple] = []
    if song.title:
        conductor.append((0, 0, 0, _meta(0x03, song.title.encode("utf-8")), 0))
    tempo_events = [(t, 0, 0, _meta(0x51, us.to_bytes(3, "big")), 0) for t, us in song.tempos]
    if song.division is None and song.tempo_track == 0:
        conductor += tempo_events
    if song.meter_declared:
        num, den = (int(x) for x in song.meter.split("/"))
        clocks = 36 if METERS[song.meter]["per_beat"] == 3 else 96 // den
        conductor.append((0, 0, 0, _meta(0x58, bytes((num, den.bit_length() - 1, clocks, 8))), 0))
    if song.key_declared is not None:
        conductor.append((0, 0, 0, _meta(0x59, struct.pack(">bB", *song.key_declared)), 0))
    conductor += [(t, 0, 0, m, 0) for t, m in song.extra_meta]
    n_tracks = max((p.track for p in song.parts), default=-1) + 1
    tracks: list[list[tuple]] = [[] for _ in range(n_tracks)]
    named: set[int] = set()
    for pi, p in enumerate(song.parts):
        ev = tracks[p.track]
        if song.track_names and p.track not in named:
            ev.append((0, 0, 0, _meta(0x03, p.name.encode()), 0))
            named.add(p.track)
        ch = p.channel
        if ch != DRUMS:
            ev.append((0, 1, 0xC0 | ch, p.program, -1))
        on, off = 0x90 | ch, off_status | ch
        off_vel = 64 if off == 0x80 | ch else 0
        for s, e, pitch, vel in p.notes:
            ev.append((s, 3, on, pitch, vel))
            ev.append((e, 2, off, pitch, off_vel))
        for hp, tick, pitch, vel in song.hanging:
            if hp == pi:
                ev.append((tick, 3, on, pitch, vel))
        if pi == 0:
            ev += [(t, 1, st, d1, d2) for t, st, d1, d2 in song.controls]
    if song.division is None and song.tempo_track == 1 and tracks:
        tracks[0] += tempo_events
    if song.lyrics:
        words = [(0, 0, 0, _meta(0x03, b"Words"), 0), (0, 0, 0, _meta(0x01, b"@KMIDI KARAOKE FILE"), 0),
                 (0, 0, 0, _meta(0x01, b"@T" + song.title.encode()), 0)]
        words += [(t, 0, 0, _meta(0x01, w.encode()), 0) for t, w in song.lyrics]
        tracks.append(words)
    if song.fmt == 0:
        merged = conductor + [e for tr in tracks for e in tr]
        chunks = [merged]
    else:
        chunks = [conductor] + tracks
    end = song.end_tick
    body = []
    for i, ev in enumerate(chunks):
        corrupt = song.corrupt_event if i == len(chunks) - 1 and len(chunks) > 1 else None
        if song.fmt == 0:
            corrupt = song.corrupt_event
        if corrupt == "rs_start":
            ev = [e for e in ev if e[1] != 0]  # the track starts with a channel event
        last = i == len(chunks) - 1
        body.append(_encode_track(ev, end, running=song.running_status,
                                  eot=song.eot or not last, corrupt=corrupt))
    division = song.division if song.division is not None else struct.pack(">H", song.tpb)
    header = b"MThd" + struct.pack(">IHH", 6, song.fmt, len(body)) + division
    return header + b"".join(body)


def riff_wrap(smf: bytes) -> bytes:
    """Wrap SMF bytes in a RIFF RMID container (RIFF size, 'RMID', 'data' chunk, even pad)."""
    data = b"data" + struct.pack("<I", len(smf)) + smf + (b"\x00" if len(smf) % 2 else b"")
    return b"RIFF" + struct.pack("<I", 4 + len(data)) + b"RMID" + data


# ----------------------------------------------------------------------------- variants
def _copy(song: Song, **changes: Any) -> Song:
    fresh = {"parts": [replace(p, notes=list(p.notes)) for p in song.parts],
             "tempos": list(song.tempos), "extra_meta": list(song.extra_meta),
             "lyrics": list(song.lyrics), "hanging": list(song.hanging),
             "controls": list(song.controls)}
    fresh.update(changes)
    return replace(song, **fresh)


def _drop_final_crash(song: Song) -> None:
    for p in song.parts:
        if p.channel == DRUMS and p.notes and p.notes[-1][2] == CRASH:
            p.notes.pop()
            return
    raise ValueError("no final crash to drop")


def transposed(song: Song, semitones: int) -> Song:
    """All pitched notes shifted; drums untouched; a declared key signature follows."""
    v = _copy(song, tonic_pc=(song.tonic_pc + semitones) % 12)
    for p in v.parts:
        if p.channel != DRUMS:
            p.notes = [(s, e, pitch + semitones, vel) for s, e, pitch, vel in p.notes]
    if song.key_declared == key_signature(song.tonic_pc, song.mode):  # a default C stays C
        v.key_declared = key_signature(v.tonic_pc, v.mode)
    _drop_final_crash(v)
    return v


def tempo_changed(song: Song, factor: float) -> Song:
    """Every tempo event scaled: ``factor`` < 1 slows the piece down."""
    v = _copy(song)
    v.tempos = [(t, int(round(us / factor))) for t, us in song.tempos]
    _drop_final_crash(v)
    return v


def reorchestrated(song: Song, rng: random.Random) -> Song:
    """New programs, pitched parts moved to other channels and tracks (order shuffled)."""
    v = _copy(song)
    free = [c for c in range(16) if c != DRUMS]
    used = {p.channel for p in song.parts}
    pool = [c for c in free if c not in used] + [c for c in free if c in used]
    pitched = [p for p in v.parts if p.channel != DRUMS]
    new_ch = pool[:len(pitched)]
    rng.shuffle(new_ch)
    for p, ch in zip(pitched, new_ch):
        p.channel = ch
        choices = [x for x in PROGRAMS["chords"] + PROGRAMS["melody"] if x != p.program]
        p.program = rng.choice(choices)
    order = list(range(len(v.parts)))
    rng.shuffle(order)
    for p, t in zip(v.parts, order):
        p.track = t
    _drop_final_crash(v)
    return v


def requantized(song: Song, rng: random.Random, tpb: int) -> Song:
    """Ticks rescaled to another resolution with humanizing jitter (about 2% of a beat)."""
    v = _copy(song, tpb=tpb)
    jit = max(1, tpb // 50)
    scale = tpb / song.tpb
    for p in v.parts:
        notes = []
        for s, e, pitch, vel in p.notes:
            s2 = max(0, int(round(s * scale)) + rng.randint(-jit, jit))
            e2 = max(s2 + 1, int(round(e * scale)) + rng.randint(-jit, jit))
            notes.append((s2, e2, pitch, min(127, max(1, vel + rng.randint(-8, 8)))))
        p.notes = _fix_overlaps(notes)
    v.tempos = [(int(round(t * scale)), us) for t, us in song.tempos]
    v.end_tick = int(round(song.end_tick * scale)) + jit
    _drop_final_crash(v)
    return v


def _fix_overlaps(notes: list[tuple[int, int, int, int]]) -> list[tuple[int, int, int, int]]:
    """Shorten notes so no two of one pitch overlap (keeps order of the list)."""
    by_pitch: dict[int, list[int]] = {}
    for i, n in enumerate(notes):
        by_pitch.setdefault(n[2], []).append(i)
    out = list(notes)
    for idx in by_pitch.values():
        idx.sort(key=lambda i: out[i][0])
        for a, b in zip(idx, idx[1:]):
            s, e, p, vel = out[a]
            if e > out[b][0]:
                out[a] = (s, max(s + 1, out[b][0]), p, vel) if out[b][0] > s else (s, s + 1, p, vel)
    return out


def edited(song: Song, rng: random.Random) -> tuple[Song, dict]:
    """A few percent of notes changed, deleted or inserted; deletions outnumber insertions."""
    v = _copy(song)
    total = song.n_notes
    n_del = max(2, int(total * rng.uniform(0.01, 0.02)))
    n_ins = max(1, n_del // 2 - 1)
    n_chg = max(1, int(total * rng.uniform(0.005, 0.012)))
    mono = [p for p in v.parts if p.name in ("Lead", "Bass")] or [v.parts[0]]
    pitched = [p for p in v.parts if p.channel != DRUMS] or v.parts
    weights = [len(p.notes) for p in pitched]
    changed = 0
    for _ in range(n_chg):  # spread over all pitched notes, never onto a sounding pitch
        p = rng.choices(pitched, weights)[0]
        i = rng.randrange(len(p.notes) - 1)
        s, e, pitch, vel = p.notes[i]
        new = pitch + rng.choice((-2, -1, 1, 2))
        if not any(q[0] < e and s < q[1] and q[2] == new for q in p.notes):
            p.notes[i] = (s, e, new, vel)
            changed += 1
    for _ in range(n_ins):
        p = rng.choice(mono)
        i = rng.randrange(len(p.notes) - 1)
        s, e, pitch, vel = p.notes[i]
        mid = s + (e - s) // 2
        if mid - s < 2:
            continue
        p.notes[i] = (s, mid, pitch, vel)
        p.notes.insert(i + 1, (mid, e, pitch + rng.choice((-2, -1, 1, 2)), vel - 6))
    deleted = 0
    for _ in range(n_del):
        p = rng.choice(v.parts)
        if len(p.notes) > 2:
            p.notes.pop(rng.randrange(len(p.notes) - 1))  # never the part's final note
            deleted += 1
    for p in v.parts:
        p.notes = _fix_overlaps(p.notes)
    while v.n_notes >= total:  # keep the original the richest member of its cluster
        p = max(v.parts, key=lambda q: len(q.notes))
        p.notes.pop(rng.randrange(len(p.notes) - 1))
        deleted += 1
    inserted = v.n_notes - total + deleted
    return v, {"changed": changed, "inserted": inserted, "deleted": deleted,
               "fraction": round((changed + inserted + deleted) / total, 4)}


def excerpt(song: Song, rng: random.Random, fraction: float = 0.85) -> tuple[Song, dict]:
    """A contiguous window of whole bars, about ``fraction`` of the piece, moved to tick 0."""
    num, den = (int(x) for x in song.meter.split("/"))
    bar = song.tpb * 4 // den * num
    n_bars = song.end_tick // bar
    keep = max(1, int(round(n_bars * fraction)))
    first = rng.randint(0, min(n_bars - keep, max(1, n_bars // 10)))
    a, z = first * bar, (first + keep) * bar
    v = _copy(song, end_tick=z - a)
    for p in v.parts:
        p.notes = [(s - a, min(e, z) - a, pitch, vel) for s, e, pitch, vel in p.notes if a <= s < z]
    v.parts = [p for p in v.parts if p.notes]
    in_force = [us for t, us in song.tempos if t <= a][-1]
    v.tempos = [(0, in_force)] + [(t - a, us) for t, us in song.tempos if a < t < z]
    return v, {"fraction": round(keep / n_bars, 3), "start_bar": first, "bars": keep}


def same_content(song: Song, rng: random.Random) -> tuple[Song, list[str]]:
    """Identical notes (pitch, onset, length in beats) under other metadata and layout."""
    options = ["metadata", "track_names", "programs", "velocities", "tempo_track", "format"]
    if all(t % 2 == 0 for p in song.parts for n in p.notes for t in n[:2]) and song.end_tick % 2 == 0:
        options.append("ticks_per_beat")
    changes = sorted(rng.sample(options, rng.randint(1, 3)))
    v = _copy(song)
    for c in changes:
        if c == "metadata":
            v.title = song.title + " (re-upload)" if song.title else "Untitled"
            v.extra_meta.append((0, _meta(0x02, b"(c) workshop archive")))
        elif c == "track_names":
            if rng.random() < 0.5:
                v.track_names = False
            for i, p in enumerate(v.parts):
                p.name = f"Track {i + 1}"
        elif c == "programs":
            for p in v.parts:
                if p.channel != DRUMS:
                    p.program = (p.program + rng.randint(1, 30)) % 128
        elif c == "velocities":
            d = rng.choice((-15, -10, 10))
            for p in v.parts:
                p.notes = [(s, e, pitch, min(127, max(1, vel + d))) for s, e, pitch, vel in p.notes]
        elif c == "tempo_track":
            v.tempo_track = 1 - song.tempo_track
        elif c == "format":
            v.fmt = 0 if song.fmt == 1 else 1
        elif c == "ticks_per_beat":
            k = 2 if song.tpb <= 480 else 0.5
            v.tpb = int(song.tpb * k)
            for p in v.parts:
                p.notes = [(int(s * k), int(e * k), pitch, vel) for s, e, pitch, vel in p.notes]
            v.tempos = [(int(t * k), us) for t, us in song.tempos]
            v.end_tick = int(song.end_tick * k)
    return v, changes


def to_smpte(song: Song, division: bytes = b"\xe7\x28") -> Song:
    """The same performance timed in SMPTE ticks (default -25 fps x 40 = 1000 ticks/s)."""
    rate = smpte_rate(division)
    v = _copy(song, division=division)

    def conv(t: int) -> int:
        return int(round(seconds_at(song, t) * rate))
    for p in v.parts:
        p.notes = [(conv(s), max(conv(s) + 1, conv(e)), pitch, vel) for s, e, pitch, vel in p.notes]
    v.end_tick = conv(song.end_tick)
    return v


# ----------------------------------------------------------------------------- planted files
HTML_PAGE = (b"<!DOCTYPE html>\n<html><head><title>404 Not Found</title></head>\n<body><h1>Not "
             b"Found</h1><p>The requested file was not found on this server.</p></body></html>\n")
PNG_BYTES = b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR\x00\x00\x01\x00\x00\x00\x00\xc0\x08\x02\x00\x00\x00"
TEXT_BYTES = (b"Chord chart (A section)\n| Dm7 | G7 | Cmaj7 | Cmaj7 |\n| Dm7 | G7 | Em7 A7 | "
              b"Dm7 G7 |\nPlay the head twice, then trade fours.\n")


def corrupt_bytes(form: str, song: Song, rng: random.Random) -> bytes:
    """Bytes of one planted corrupt form (CORRUPT_FORMS)."""
    if form == "html":
        return HTML_PAGE
    if form == "png":
        return PNG_BYTES + bytes(rng.randrange(256) for _ in range(200))
    if form == "empty":
        return b""
    if form == "text":
        return TEXT_BYTES
    if form == "format_2":
        return render(replace(song, fmt=2))
    if form in ("status_f4", "status_f5", "running_status_at_track_start"):
        kind = "rs_start" if form == "running_status_at_track_start" else form
        return render(replace(song, corrupt_event=kind))
    data = render(song)
    if form == "cut_mid_track":
        last = data.rfind(b"MTrk")
        return data[:rng.randint(last + 12, len(data) - 4)]
    if form == "garbage_chunk_id":
        second = data.find(b"MTrk", 14 + 8)
        return data[:second] + bytes((0x00, 0xA7, 0x13, 0xFE)) + data[second + 4:]
    if form == "bad_header_length":
        return data[:4] + struct.pack(">I", rng.choice((2, 3, 5))) + data[8:]
    raise ValueError(f"unknown corrupt form {form!r}; expected one of {sorted(sum(CORRUPT_FORMS.values(), ()))}")


def no_notes_song(rng: random.Random, style: Style) -> Song:
    """Meta events and controllers only: tempo, meter, key, programs, volume, pan, pedal."""
    s = compose(rng, style, n_bars=8)
    ch = s.parts[0].channel
    ctl = [(0, 0xB0 | ch, 7, 100), (0, 0xB0 | ch, 10, 64)]
    for k in range(0, s.end_tick, s.tpb * 2):  # sustain pedal down/up, volume swells
        ctl += [(k, 0xB0 | ch, 64, 127), (k + s.tpb, 0xB0 | ch, 64, 0),
                (k + s.tpb // 2, 0xB0 | ch, 11, 60 + (k // s.tpb) % 60)]
    v = _copy(s, controls=ctl, extra_meta=[(0, _meta(0x01, b"placeholder: notes to follow"))])
    for p in v.parts:
        p.notes = []
    v.parts = v.parts[:1]
    return v


# ----------------------------------------------------------------------------- planning
@dataclass
class Out:
    """One file to write, with its truth record (without the relpath)."""
    kind: str
    data: bytes
    truth: dict[str, Any]
    song: Song | None = None
    ext: str = ".mid"
    name_hint: str = ""


def plan_counts(count: int, mix: dict[str, tuple[float, int]]) -> dict[str, int]:
    """How many files of each planted kind; the rest are clean originals."""
    counts = {k: max(m, int(round(f * count))) for k, (f, m) in mix.items()}
    planted = sum(counts.values())
    if planted > count * 0.6:  # too small for the minimums: scale down proportionally
        counts = {k: int(f * count) for k, (f, _) in mix.items()}
    return counts


def _music_truth(song: Song) -> dict[str, Any]:
    return {"tonic": TONIC_NAMES[song.tonic_pc], "tonic_pc": song.tonic_pc, "mode": song.mode,
            "meter": song.meter, "meter_declared": song.meter_declared,
            "key_declared": signature_name(song.key_declared) if song.key_declared else None,
            "bpm": round(60e6 / song.tempos[0][1], 3),
            "duration_s": round(seconds_at(song, last_note_end(song)), 3),
            "notes": song.n_notes, "family": song.family}


def _truth(kind: str, piece: str, variant: str, song: Song | None, *, music: bool = True,
           transform: dict | None = None, quirk: str | None = None,
           defect: str | None = None) -> dict[str, Any]:
    """A truth record; duplicates start as kept and are settled per cluster later."""
    t: dict[str, Any] = {"expect": "kept", "stage": None, "piece": piece, "variant": variant,
                         "duplicate_of": None, "cluster": None, "transform": transform or {},
                         "quirk": quirk, "defect": defect}
    if kind in STAGE_OF_REASON:  # a planted defect or filter case: the kind is the reason
        t.update(expect=kind, stage=STAGE_OF_REASON[kind])
    empty = {"tonic": None, "tonic_pc": None, "mode": None, "meter": None,
             "meter_declared": None, "key_declared": None, "bpm": None, "duration_s": None,
             "notes": None, "family": None}
    t.update(_music_truth(song) if music and song is not None else empty)
    if music and song is not None and not any(p.notes for p in song.parts if p.channel != DRUMS):
        t.update(tonic=None, tonic_pc=None, mode=None)  # no pitched notes, no key
    return t


def _dress(song: Song, rng: random.Random, title: str) -> Song:
    """Choose how an original is written: format, note-offs, declared meter and key."""
    song.title = title
    song.fmt = 0 if rng.random() < 0.1 else 1
    song.note_off = "on0" if rng.random() < 0.5 else "off"
    song.meter_declared = rng.random() < 0.85
    r = rng.random()
    actual = key_signature(song.tonic_pc, song.mode)
    if r < 0.7:
        song.key_declared = actual
    elif r < 0.85 or actual == (0, 0):
        song.key_declared = None
    else:
        song.key_declared = (0, 0)  # a sequencer's default C major, contradicted by the music
    return song


def _piece_rng(seed: int, profile: str, tag: str) -> random.Random:
    return random.Random(f"midisift-synth/{VERSION}/{profile}/{seed}/{tag}")


def build(count: int, seed: int = 0, profile: str = "small",
          mix: dict[str, tuple[float, int]] | None = None) -> tuple[list[Out], list[list[Out]]]:
    """All files of a corpus as bytes plus truth (no names yet), and the duplicate clusters
    (original first). Deterministic."""
    if profile not in PROFILES:
        raise ValueError(f"unknown profile {profile!r}; expected one of {sorted(PROFILES)}")
    if count < 1:
        raise ValueError(f"count must be at least 1, got {count}")
    prof = PROFILES[profile]
    counts = plan_counts(count, mix or DEFAULT_MIX)
    quirk_n = {q: counts.get(q, 0) for q in QUIRKS}
    n_planted = sum(counts.values())
    n_orig = max(1, count - (n_planted - sum(quirk_n.values())))
    plan_rng = _piece_rng(seed, profile, "plan")
    # style families: about 40% of originals share changes, key and meter with 1-3 siblings
    styles: list[tuple[Style, str | None]] = []
    fam = 0
    while len(styles) < n_orig:
        st = random_style(plan_rng)
        size = plan_rng.choice((2, 3, 4)) if plan_rng.random() < 0.2 else 1
        fid = f"F{fam:04d}" if size > 1 else None
        fam += size > 1
        for _ in range(min(size, n_orig - len(styles))):
            lo, hi = METERS[st.meter]["bpm"]
            styles.append((replace(st, bpm=float(min(hi, max(lo, st.bpm + plan_rng.randint(-12, 12))))), fid))
    # the first originals carry the quirks; variants attach to the clean ones (shuffled)
    quirk_slots = [q for q in QUIRKS for _ in range(quirk_n[q])][:n_orig - 1]
    clean = list(range(len(quirk_slots), n_orig))
    plan_rng.shuffle(clean)
    vslots = [k for k in NEAR_KINDS + EXACT_KINDS for _ in range(counts.get(k, 0))]
    attach: dict[int, list[tuple[int, str]]] = {}
    for j, kind in enumerate(vslots):
        attach.setdefault(clean[j % len(clean)], []).append((j, kind))
    outs: list[Out] = []
    clusters: list[list[Out]] = []
    for i, (st, fid) in enumerate(styles):  # one cluster at a time: no Song outlives its loop
        rng = _piece_rng(seed, profile, f"P{i}")
        pid = f"P{i:05d}"
        song = compose(rng, st, target_notes=rng.randint(*prof["notes"]),
                       extra_parts=prof["extra_parts"])
        song.family = fid
        _dress(song, rng, "")
        quirk = quirk_slots[i] if i < len(quirk_slots) else None
        members = [_original_out(pid, song, quirk, rng)]
        for j, kind in attach.get(i, ()):
            members.append(_variant_out(kind, pid, song, _piece_rng(seed, profile, f"{pid}/{kind}/{j}")))
        for m in members:
            m.song = None
        outs.extend(members)
        if len(members) > 1:
            clusters.append(members)
    # corrupt files and filter cases, each from its own fresh piece
    k = 0
    for kind in list(CORRUPT_FORMS) + list(FILTER_KINDS):
        for n in range(counts.get(kind, 0)):
            rng = _piece_rng(seed, profile, f"X{k}")
            pid = f"X{k:05d}"
            k += 1
            outs.append(_planted_out(kind, n, pid, rng))
    return outs, clusters


def _original_out(pid: str, song: Song, quirk: str | None, rng: random.Random) -> Out:
    ext = ".mid"
    if quirk == "running_status":
        song.running_status = True
    elif quirk == "missing_eot":
        song.eot = False
    elif quirk == "hanging_notes":
        lead = song.parts[0]
        s0 = lead.notes[-1][0]
        song.hanging = [(0, s0 + song.tpb // 2, lead.notes[-1][2] + 2, 80),
                        (0, s0 + song.tpb, lead.notes[-1][2] + 4, 80)]
        song.end_tick += song.tpb * 2
    elif quirk == "kar":
        ext = ".kar"
        syll = ("la", "da", "doo", "bop", "shoo", "be", "ya", "oh")
        song.lyrics = [(s, rng.choice(syll) + " ") for s, _, _, _ in song.parts[0].notes]
    elif quirk == "smpte":
        song = to_smpte(song)
    elif quirk == "ext_upper":
        ext = ".MID"
    elif quirk == "ext_midi":
        ext = ".midi"
    data = render(song)
    if quirk == "rmid":
        data, ext = riff_wrap(data), ".rmi"
    t = _truth("original", pid, "original", song, quirk=quirk)
    return Out("original", data, t, song, ext)


def _variant_out(kind: str, pid: str, song: Song, rng: random.Random) -> Out:
    transform: dict[str, Any] = {}
    if kind == "transposed":
        # half are the workshop's Bb (+2) and Eb (-3) parts, the rest any shift
        shift = rng.choice((2, -3)) if rng.random() < 0.5 else rng.choice([s for s in range(-7, 8) if s])
        v = transposed(song, shift)
        transform = {"semitones": shift, "dropped_notes": 1}
    elif kind == "tempo":
        f = rng.choice((0.6, 0.7, 0.75, 0.8, 0.85, 1.15, 1.25))
        v = tempo_changed(song, f)
        transform = {"factor": f, "dropped_notes": 1}
    elif kind == "reorchestrated":
        v = reorchestrated(song, rng)
        transform = {"programs": [p.program for p in v.parts], "channels": [p.channel for p in v.parts],
                     "dropped_notes": 1}
    elif kind == "requantized":
        tpb = rng.choice([t for t in (96, 120, 192, 240, 384, 960) if t != song.tpb])
        v = requantized(song, rng, tpb)
        transform = {"ticks_per_beat": tpb, "jitter_ticks": max(1, tpb // 50), "dropped_notes": 1}
    elif kind == "edited":
        v, transform = edited(song, rng)
    elif kind == "excerpt":
        v, transform = excerpt(song, rng)
    elif kind == "same_content":
        v, changes = same_content(song, rng)
        transform = {"changes": changes}
    else:  # exact_copy
        v = song
    data = render(v)
    if kind == "same_content" and data == render(song):  # e.g. tempo track moved in format 0
        v.title = "Untitled (re-upload)"
        transform["changes"] = sorted(set(transform["changes"]) | {"metadata"})
        data = render(v)
    variant = "exact_copy" if kind == "exact_copy" else kind
    t = _truth(kind, pid, variant, v, transform=transform)
    t["family"] = song.family
    return Out(kind, data, t, v)


def settle_cluster(members: list[tuple[Out, str]]) -> None:
    """Name the member dedup keeps (most notes, longest, smallest sha256, smallest relpath)
    and mark the others exact or near duplicates of it."""
    pid = members[0][0].truth["piece"]
    exact = [(m, rel) for m, rel in members if m.kind in ("original",) + EXACT_KINDS]
    winner, wrel = min(exact, key=lambda mr: (-mr[0].truth["notes"], -mr[0].truth["duration_s"],
                                              hashlib.sha256(mr[0].data).hexdigest(), mr[1]))
    for m, rel in members:
        m.truth["cluster"] = pid
        if m is winner:
            m.truth.update(expect="kept", stage=None, duplicate_of=None)
            continue
        code = "exact_duplicate" if any(m is e for e, _ in exact) else "near_duplicate"
        m.truth.update(expect=code, stage=STAGE_OF_REASON[code], duplicate_of=wrel)


def _planted_out(kind: str, n: int, pid: str, rng: random.Random) -> Out:
    if kind in CORRUPT_FORMS:
        forms = CORRUPT_FORMS[kind]
        form = forms[n % len(forms)]
        song = _dress(compose(rng, random_style(rng), n_bars=10), rng, "")
        song.fmt = 1
        data = corrupt_bytes(form, song, rng)
        return Out(kind, data, _truth(kind, pid, "corrupt", None, music=False, defect=form), None,
                   ".mid", form)
    if kind == "no_notes":
        song = _dress(no_notes_song(rng, random_style(rng)), rng, "")
    elif kind == "drums_only":
        style = random_style(rng)
        song = compose(rng, style, target_notes=rng.randint(250, 400), parts=("drums",))
        song = _dress(song, rng, "")
        song.key_declared = None
    elif kind == "too_short":  # three bars at 200 BPM: 3.6 s, about 60 notes
        style = replace(random_style(rng, "4/4"), bpm=200.0)
        song = compose(rng, style, n_bars=3)
        song.tempos = song.tempos[:1]
        song = _dress(song, rng, "")
    elif kind == "too_long":
        style = replace(random_style(rng, "4/4"), bpm=40.0)
        song = _dress(compose(rng, style, n_bars=250, hats=False), rng, "")
        song.tempos = song.tempos[:1]
    else:  # too_few_notes: a random 24-note tune lasting 10 s (each one different)
        style = random_style(rng, "4/4")
        song = compose(rng, style, n_bars=7, parts=("melody",))
        tpb, scale = song.tpb, _scale(style.mode, style.harmonic)
        notes, t, deg = [], 0, rng.randrange(7)
        for _ in range(24):
            dur = rng.choice((1, 1, 2, 2, 3, 4)) * tpb // 2
            deg = min(max(deg + rng.choice((-2, -1, 1, 2, 3)), 0), 13)
            pitch = 60 + style.tonic_pc + scale[deg % 7] + 12 * (deg // 7)
            notes.append((t, t + dur * 9 // 10, pitch, ACCENT[3 if t % (4 * tpb) == 0 else 1]))
            t += dur
        song.parts[0].notes = notes
        song.tempos, song.end_tick = [(0, int(round(10e6 * tpb / t)))], t
        song = _dress(song, rng, "")
    return Out(kind, render(song), _truth(kind, pid, kind, song), song)


# ----------------------------------------------------------------------------- naming
VOLUNTEERS = ("ines", "marek", "tomoko", "delia", "rafael", "oskar", "priya", "wendell",
              "hana", "jules", "bram", "ngozi", "zoë")
TITLE_A = ("Blue", "Late", "Copper", "Harbor", "Quiet", "Velvet", "Crooked", "Midnight", "Paper",
           "Saffron", "Rainy", "Amber", "Lazy", "Hollow", "Silver", "Gentle", "Northern", "Little")
TITLE_B = ("Lantern", "Bridge", "Shuffle", "Parade", "Mood", "Avenue", "Sketch", "Blues",
           "Waltz", "Steps", "Window", "Ferry", "Garden", "Stroll", "Kitchen", "Signal", "Porch")
CORRUPT_NAMES = {"html": "download (1)", "png": "cover_scan", "empty": "untitled",
                 "text": "chord_chart"}


def _slug(title: str, rng: random.Random) -> str:
    return title.lower().replace(" ", "_") if rng.random() < 0.6 else title


def name_files(outs: list[Out], naming: str, seed: int) -> list[str]:
    """Relative paths for all files (unique); ``plain`` or the ``workshop`` scenario."""
    rng = random.Random(f"midisift-synth/names/{seed}/{naming}")
    order = list(range(len(outs)))
    rng.shuffle(order)
    paths: list[str] = [""] * len(outs)
    taken: set[str] = set()

    def claim(i: int, stem: str, ext: str) -> None:
        path, k = stem + ext, 2
        while path.lower() in taken:
            path, k = f"{stem} ({k}){ext}", k + 1
        taken.add(path.lower())
        paths[i] = path
    if naming == "plain":
        specials = {0: "{d}/nested/deeper/{n}", 1: "{d}/{n} copy", 2: "{d}/Übung für {n}"}
        for pos, i in enumerate(order):
            d, n = f"d{pos // 1000:03d}", f"f{pos:06d}"
            claim(i, specials.get(pos, "{d}/{n}").format(d=d, n=n), outs[i].ext)
        return paths
    if naming != "workshop":
        raise ValueError(f"unknown naming {naming!r}; expected 'plain' or 'workshop'")
    titles: dict[str, str] = {}
    pool = [f"{a} {b}" for a in TITLE_A for b in TITLE_B]
    rng.shuffle(pool)
    for pos, i in enumerate(order):
        o = outs[i]
        piece = o.truth["piece"]
        if piece not in titles:
            titles[piece] = pool[len(titles)] if len(titles) < len(pool) else f"Tune {len(titles)}"
        title = titles[piece]
        who = VOLUNTEERS[rng.randrange(len(VOLUNTEERS))]
        year = 2016 + rng.randrange(8)
        tr = o.truth["transform"]
        if o.kind == "original":
            where = rng.choice((f"volunteers/{who}", f"sessions/{year}", f"sessions/{year}",
                                f"sessions/{year}/spring/week {rng.randint(1, 9)}"))
            stem = f"{where}/{_slug(title, rng)}"
            if piece == "P00002":
                stem = f"volunteers/zoë/Café {title}"
        elif o.kind == "exact_copy":
            stem = f"volunteers/{who}/{_slug(title, rng)}"
        elif o.kind == "same_content":
            stem = f"volunteers/{who}/{_slug(title, rng)} v2"
        elif o.kind == "transposed":
            inst = {2: "Bb", -10: "Bb", 9: "Eb", -3: "Eb"}.get(tr["semitones"], f"{tr['semitones']:+d}")
            folder = f"{inst} instruments" if inst in ("Bb", "Eb") else "transposed"
            stem = f"practice/{folder}/{_slug(title, rng)} ({inst})"
        elif o.kind == "tempo":
            stem = f"practice/{'slow' if tr['factor'] < 1 else 'fast'}/{_slug(title, rng)}_{int(tr['factor'] * 100)}pct"
        elif o.kind == "reorchestrated":
            stem = f"volunteers/{who}/{_slug(title, rng)} (organ trio)"
        elif o.kind == "requantized":
            stem = f"sessions/{year}/live takes/{_slug(title, rng)}_live"
        elif o.kind == "edited":
            stem = f"volunteers/{who}/{_slug(title, rng)}_fixed"
        elif o.kind == "excerpt":
            stem = f"volunteers/{who}/{_slug(title, rng)}_head_only"
        elif o.kind in CORRUPT_FORMS:
            stem = f"uploads/inbox/{CORRUPT_NAMES.get(o.name_hint, _slug(title, rng))}"
        else:
            stem = f"uploads/inbox/{_slug(title, rng)}"
        claim(i, stem, o.ext)
    return paths


# ----------------------------------------------------------------------------- entry points
#: ``planted`` is below this: the rest of the corpus are the originals the planted variants copy.
PLANTED_MAX = 0.6


def planted_problem(planted: float) -> str | None:
    """Why ``planted`` cannot be used (it must be a fraction from 0 to below ``PLANTED_MAX``)."""
    if 0 <= planted < PLANTED_MAX:
        return None
    return (f"the planted fraction must be from 0 to below {PLANTED_MAX}, got {planted}: the rest "
            "of the files are the originals that the planted variants copy")


def scale_mix(mix: dict[str, tuple[float, int]], planted: float) -> dict[str, tuple[float, int]]:
    """The mix with its fractions scaled to add up to ``planted`` (``planted_problem``)."""
    problem = planted_problem(planted)
    if problem:
        raise ValueError(problem)
    total = sum(f for f, _ in mix.values())
    return {k: (f * planted / total, m if planted else 0) for k, (f, m) in mix.items()}


def generate(out_dir: Path, count: int, seed: int = 0, profile: str = "small",
             mix: dict[str, tuple[float, int]] | None = None, naming: str = "plain",
             planted: float | None = None) -> dict:
    """Write ``count`` files and ``truth.json`` into ``out_dir``; return the truth dict.

    ``mix`` maps a planted kind to (fraction of the corpus, minimum count); see
    ``DEFAULT_MIX`` (about 33% planted files and 3% kept quirks). ``planted`` rescales the
    mix to that total fraction (0 gives only clean originals).
    """
    out_dir = Path(out_dir)
    if planted is not None:
        mix = scale_mix(mix or DEFAULT_MIX, planted)
    outs, clusters = build(count, seed, profile, mix)
    paths = name_files(outs, naming, seed)
    rel_of = {id(o): rel for o, rel in zip(outs, paths)}
    for members in clusters:
        settle_cluster([(m, rel_of[id(m)]) for m in members])
    files: dict[str, dict] = {}
    for o, rel in zip(outs, paths):
        files[rel] = dict(o.truth)
        path = out_dir / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(o.data)
    gen: dict[str, Any] = {"count": len(outs), "seed": seed, "profile": profile,
                           "naming": naming, "version": VERSION}
    if mix is not None:
        gen["mix"] = {k: list(v) for k, v in sorted(mix.items())}
    truth = {"generator": gen,
             "files": dict(sorted(files.items()))}
    (out_dir / "truth.json").write_text(json.dumps(truth, indent=1, ensure_ascii=False) + "\n",
                                        encoding="utf-8")
    return truth


def main_synth(out_dir: Path, count: int, seed: int, profile: str = "small",
               naming: str = "plain", planted: float | None = None, *, force: bool = False) -> dict:
    """CLI entry: generate and return a short summary (counts per expected outcome).

    A folder that already holds anything is refused unless ``force``: generating writes
    ``truth.json`` and numbered files that would overwrite a user's own. Nothing is ever
    deleted, with or without ``force``."""
    out_dir = Path(out_dir)
    if not force and out_dir.is_dir() and any(out_dir.iterdir()):
        raise UsageError(f"the folder is not empty; synth writes truth.json and {count} files "
                         "into it and would overwrite files of the same names. Choose a new "
                         "folder, or pass --force to write into it anyway (nothing is deleted)",
                         file=str(out_dir))
    if out_dir.exists() and not out_dir.is_dir():
        raise UsageError("this path is a file, not a folder", file=str(out_dir))
    problem = planted is not None and planted_problem(planted)
    if problem:
        raise UsageError(f"--planted: {problem}")
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise UsageError(f"cannot create the folder ({e.strerror}); choose a folder you may "
                         "write to", file=str(out_dir)) from None
    try:
        truth = generate(Path(out_dir), count, seed, profile, naming=naming, planted=planted)
    except OSError as e:
        raise OutputError(f"cannot write the corpus ({e.strerror}); the files written so far "
                          "stay", file=e.filename or str(out_dir)) from None
    summary: dict[str, int] = {}
    for t in truth["files"].values():
        summary[t["expect"]] = summary.get(t["expect"], 0) + 1
    return {"out_dir": str(out_dir), "files": len(truth["files"]), "expect": summary}


def iter_valid(truth: dict) -> Iterable[tuple[str, dict]]:
    """The (relpath, record) pairs that the validate stage should accept."""
    return ((p, t) for p, t in truth["files"].items() if t["stage"] != "validate")
