"""The two array encodings of a decoded piece: a piano roll and performance events.

**Piano roll**: a time x pitch array of velocities (uint8, 0 = silent). A frame is ``step``
seconds, or ``1/per_beat`` of a quarter-note beat (counted in ticks, so tempo changes move the
frames with the music). The roll ends with the note that ends last (its end frame, exclusive;
held by the pedal with ``sustain``); pretty_midi's ends at the last event of any kind. A note covers the frames from the one holding its start up to, not
including, the one holding its end (as pretty_midi's ``get_piano_roll`` does), and at least
the frame of its start, so no note vanishes; where notes overlap a cell keeps the loudest.
The sustain pedal (control change 64) is ignored unless asked for (``sustain=True``): then a
note sounding in the frame where its track's pedal on its channel goes down (a value of 64 or
more after one below) or struck while it is down sounds on up to the frame where it comes up
(a value below 64), exclusive, as pretty_midi's ``get_piano_roll`` holds it with its default
``pedal_threshold=64`` (the running maximum of each pitch between pedal-down and pedal-up). A
pedal is a track's and channel's, whatever the program: pretty_midi's belongs to an instrument
(track, channel and program), so where the program changes while the pedal is down the two
differ: here the pedal-up lifts the pedal that went down before the change; in pretty_midi the
pedal-down stays with the old program's instrument and the pedal-up goes to the new one's, and
neither holds a note (where each instrument already has an ended note: pretty_midi gives the
controllers before that to every instrument of the track and channel). Nor is it the channel's alone as a synthesizer would merge it: in some
POP909 files the MELODY and BRIDGE tracks share the PIANO track's channel and carry pedal
values that never come up, and merged they cut its pedal short. A pedal that never comes up holds nothing, as in pretty_midi (files
whose pedal events are all pedal-down exist: held, every note would sound to the end). The drum
channel is never sustained.

**Performance events** (Oore, Simon, Dieleman, Eck, Simonyan 2018, "This time with feeling:
learning expressive musical performance"): 128 NOTE_ON, 128 NOTE_OFF, TIME_SHIFT tokens of 1 to
``max_shift_steps`` steps and VELOCITY tokens of ``velocity_bins`` bins (the paper: 10 ms steps up
to 1 s, 32 bins: 388 tokens). Times are rounded to the step; a note that would round to nothing
takes the step its start falls in, so no note is lost and both its ends stay within a step; at
one time, note-offs come before note-ons (each in pitch order); a VELOCITY token comes before a
NOTE_ON only when the bin changes. The encoding has one voice per pitch, so the notes of a pitch
(from every track and channel) become the union of their sounding times, struck again at every
onset: a note ends at the next onset of its pitch or where that union falls silent (two notes of
one pitch and onset are one, the longer, with its velocity).
"""
from __future__ import annotations

from typing import Any

import numpy as np

from ..midi.piece import DRUM_CHANNEL, Piece

#: Bump when the arrays an encoding gives for the same file and options change.
ENCODING_VERSION = 1


# piano roll ------------------------------------------------------------------------------
def note_frames(piece: Piece, notes: np.ndarray, *, step: float | None = None,
                per_beat: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """First and end frame (exclusive) of each note; every note covers at least one frame."""
    if per_beat is not None:
        scale = per_beat / float(piece.ticks_per_beat)
        on = np.floor(notes["start"] * scale + 1e-9).astype(np.int64)
        off = np.floor(notes["end"] * scale + 1e-9).astype(np.int64)
    else:
        assert step is not None
        # the tiny offset keeps a note on a frame boundary (0.15 s / 0.05) in its own frame
        on = np.floor(notes["start_s"] / step + 1e-9).astype(np.int64)
        off = np.floor(notes["end_s"] / step + 1e-9).astype(np.int64)
    return on, np.maximum(off, on + 1)


#: A sustain-pedal value from which the pedal is down (the MIDI convention, and pretty_midi's
#: default ``pedal_threshold``).
PEDAL_DOWN = 64


def tick_frames(piece: Piece, ticks: np.ndarray, *, step: float | None = None,
                per_beat: int | None = None) -> np.ndarray:
    """The frame holding each tick position, as ``note_frames`` places a note's start."""
    ticks = np.asarray(ticks, dtype=np.int64)
    if per_beat is not None:
        return np.floor(ticks * (per_beat / float(piece.ticks_per_beat)) + 1e-9).astype(np.int64)
    assert step is not None
    return np.floor(piece.ticks_to_seconds(ticks) / step + 1e-9).astype(np.int64)


def pedal_spans(piece: Piece, *, step: float | None = None,
                per_beat: int | None = None) -> dict[tuple[int, int], tuple[np.ndarray, np.ndarray]]:
    """Per (track, channel), the frames where the sustain pedal goes down and where it comes
    up next (sorted, disjoint); a pedal never lifted is left out (module doc)."""
    c = piece.controls
    cc = c[(c["kind"] == 0xB0) & (c["data1"] == 64)]
    out: dict[tuple[int, int], tuple[np.ndarray, np.ndarray]] = {}
    for track, ch in sorted(set(zip(cc["track"].tolist(), cc["channel"].tolist()))):
        ev = cc[(cc["track"] == track) & (cc["channel"] == ch)]  # in file order: ticks ascend
        down = ev["data2"] >= PEDAL_DOWN
        before = np.concatenate(([False], down[:-1]))
        ends = ev["tick"][~down & before]  # each comes after its own pedal-down
        if not len(ends):
            continue
        starts = ev["tick"][down & ~before][:len(ends)]
        out[(track, ch)] = (tick_frames(piece, starts, step=step, per_beat=per_beat),
                        tick_frames(piece, ends, step=step, per_beat=per_beat))
    return out


def sustained(on: np.ndarray, off: np.ndarray, track: np.ndarray, channel: np.ndarray,
              spans: dict[tuple[int, int], tuple[np.ndarray, np.ndarray]]) -> np.ndarray:
    """The end frames (exclusive) of notes given by frames once the pedal ``spans`` of their
    (track, channel) hold them: a note that covers a frame of a span (sounding at its
    pedal-down or struck before its pedal-up) ends no earlier than the span's pedal-up. A long
    note may cross several spans; the last one it reaches decides."""
    off = off.copy()
    for (tr, ch), (down, up) in spans.items():
        sel = np.flatnonzero((track == tr) & (channel == ch))
        if not len(sel):
            continue
        k = np.searchsorted(down, off[sel], side="left") - 1  # last span starting before the end
        reached = k >= 0
        sel, k = sel[reached], k[reached]
        held = up[k] > on[sel]  # ... and the note starts before its pedal-up
        sel, k = sel[held], k[held]
        off[sel] = np.maximum(off[sel], up[k])
    return off


def roll_of(on: np.ndarray, off: np.ndarray, pitch: np.ndarray, velocity: np.ndarray,
            frames: int, low: int = 0, high: int = 127) -> np.ndarray:
    """A frames x (high - low + 1) uint8 roll of notes given by frames; notes outside the
    pitch range are left out, overlapping notes keep the loudest velocity."""
    width = high - low + 1
    roll = np.zeros((frames, width), dtype=np.uint8)
    inside = (pitch >= low) & (pitch <= high)
    on, off = on[inside], np.minimum(off[inside], frames)
    lengths = np.maximum(off - on, 0)
    total = int(lengths.sum())
    if total:
        first = np.repeat(on - np.cumsum(lengths) + lengths, lengths)
        rows = first + np.arange(total)
        cols = np.repeat(pitch[inside].astype(np.int64) - low, lengths)
        vel = np.repeat(np.clip(velocity[inside], 0, 127).astype(np.uint8), lengths)
        np.maximum.at(roll, (rows, cols), vel)
    return roll


def pianoroll(piece: Piece, *, step: float | None = None, per_beat: int | None = None,
              low: int = 0, high: int = 127, drums: str = "omit",
              sustain: bool = False) -> tuple[np.ndarray, np.ndarray | None]:
    """The piece's pitched roll (frames x pitches low..high) and, with ``drums="apart"``, its
    drum-channel roll (frames x 128, by drum key) over the same frames; else None for drums.
    With ``sustain`` the pedal holds the pitched notes (module doc); the roll then reaches the
    end of the last note as held (a pedal-up after the last note-off lengthens it)."""
    notes = piece.notes
    is_drum = notes["channel"] == DRUM_CHANNEL
    on, off = note_frames(piece, notes, step=step, per_beat=per_beat)
    counted = np.ones(len(notes), bool) if drums == "apart" else ~is_drum
    if sustain:
        spans = {k: v for k, v in pedal_spans(piece, step=step, per_beat=per_beat).items()
                 if k[1] != DRUM_CHANNEL}
        off = sustained(on, off, notes["track"], notes["channel"], spans)
    frames = int(off[counted].max()) if counted.any() else 0
    pitch, vel = notes["pitch"], notes["velocity"]
    p = ~is_drum
    pitched = roll_of(on[p], off[p], pitch[p], vel[p], frames, low, high)
    if drums != "apart":
        return pitched, None
    return pitched, roll_of(on[is_drum], off[is_drum], pitch[is_drum], vel[is_drum], frames)


def windows(roll: np.ndarray, size: int, hop: int) -> np.ndarray:
    """Fixed-length windows (n x size x width) starting every ``hop`` frames, enough to cover
    the whole roll; the last one and a roll shorter than ``size`` are padded with silence."""
    frames = roll.shape[0]
    n = 1 if frames <= size else -(-(frames - size) // hop) + 1
    padded = np.zeros((max(frames, (n - 1) * hop + size), roll.shape[1]), dtype=roll.dtype)
    padded[:frames] = roll
    return np.stack([padded[s:s + size] for s in range(0, n * hop, hop)])


# performance events ----------------------------------------------------------------------
def vocabulary(max_shift_steps: int, velocity_bins: int, step: float) -> dict[str, Any]:
    """The token table of the event encoding, written as vocabulary.json beside the shards."""
    shift0 = 256
    vel0 = shift0 + max_shift_steps
    tokens = ([f"NOTE_ON_{p}" for p in range(128)] + [f"NOTE_OFF_{p}" for p in range(128)]
              + [f"TIME_SHIFT_{i + 1}" for i in range(max_shift_steps)]
              + [f"VELOCITY_{b}" for b in range(velocity_bins)])
    return {
        "encoding": "performance events (Oore et al. 2018, 'This time with feeling')",
        "size": len(tokens),
        "step_s": step,
        "ranges": {"note_on": [0, 128], "note_off": [128, 256],
                   "time_shift": [shift0, vel0], "velocity": [vel0, vel0 + velocity_bins]},
        "time_shift": "TIME_SHIFT_k advances time by k steps of step_s seconds",
        "velocity": f"VELOCITY_b sets the velocity of later notes to bin b of {velocity_bins} "
                    f"equal bins of 0-127 (decoded as the bin's middle)",
        "tokens": tokens,
    }


def encode_events(start_s: np.ndarray, end_s: np.ndarray, pitch: np.ndarray, velocity: np.ndarray, *,
                  step: float, max_shift_steps: int, velocity_bins: int) -> np.ndarray:
    """Notes (seconds, pitch, velocity) as an int16 token sequence (see the module doc)."""
    on = np.rint(np.asarray(start_s) / step).astype(np.int64)
    off = np.rint(np.asarray(end_s) / step).astype(np.int64)
    # a note that rounds to nothing takes the step its start falls in (both ends stay within
    # one step of the note's)
    short = off <= on
    on[short] = np.floor(np.asarray(start_s)[short] / step).astype(np.int64)
    off[short] = on[short] + 1
    pitch = np.asarray(pitch).astype(np.int64)
    vel = np.clip(np.asarray(velocity).astype(np.int64), 0, 127)
    # one stream per pitch: the union of its notes, struck again at every onset (a note ends
    # at the next onset of its pitch or where the union of its pitch's notes falls silent)
    order = np.lexsort((off, on, pitch))
    on, off, pitch, vel = on[order], off[order], pitch[order], vel[order]
    if len(on):
        base = pitch * (int(off.max()) + 1)
        reach = np.maximum.accumulate(base + off) - base
        same = np.append(pitch[1:] == pitch[:-1], False)
        nxt = np.where(same, np.append(on[1:], 0), np.iinfo(np.int64).max)
        off = np.minimum(reach, nxt)
        keep = off > on
        on, off, pitch, vel = on[keep], off[keep], pitch[keep], vel[keep]
    n = len(on)
    if n == 0:
        return np.zeros(0, dtype=np.int16)
    # events: offs (kind 0) before ons (kind 1) at one time, each by pitch
    times = np.concatenate([off, on])
    kinds = np.concatenate([np.zeros(n, np.int64), np.ones(n, np.int64)])
    pitches = np.concatenate([pitch, pitch])
    vbin = np.concatenate([np.full(n, -1), vel * velocity_bins // 128])
    ev = np.lexsort((pitches, kinds, times))
    times, kinds, pitches, vbin = times[ev], kinds[ev], pitches[ev], vbin[ev]
    dt = np.diff(times, prepend=0)
    n_shift = -(-dt // max_shift_steps)
    ons = np.flatnonzero(kinds == 1)
    vel_tok = np.zeros(len(times), bool)
    on_bins = vbin[ons]
    vel_tok[ons] = np.concatenate(([True], on_bins[1:] != on_bins[:-1]))
    count = n_shift + vel_tok + 1
    end = np.cumsum(count)
    start = end - count
    out = np.empty(int(end[-1]), dtype=np.int16)
    shift0, vel0 = 256, 256 + max_shift_steps
    out[end - 1] = np.where(kinds == 1, pitches, 128 + pitches)
    out[(end - 2)[vel_tok]] = vel0 + vbin[vel_tok]
    total = int(n_shift.sum())
    if total:
        idx = np.repeat(np.arange(len(times)), n_shift)
        k = np.arange(total) - np.repeat(np.cumsum(n_shift) - n_shift, n_shift)
        last = k == n_shift[idx] - 1
        size = np.where(last, dt[idx] - (n_shift[idx] - 1) * max_shift_steps, max_shift_steps)
        out[start[idx] + k] = shift0 + size - 1
    return out


def decode_events(tokens: np.ndarray, *, step: float, max_shift_steps: int,
                  velocity_bins: int) -> np.ndarray:
    """Tokens back to notes: an array of (start_s, end_s, pitch, velocity) rows sorted by
    (start, pitch). A NOTE_ON of a sounding pitch ends it first; a NOTE_OFF of a silent pitch
    is ignored; notes still sounding at the end end there."""
    shift0, vel0 = 256, 256 + max_shift_steps
    now, velocity = 0, 64
    sounding: dict[int, tuple[int, int]] = {}
    rows: list[tuple[float, float, int, int]] = []
    for tok in np.asarray(tokens).tolist():
        if tok < 128:
            if tok in sounding:
                s, v = sounding.pop(tok)
                rows.append((s * step, now * step, tok, v))
            sounding[tok] = (now, velocity)
        elif tok < 256:
            if tok - 128 in sounding:
                s, v = sounding.pop(tok - 128)
                rows.append((s * step, now * step, tok - 128, v))
        elif tok < vel0:
            now += tok - shift0 + 1
        elif tok < vel0 + velocity_bins:
            b = tok - vel0
            velocity = min(127, (2 * b + 1) * 128 // (2 * velocity_bins))
        else:
            raise ValueError(f"token {tok} is outside the vocabulary of {vel0 + velocity_bins} tokens")
    for p, (s, v) in sounding.items():
        rows.append((s * step, now * step, p, v))
    rows.sort(key=lambda r: (r[0], r[2]))
    return np.array(rows, dtype=np.float64).reshape(-1, 4)


def events(piece: Piece, *, step: float, max_shift_steps: int, velocity_bins: int,
           drums: str = "omit") -> tuple[np.ndarray, np.ndarray | None]:
    """The piece's pitched notes as tokens and, with ``drums="apart"``, its drum-channel notes
    as a second token sequence (else None)."""
    notes = piece.notes
    is_drum = notes["channel"] == DRUM_CHANNEL

    def enc(sel: np.ndarray) -> np.ndarray:
        n = notes[sel]
        return encode_events(n["start_s"], n["end_s"], n["pitch"], n["velocity"], step=step,
                             max_shift_steps=max_shift_steps, velocity_bins=velocity_bins)
    return enc(~is_drum), (enc(is_drum) if drums == "apart" else None)
