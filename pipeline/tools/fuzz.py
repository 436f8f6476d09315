"""Fuzzing the decoder and the per-file stages: valid SMF files, mutated, each must get a verdict.

A case is a valid Standard MIDI File built from drawn parts (format 0/1, metrical or SMPTE
division, notes with stacked same-key overlaps, running status, both note-off forms, program and
control changes, pitch bend, aftertouch, tempo/meter/key/text metas, sysex), then optionally
mutated: bit flips, byte overwrites, truncation, lying chunk lengths, huge (or over-long)
variable-length deltas, running status without a status, zero-length tracks, garbage after the
last track, a wrong track count, spliced byte ranges, or plain random bytes.

``check_case`` holds each case to three properties:

1. exactly one verdict: the validate stage returns one ``StageResult`` (kept, or dropped with a
   reason code of the contract and a sentence); no exception escapes;
2. a kept piece also goes through every per-file stage and corpus ``prepare`` of the default
   config without an exception;
3. a file still *valid* after mutation (kept with no repair, read by mido without error, with
   the same number of tracks and no meta type mido does not know, see ``_comparable_tracks``)
   decodes to the same notes as the reference decoder (mido, with the note policy documented
   in ``pipeline.midi.decode``).

The same generator is driven by hypothesis (``smf_cases()``, shrinkable; used by
tests/test_fuzz.py) or by a seeded ``random.Random`` (``random_case``; fast, for long runs and
for whole-run tests). ``python -m pipeline.tools.fuzz --minutes 10`` runs the long fuzz and prints
the cases tried, verdicts per reason and any escape (saved under ``--save``).
"""
from __future__ import annotations

import argparse
import io
import json
import random
import sys
import time
import traceback
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Protocol

from ..midi.encode import vlq

#: Reason codes the validate stage may give (the decoder's DecodeError codes + its own).
VALIDATE_REASONS = frozenset({"not_midi", "truncated", "bad_chunk", "bad_event", "unsupported_format",
                              "too_large", "no_notes", "needs_repair"})
MUTATIONS = ("bit_flip", "byte_set", "truncate", "chunk_length", "huge_delta", "no_status",
             "zero_track", "garbage_tail", "track_count", "splice", "random_bytes")
#: Over-long and huge variable-length deltas used by the ``huge_delta`` mutation.
HUGE_DELTAS = (b"\xff\xff\xff\x7f",  # 0x0FFFFFFF, the largest legal delta (SMF 1.0)
               b"\x81\x80\x80\x80\x00",  # five bytes: longer than SMF allows
               b"\xc0\x80\x80\x00", b"\x87\xff\xff\x7f")


class Draw(Protocol):
    """What the generator needs from its source of choices (hypothesis or random)."""

    def int(self, lo: int, hi: int) -> int: ...
    def bool(self, p: float = 0.5) -> bool: ...
    def bytes(self, lo: int, hi: int) -> bytes: ...


class RandomDraw:
    """Choices from a seeded ``random.Random`` (fast; no shrinking)."""

    def __init__(self, rng: random.Random):
        self.rng = rng

    def int(self, lo: int, hi: int) -> int:
        return self.rng.randint(lo, hi)

    def bool(self, p: float = 0.5) -> bool:
        return self.rng.random() < p

    def bytes(self, lo: int, hi: int) -> bytes:
        return bytes(self.rng.randrange(256) for _ in range(self.rng.randint(lo, hi)))


class HypothesisDraw:
    """Choices from a hypothesis ``draw`` (shrinkable)."""

    def __init__(self, draw: Callable):
        from hypothesis import strategies as st
        self.draw, self.st = draw, st

    def int(self, lo: int, hi: int) -> int:
        return self.draw(self.st.integers(lo, hi))

    def bool(self, p: float = 0.5) -> bool:
        return self.draw(self.st.integers(0, 999)) < p * 1000

    def bytes(self, lo: int, hi: int) -> bytes:
        return self.draw(self.st.binary(min_size=lo, max_size=hi))


# ---------------------------------------------------------------------------------------------
# valid files


@dataclass
class Doc:
    """A file as header fields plus tracks of (delta bytes, event bytes) pairs."""

    fmt: int
    division: int
    tracks: list[list[tuple[bytes, bytes]]] = field(default_factory=list)
    ntrks: int | None = None  # declared track count (None: the real count)
    lengths: dict[int, int] = field(default_factory=dict)  # track index -> declared length

    def to_bytes(self) -> bytes:
        n = len(self.tracks) if self.ntrks is None else self.ntrks
        out = bytearray(b"MThd" + (6).to_bytes(4, "big") + self.fmt.to_bytes(2, "big")
                        + n.to_bytes(2, "big") + self.division.to_bytes(2, "big"))
        for i, events in enumerate(self.tracks):
            body = b"".join(d + e for d, e in events)
            declared = self.lengths.get(i, len(body))
            out += b"MTrk" + declared.to_bytes(4, "big") + body
        return bytes(out)


def _meta(kind: int, payload: bytes) -> bytes:
    return bytes([0xFF, kind]) + vlq(len(payload)) + payload


def _track(d: Draw, channel: int, conductor: bool) -> list[tuple[bytes, bytes]]:
    """One valid track: absolute-time events sorted, then written with deltas (and maybe
    running status, never across a meta or sysex event, which cancel it per SMF 1.0)."""
    timed: list[tuple[int, int, bytes]] = []  # (tick, order, event bytes with status)
    if d.bool(0.3):
        timed.append((0, 0, _meta(0x03, d.bytes(0, 12))))  # track name
    if conductor:
        timed.append((0, 0, _meta(0x51, d.int(1, 0xFFFFFF).to_bytes(3, "big"))))
        timed.append((0, 0, _meta(0x58, bytes([d.int(1, 12), d.int(0, 5), 24, 8]))))
        timed.append((0, 0, _meta(0x59, bytes([d.int(-7, 7) & 0xFF, d.int(0, 1)]))))
        for _ in range(d.int(0, 3)):
            timed.append((d.int(0, 4000), 0, _meta(0x51, d.int(1, 0xFFFFFF).to_bytes(3, "big"))))
    tick = 0
    note_off_form = d.bool()
    for _ in range(d.int(0 if conductor else 1, 24)):
        tick += d.int(0, 480) if d.bool(0.8) else d.int(0, 200_000)
        what = d.int(0, 19)
        if what < 13:  # a note
            pitch, dur, vel = d.int(0, 127), d.int(1, 960), d.int(1, 127)
            timed.append((tick, 2, bytes([0x90 | channel, pitch, vel])))
            off = (bytes([0x80 | channel, pitch, d.int(0, 127)]) if note_off_form
                   else bytes([0x90 | channel, pitch, 0]))
            timed.append((tick + dur, 1, off))
        elif what == 13:
            timed.append((tick, 1, bytes([0xC0 | channel, d.int(0, 127)])))
        elif what == 14:
            timed.append((tick, 1, bytes([0xB0 | channel, d.int(0, 127), d.int(0, 127)])))
        elif what == 15:
            timed.append((tick, 1, bytes([0xE0 | channel, d.int(0, 127), d.int(0, 127)])))
        elif what == 16:
            timed.append((tick, 1, bytes([0xD0 | channel, d.int(0, 127)])))
        elif what == 17:
            timed.append((tick, 1, bytes([0xA0 | channel, d.int(0, 127), d.int(0, 127)])))
        elif what == 18:
            data = bytes(b & 0x7F for b in d.bytes(0, 8)) + b"\xf7"
            timed.append((tick, 1, b"\xf0" + vlq(len(data)) + data))
        else:
            timed.append((tick, 1, _meta(0x01, d.bytes(0, 10))))
    timed.sort(key=lambda e: (e[0], e[1]))  # note-offs before note-ons at one tick
    running = d.bool(0.6)
    events: list[tuple[bytes, bytes]] = []
    last, status = 0, 0
    for t, _, ev in timed:
        st = ev[0]
        if running and st < 0xF0 and st == status:
            ev = ev[1:]
        status = st if st < 0xF0 else 0
        events.append((vlq(t - last), ev))
        last = t
    events.append((vlq(d.int(0, 100)), b"\xff\x2f\x00"))
    return events


def valid_doc(d: Draw) -> Doc:
    """A valid, repair-free SMF 1.0 file with at least one note."""
    fmt = d.int(0, 1)
    if d.bool(0.1):
        fps, tpf = (24, 25, 29, 30)[d.int(0, 3)], d.int(1, 120)
        division = ((256 - fps) << 8) | tpf
    else:
        division = d.int(1, 0x7FFF)
    n = 1 if fmt == 0 else d.int(1, 4)
    tracks = [_track(d, d.int(0, 15) if fmt == 1 else d.int(0, 15), conductor=(i == 0 and n > 1))
              for i in range(n)]
    if fmt == 1 and n > 1 and not any(len(t) > 5 for t in tracks[1:]):
        tracks.append(_track(d, 0, conductor=False))
    return Doc(fmt, division, tracks)


# ---------------------------------------------------------------------------------------------
# mutations

def _event_mutation(d: Draw, doc: Doc, kind: str) -> None:
    ti = d.int(0, len(doc.tracks) - 1)
    events = doc.tracks[ti]
    if not events and kind in ("huge_delta", "no_status"):
        return
    if kind == "huge_delta":
        k = d.int(0, len(events) - 1)
        delta = HUGE_DELTAS[d.int(0, len(HUGE_DELTAS) - 1)] if d.bool(0.6) else vlq(d.int(0, 0x0FFFFFFF))
        events[k] = (delta, events[k][1])
    elif kind == "no_status":
        for k, (delta, ev) in enumerate(events):
            if ev and 0x80 <= ev[0] < 0xF0:
                events[k] = (delta, ev[1:])
                break
    elif kind == "zero_track":
        doc.tracks.insert(d.int(0, len(doc.tracks)), [])
    elif kind == "chunk_length":
        true = len(b"".join(a + b for a, b in events))
        doc.lengths[ti] = (max(0, true + d.int(-8, 8)) if d.bool(0.7) else d.int(0, 0xFFFFFFFF))
    elif kind == "track_count":
        doc.ntrks = d.int(0, 8) if d.bool(0.8) else d.int(0, 0xFFFF)


def _byte_mutation(d: Draw, data: bytes, kind: str) -> bytes:
    buf = bytearray(data)
    if not buf and kind not in ("garbage_tail", "random_bytes"):
        return data
    if kind == "bit_flip":
        for _ in range(d.int(1, 8)):
            i = d.int(0, len(buf) - 1)
            buf[i] ^= 1 << d.int(0, 7)
    elif kind == "byte_set":
        for _ in range(d.int(1, 4)):
            buf[d.int(0, len(buf) - 1)] = d.int(0, 255)
    elif kind == "truncate":
        del buf[d.int(0, len(buf) - 1):]
    elif kind == "garbage_tail":
        buf += d.bytes(1, 64)
    elif kind == "splice":
        i = d.int(0, len(buf) - 1)
        j = min(len(buf), i + d.int(1, 32))
        if d.bool():
            del buf[i:j]
        else:
            buf[i:i] = buf[i:j]
    elif kind == "random_bytes":
        buf = bytearray((b"MThd" if d.bool() else b"") + d.bytes(0, 80))
    return bytes(buf)


_STRUCTURAL = ("huge_delta", "no_status", "zero_track", "chunk_length", "track_count")


def make_case(d: Draw, mutate: bool = True, kinds: tuple[str, ...] | None = None
              ) -> tuple[bytes, tuple[str, ...]]:
    """(file bytes, names of the mutations applied): a valid file, mutated 0-3 times (or by
    exactly ``kinds``)."""
    doc = valid_doc(d)
    applied: list[str] = []
    if kinds is None:
        kinds = tuple(MUTATIONS[d.int(0, len(MUTATIONS) - 1)] for _ in range(d.int(0, 3))) if mutate else ()
    for kind in kinds:
        if kind in _STRUCTURAL:
            _event_mutation(d, doc, kind)
            applied.append(kind)
    data = doc.to_bytes()
    for kind in kinds:
        if kind not in _STRUCTURAL:
            data = _byte_mutation(d, data, kind)
            applied.append(kind)
    return data, tuple(applied)


def random_case(rng: random.Random, mutate: bool = True, kinds: tuple[str, ...] | None = None
                ) -> tuple[bytes, tuple[str, ...]]:
    """A case from a seeded generator (no hypothesis needed)."""
    return make_case(RandomDraw(rng), mutate, kinds)


def smf_cases(mutate: bool = True):
    """Hypothesis strategy of (bytes, mutation names) cases."""
    from hypothesis import strategies as st

    @st.composite
    def cases(draw):
        return make_case(HypothesisDraw(draw), mutate)
    return cases()


# ---------------------------------------------------------------------------------------------
# the properties

def reference_rows(data: bytes) -> list[tuple] | None:
    """Note rows (start, end, pitch, velocity, channel, program, track) read with mido under
    the note policy of ``pipeline.midi.decode``, or None when mido cannot read the file."""
    import mido
    try:
        mid = mido.MidiFile(file=io.BytesIO(data))
    except Exception:  # noqa: BLE001 - any mido failure means "not valid for the reference"
        return None
    rows = []
    for ti, track in enumerate(mid.tracks):
        tick, progs, opened = 0, [0] * 16, {}
        for msg in track:
            tick += msg.time
            if msg.type == "program_change":
                progs[msg.channel] = msg.program
            elif msg.type == "note_on" and msg.velocity > 0:
                opened.setdefault((msg.channel, msg.note), []).append((tick, msg.velocity, progs[msg.channel]))
            elif msg.type in ("note_on", "note_off"):
                cur = opened.pop((msg.channel, msg.note), None)
                if not cur:
                    continue
                closed = [c for c in cur if c[0] != tick]
                keep = [c for c in cur if c[0] == tick]
                rows += [(s, tick, msg.note, v, msg.channel, g, ti) for s, v, g in closed]
                if closed and keep:
                    opened[(msg.channel, msg.note)] = keep
        for (ch, pitch), cur in opened.items():
            rows += [(s, tick, pitch, v, ch, g, ti) for s, v, g in cur if s != tick]
    return sorted(rows)


def _comparable_tracks(data: bytes) -> int | None:
    """Track count mido reads, or None when mido cannot serve as the reference for this file:
    it fails, or it meets a meta type it does not know (mido 1.3's ``build_meta_message``
    returns ``UnknownMetaMessage`` without its delta time, shifting every later event; found by
    the long fuzz run: a legal 0x08 "program name" meta after a 2315-tick delta)."""
    import mido
    try:
        mid = mido.MidiFile(file=io.BytesIO(data))
    except Exception:  # noqa: BLE001
        return None
    if any(isinstance(m, mido.UnknownMetaMessage) for t in mid.tracks for m in t):
        return None
    if _running_status_after_sysex(data):
        return None
    return len(mid.tracks)


def _read_vlq(data: bytes, i: int, end: int) -> tuple[int, int]:
    """A variable-length quantity at ``i``: (value, next position); IndexError past ``end``."""
    value = 0
    for _ in range(4):
        if i >= end:
            raise IndexError(i)
        b = data[i]
        i += 1
        value = (value << 7) | (b & 0x7F)
        if b < 0x80:
            return value, i
    return value, i


#: Data bytes of a channel message by the status's high nibble.
_DATA_BYTES = {0x8: 2, 0x9: 2, 0xA: 2, 0xB: 2, 0xC: 1, 0xD: 1, 0xE: 2}


def _running_status_after_sysex(data: bytes) -> bool:
    """Whether a track has an event without a status byte right after a sysex or escape
    event (or the file cannot be walked): policies differ there. SMF 1.0 says a sysex cancels
    running status; ``pipeline.midi.decode`` keeps the channel status in force (README, decoder
    policy), while mido 1.3 takes the sysex as the running status and reads the byte after
    the first data byte as a sysex length (found by the long fuzz run: a note whose note-off,
    by running status after a sysex, only our decoder saw; mido left the note hanging)."""
    try:
        i = 8 + int.from_bytes(data[4:8], "big")  # past the MThd chunk
        while i + 8 <= len(data):
            kind, size = data[i:i + 4], int.from_bytes(data[i + 4:i + 8], "big")
            i, end = i + 8, min(len(data), i + 8 + size)
            running, after_sysex = 0, False
            while kind == b"MTrk" and i < end:
                _, i = _read_vlq(data, i, end)
                status = data[i]
                if status < 0x80:  # data bytes first: the running status in force
                    if after_sysex or not running:
                        return True
                    i += _DATA_BYTES[running >> 4]
                elif status == 0xFF:  # meta (mido keeps running status across it, as we do)
                    length, i = _read_vlq(data, i + 2, end)
                    i += length
                elif status in (0xF0, 0xF7):
                    length, i = _read_vlq(data, i + 1, end)
                    i += length
                    after_sysex = True
                elif status > 0xF0:
                    return True
                else:
                    running, after_sysex = status, False
                    i += 1 + _DATA_BYTES[status >> 4]
            i = end
    except IndexError:
        return True
    return False


@dataclass
class Verdict:
    """What one case got: the validate verdict and whether notes were compared."""

    reason: str  # "kept" or a reason code
    compared: bool
    memory: bool = False  # a stage ran out of memory (too_large in a run)


class Checker:
    """Holds the stages of a config and checks cases against the three properties."""

    def __init__(self, stage_configs: list[tuple[str, dict]] | None = None,
                 reference: Callable[[bytes], list | None] = reference_rows):
        from ..config import validate_stage_options
        from ..stages import stage_class
        from ..stages.base import bind_stages
        from .defaults import default_stages
        # the default config's stages (its corpus stages only ``prepare`` here)
        configs = stage_configs or [next(iter(s.items())) for s in default_stages()]
        self.stages = bind_stages([stage_class(n)(validate_stage_options(n, o, n)) for n, o in configs])
        self.reference = reference

    def check(self, data: bytes) -> Verdict:
        """Apply the properties to one file (through the workers' own pass,
        ``engine.worker.file_pass``); an AssertionError or any exception is a finding."""
        from ..engine.worker import file_pass
        try:
            done = file_pass(self.stages, data, "fuzz.mid", "0" * 64)
        except MemoryError:
            # in a run the worker's memory limit turns this into a too_large drop (not an
            # escape), but a small file that needs that much memory is worth a look
            return Verdict("too_large", False, memory=True)
        result, piece = done.results[self.stages[0].name], done.piece
        assert isinstance(result["kept"], bool) and result["detail"], "a verdict needs a sentence"
        if not result["kept"]:
            assert piece is None and result["reason"] in VALIDATE_REASONS, result["reason"]
            return Verdict(result["reason"], False)
        assert piece is not None and result["reason"] is None
        assert (piece.notes["end"] > piece.notes["start"]).all()
        errors = [r["detail"] for r in done.results.values() if r["reason"] == "stage_error"]
        assert not errors, errors[0]
        compared = False
        if not piece.repairs:
            ref = self.reference(data)
            if ref is not None and _comparable_tracks(data) == piece.n_tracks:
                ours = sorted(tuple(int(r[f]) for f in ("start", "end", "pitch", "velocity", "channel",
                                                         "program", "track")) for r in piece.notes)
                assert ours == ref, "notes differ from the reference decoder (mido)"
                compared = True
        return Verdict("kept", compared)


# ---------------------------------------------------------------------------------------------
# the long run

def long_run(minutes: float, seed: int, save: Path | None, engine: str = "random",
             report_every: float = 60.0) -> dict[str, Any]:
    """Fuzz for ``minutes``; returns counts (cases, verdicts per reason, comparisons, escapes)."""
    checker = Checker()
    stop = time.monotonic() + minutes * 60
    stats: dict[str, Any] = {"cases": 0, "compared": 0, "escapes": 0, "memory": 0, "verdicts": Counter(),
                             "mutations": Counter(), "seed": seed, "engine": engine}
    rng = random.Random(seed)
    next_report = time.monotonic() + report_every

    def save_case(kind: str, n: int, data: bytes, text: str) -> None:
        if save is not None:
            save.mkdir(parents=True, exist_ok=True)
            (save / f"{kind}-{n:04d}.mid").write_bytes(data)
            (save / f"{kind}-{n:04d}.txt").write_text(text)

    def one(data: bytes, applied: tuple[str, ...]) -> None:
        stats["cases"] += 1
        for m in applied or ("none",):
            stats["mutations"][m] += 1
        try:
            v = checker.check(data)
        except Exception as exc:  # noqa: BLE001 - a finding: record it and go on
            stats["escapes"] += 1
            stats["verdicts"]["ESCAPE"] += 1
            save_case("escape", stats["escapes"], data, "".join(traceback.format_exception(exc)))
            return
        stats["verdicts"][v.reason] += 1
        stats["compared"] += v.compared
        if v.memory:
            stats["memory"] += 1
            save_case("memory", stats["memory"], data, "a per-file stage raised MemoryError\n")

    if engine == "hypothesis":
        from hypothesis import HealthCheck, Phase, given, settings

        @settings(max_examples=2000, deadline=None, database=None, phases=[Phase.generate],
                  suppress_health_check=list(HealthCheck))
        @given(smf_cases())
        def batch(case):
            if time.monotonic() < stop:
                one(*case)

        while time.monotonic() < stop:
            batch()
            if time.monotonic() > next_report:
                print(_line(stats), file=sys.stderr, flush=True)
                next_report += report_every
    else:
        while time.monotonic() < stop:
            for _ in range(200):
                one(*random_case(rng))
            if time.monotonic() > next_report:
                print(_line(stats), file=sys.stderr, flush=True)
                next_report += report_every
    stats["minutes"] = minutes
    return stats


def _line(stats: dict) -> str:
    return (f"{stats['cases']} cases, {stats['compared']} compared with mido, "
            f"{stats['escapes']} escapes, {stats['memory']} memory blow-ups")


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m pipeline.tools.fuzz", description=__doc__.split("\n")[0])
    p.add_argument("--minutes", type=float, default=10.0)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--engine", choices=("random", "hypothesis"), default="random",
                   help="random: fast seeded generator; hypothesis: the CI strategies, longer")
    p.add_argument("--save", default="fuzz-findings", help="folder for escaping cases")
    p.add_argument("--json", dest="json_out", help="also write the figures as JSON")
    args = p.parse_args(argv)
    t0 = time.monotonic()
    stats = long_run(args.minutes, args.seed, Path(args.save), args.engine)
    elapsed = time.monotonic() - t0
    print(f"fuzz ({args.engine}, seed {args.seed}): {stats['cases']} cases in {elapsed / 60:.1f} min, "
          f"{stats['compared']} valid after mutation and compared with mido, {stats['escapes']} escapes, "
          f"{stats['memory']} memory blow-ups in a per-file stage (too_large in a run)")
    for reason, n in stats["verdicts"].most_common():
        print(f"  {reason:<20}{n:>10}")
    print("mutations applied: " + ", ".join(f"{k} {v}" for k, v in sorted(stats["mutations"].items())))
    if args.json_out:
        Path(args.json_out).write_text(json.dumps(
            {**stats, "verdicts": dict(stats["verdicts"]), "mutations": dict(stats["mutations"]),
             "elapsed_s": round(elapsed, 1)}, indent=2) + "\n")
    return 1 if stats["escapes"] else 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
