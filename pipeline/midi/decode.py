"""Standard MIDI File decoder: bytes -> ``Piece``, strict by default, with named repairs.

``decode`` walks the file once: chunk layout first (size limit checked before anything is
read, every declared length bounded by the bytes that remain), then one tight event loop per
MTrk chunk that builds flat note columns, converted to numpy once per file; seconds come from
the global tempo map through the vectorized ``ticks_to_seconds``.

Compiled fast path: where the optional C extension ``pipeline.midi._smf_accel`` (this part of it
in pipeline/midi/csrc/decode.c, built by setup.py when a C compiler is present; plain CPython C
API, no dependency) imports, the
per-track loop and the note table (sort and tempo-map seconds) run in C with exactly the
semantics of ``read_track``, ``_note_table`` and ``ticks_to_seconds``. The C loop builds no
messages: where the Python loop would raise, it gives up and ``read_track`` re-runs that track
and raises the exact ``DecodeError``. ``MIDISIFT_PURE_PYTHON=1`` in the environment (read at
import) forces the pure-Python path, for the decoder and the encoder's group tracks alike;
``decode(..., accelerated=False)`` (or ``True``) picks a path per call, so tests compare both in
one process; ``accel.HAVE_ACCEL`` says whether the extension is built, ``accel.USE_ACCEL`` which path is
the default. tests/test_smf_accel.py holds both paths to the same ``Piece`` and errors.
``accel.USE_ACCEL`` also switches the compiled per-file analyses (``accel.compiled_analyses``: key
histogram, meter accents, filter measures, shingles, content hash, transposed tables), each
equal bit for bit to its numpy formulation, which stays the specification.

Why a decoder of our own rather than a C++ backend: channels, track indices and honest repair
counts are part of our contract (drum handling, ``explain``), and the backend tried does not
expose channels nor track indices and silently drops hanging notes; mido stays the reference in
tests. The measurements behind this, and pure against compiled, are in DEVELOPERS.md (Bench
notes).

Policies (chosen to match pretty_midi 0.2.x ``_load_instruments``, the reference in tests):

* Note-on with velocity 0 is a note-off (legal SMF, not a repair).
* Overlapping notes of the same pitch and channel in one track are stacked; the next note-off
  closes every open note of that key that started at an earlier tick, and a note that started
  at the note-off's own tick stays open if another note was closed by it.
* Zero-length notes (note-off at the note-on's tick, nothing else to close) are dropped and
  counted as ``zero_length_notes_dropped`` (pretty_midi drops them silently); so is a note still
  open at the end of its track whose key had a note-off at the note-on's own tick: a zero-length
  note written note-off first (``track.OFF_FIRST``; pretty_midi drops every note left open).
  Any other note left open is closed at the track's last event (``hanging_notes_closed``).
* Note-offs with no open note are ignored (as pretty_midi does).
* ``program`` is the program in force on the channel *at note-on*, reset to 0 at the start of
  every track (pretty_midi also resets per track but reads the program at note-off).
* Tempo changes in any track apply to the whole file (format 1 semantics); at equal ticks the
  later track wins. Tempo events in SMPTE files are ignored (time is absolute there).
* Running status is kept across meta and sysex events (as mido does for meta events), because
  real files rely on it; the spec says those cancel it.

Kept besides notes (for the normalized output): the other channel events (control change,
pitch bend, channel and polyphonic aftertouch, program change) as ``Piece.controls``, in file
order per track, and the text-like metas (``piece.TEXT_METAS``: text, copyright, lyric, marker,
cue point; .kar files are plain SMF) as ``Piece.texts``, payloads as bytes.

Legal features handled without counting: running status, velocity-0 note-offs, sysex and
escape events (skipped, length bounded),
SMPTE division (``smpte=True``; seconds = ticks / (frames/s x ticks/frame) exactly, with
``ticks_per_beat`` = half the ticks per second so one 120 BPM tempo reproduces them; for 29.97
fps the single tempo is the nearest whole microsecond). The counted repairs are in ``REPAIRS``.

Limits: ``max_bytes`` is checked before anything is read; ``max_tracks`` against the header;
``max_events`` after each track (a track cannot hold more events than half its bytes, so the
work done before the check is bounded by ``max_bytes``).
"""
from __future__ import annotations


from pathlib import Path
from typing import NoReturn

import numpy as np

from ..errors import DecodeError
from . import accel
from .piece import (CONTROL_DTYPE, DEFAULT_TEMPO, KEY_DTYPE, METER_DTYPE, NOTE_DTYPE,
                    TEMPO_DTYPE, Piece, ticks_to_seconds)
from .track import read_track

__all__ = ["decode", "decode_file", "REPAIRS", "DEFAULT_LIMITS", "describe_repairs"]

#: The record layout ``accel.module.note_table`` writes (packed, native): NOTE_DTYPE as it is.
_C_NOTE_LAYOUT: bool = NOTE_DTYPE.itemsize == 42 and all(
    NOTE_DTYPE.fields[name][1] == off and NOTE_DTYPE.fields[name][0] == np.dtype(kind)
    for name, off, kind in (("start", 0, np.int64), ("end", 8, np.int64), ("start_s", 16, np.float64),
                            ("end_s", 24, np.float64), ("pitch", 32, np.int16),
                            ("velocity", 34, np.int16), ("channel", 36, np.int16),
                            ("program", 38, np.int16), ("track", 40, np.int16)))

#: Repair name -> (what it means, how the sentence reads with a count ``{n}``; ``{s}`` is a
#: plural "s").
REPAIRS: dict[str, tuple[str, str]] = {
    "riff_unwrapped": ("RIFF/RMID container: the SMF inside its 'data' chunk was read",
                       "unwrapped the RIFF (RMID) container"),
    "missing_end_of_track": ("a track chunk ends without an end-of-track meta event",
                             "{n} track{s} had no end-of-track event"),
    "hanging_notes_closed": ("notes still sounding at the end of a track, closed at the "
                             "track's last event tick", "closed {n} hanging note{s}"),
    "zero_length_notes_dropped": ("note-off at the note-on's own tick, or just before it and "
                                  "no other (written note-off first); the note is dropped "
                                  "(pretty_midi's behaviour)", "dropped {n} zero-length note{s}"),
    "unknown_meta_skipped": ("meta events of a type the SMF 1.0 spec does not define",
                             "skipped {n} unknown meta event{s}"),
    "unknown_chunks_skipped": ("chunks other than MTrk between tracks, skipped as the spec "
                               "requires", "skipped {n} unknown chunk{s}"),
    "trailing_bytes_ignored": ("bytes after the last declared track (count = bytes)",
                               "ignored {n} byte{s} after the last track"),
    "format0_multitrack": ("format 0 header with more than one track; read as format 1",
                           "read a multi-track format 0 file as format 1"),
}

DEFAULT_LIMITS = {"max_bytes": 16_000_000, "max_events": 2_000_000, "max_tracks": 1024}
#: The most tracks a file may have, whatever ``max_tracks`` says: the note table numbers a
#: note's track as a 16-bit signed integer (``NOTE_DTYPE``'s ``track``), tracks 0..32767.
MOST_TRACKS = 32768

#: Meta types defined by SMF 1.0 (+ RP-019 SMPTE offset, RP-017 port): skipped silently.
#: SMPTE frame-rate byte (negated) -> frames per second; 29 means 30 drop-frame = 29.97 fps.
_SMPTE_FPS = {24: 24.0, 25: 25.0, 29: 30000 / 1001, 30: 30.0}


def describe_repairs(repairs: dict[str, int]) -> str:
    """One human phrase per repair, joined with '; ' (empty string when there are none)."""
    return "; ".join(REPAIRS[k][1].format(n=v, s="" if v == 1 else "s") if k in REPAIRS else f"{k} ({v})"
                     for k, v in sorted(repairs.items()) if v)


def _looks_like(data: bytes) -> str:
    """A guess at what a non-MIDI file is, for the not_midi message."""
    head = data[:512].lstrip()
    low = head[:64].lower()
    if low.startswith((b"<!doctype html", b"<html", b"<?xml", b"<head", b"<body")):
        return "it looks like an HTML/XML page (a download that returned a web page?)"
    if data.startswith(b"\x89PNG"):
        return "it is a PNG image"
    if data.startswith((b"\xff\xd8\xff", b"GIF8")):
        return "it is an image"
    if data.startswith(b"PK\x03\x04"):
        return "it is a ZIP archive; unpack it first"
    if data.startswith(b"ID3") or data[:4] in (b"OggS", b"fLaC"):
        return "it is an audio file, not MIDI"
    if data.startswith(b"RIFF"):
        return f"it is a RIFF file of type {data[8:12]!r}, not RMID"
    if data[:1] == b"\xf0":
        return ("it starts with a SysEx message (byte f0): a raw SysEx dump (.syx) saved under "
                "a MIDI name, not a Standard MIDI File")
    if head and all(32 <= c < 127 or c in (9, 10, 13) for c in head[:256]):
        return "it looks like a text file"
    return f"it starts with bytes {data[:4].hex(' ')}"


def _unwrap_riff(data: bytes, source: str) -> tuple[int, int]:
    """(start, end) of the SMF inside a RIFF RMID container (little-endian chunk sizes)."""
    n = len(data)
    if n < 12 or data[8:12] != b"RMID":
        raise DecodeError("not_midi", "a MIDI file must start with 'MThd' (or a RIFF 'RMID' "
                          f"container), but {_looks_like(data)}", file=source, offset=0)
    p = 12
    while p + 8 <= n:
        cid = data[p:p + 4]
        size = int.from_bytes(data[p + 4:p + 8], "little")
        if cid == b"data":
            if p + 8 + size > n:
                raise DecodeError("truncated", f"the RIFF 'data' chunk declares {size} bytes but "
                                  f"only {n - p - 8} remain after byte {p + 8}; the file was "
                                  "probably cut off", file=source, offset=p)
            return p + 8, p + 8 + size
        p += 8 + size + (size & 1)  # RIFF chunks are padded to even length
    raise DecodeError("bad_chunk", "the RIFF RMID container has no 'data' chunk holding the "
                      "MIDI file; it is probably damaged", file=source, offset=12)


def decode(data: bytes, *, source: str = "", size: int | None = None,
           max_bytes: int = DEFAULT_LIMITS["max_bytes"],
           max_events: int = DEFAULT_LIMITS["max_events"], max_tracks: int = DEFAULT_LIMITS["max_tracks"],
           accelerated: bool | None = None) -> Piece:
    """Decode SMF bytes into a ``Piece``.

    Raises ``DecodeError`` with code ``not_midi``, ``bad_chunk``, ``truncated``, ``bad_event``,
    ``unsupported_format`` or ``too_large``; ``offset`` is the absolute byte offset in ``data``.
    ``accelerated``: None uses ``accel.USE_ACCEL``; True the compiled track loop (ValueError when it
    is not built); False the pure-Python loop. Both give the same ``Piece`` and errors.
    ``size``: the file's size when ``data`` is only its first ``max_bytes + 1`` bytes (the size
    a ``too_large`` verdict states).
    """
    if accelerated is None:
        accelerated = accel.USE_ACCEL
    elif accelerated and not accel.HAVE_ACCEL:
        raise ValueError("accelerated=True, but pipeline.midi._smf_accel is not built (no C compiler "
                         "when midisift was installed?); reinstall with a compiler or pass False")
    n_all = len(data)
    if max(n_all, size or 0) > max_bytes:
        _over_max_bytes(max(n_all, size or 0), max_bytes, source)
    if n_all == 0:
        raise DecodeError("not_midi", "the file is empty (0 bytes); a MIDI file starts with "
                          "'MThd'", file=source, offset=0)
    data = bytes(data)
    repairs: dict[str, int] = {}
    pos, end = 0, n_all
    if data[:4] == b"RIFF":
        pos, end = _unwrap_riff(data, source)
        repairs["riff_unwrapped"] = 1
    if data[pos:pos + 8] == b"SMF2CLIP":
        raise DecodeError("unsupported_format", "this is a MIDI 2.0 clip file (it starts with "
                          "'SMF2CLIP'), not a Standard MIDI File; only SMF formats 0 and 1 are "
                          "read", file=source, offset=pos)
    if data[pos:pos + 4] != b"MThd":
        raise DecodeError("not_midi", "a MIDI file must start with 'MThd', but "
                          f"{_looks_like(data[pos:end])}", file=source, offset=pos)
    if pos + 8 > end:
        raise DecodeError("truncated", f"the file ends after {end - pos} bytes, inside the 14-byte "
                          "MThd header; it was probably cut off", file=source, offset=pos)
    hlen = int.from_bytes(data[pos + 4:pos + 8], "big")
    if hlen < 6:
        raise DecodeError("bad_chunk", f"the MThd header length must be at least 6, but it is "
                          f"{hlen}; the file is damaged", file=source, offset=pos + 4)
    if pos + 8 + hlen > end:
        if hlen > 0xFFFF:
            raise DecodeError("bad_chunk", f"the MThd header declares {hlen} bytes (6 expected); "
                              "the header is damaged", file=source, offset=pos + 4)
        raise DecodeError("truncated", f"the MThd header declares {hlen} bytes but only "
                          f"{end - pos - 8} remain after byte {pos + 8}; the file was probably "
                          "cut off", file=source, offset=pos + 8)
    fmt = int.from_bytes(data[pos + 8:pos + 10], "big")
    ntrks = int.from_bytes(data[pos + 10:pos + 12], "big")
    division = int.from_bytes(data[pos + 12:pos + 14], "big")
    if fmt > 1:
        what = ("format 2 (independent sequences, no shared timeline)" if fmt == 2
                else f"format {fmt}, which SMF 1.0 does not define")
        raise DecodeError("unsupported_format", f"only SMF formats 0 and 1 are read, this file is "
                          f"{what}; convert it to format 1 first", file=source, offset=pos + 8)
    if ntrks > min(max_tracks, MOST_TRACKS):
        fix = ("raise max_tracks if such files are wanted" if max_tracks < MOST_TRACKS else
               f"the decoder reads at most {MOST_TRACKS} tracks (its note table numbers them "
               "as 16-bit signed integers)")
        raise DecodeError("too_large", f"the header declares {ntrks} tracks, over the limit "
                          f"max_tracks={min(max_tracks, MOST_TRACKS)}; {fix}",
                          file=source, offset=pos + 10)
    if fmt == 0 and ntrks > 1:
        repairs["format0_multitrack"] = 1
    smpte = bool(division & 0x8000)
    if smpte:
        fps_code = 256 - (division >> 8)
        tpf = division & 0xFF
        if fps_code not in _SMPTE_FPS or tpf == 0:
            raise DecodeError("bad_chunk", f"SMPTE division 0x{division:04x} gives {fps_code} "
                              f"frames/s and {tpf} ticks/frame; frames/s must be 24, 25, 29 or 30 "
                              "and ticks/frame > 0; the header is damaged",
                              file=source, offset=pos + 12)
        ticks_per_second = _SMPTE_FPS[fps_code] * tpf
        tpb = max(1, round(ticks_per_second / 2))  # nominal: one beat = 0.5 s at 120 BPM
    else:
        if division == 0:
            raise DecodeError("bad_chunk", "the header's division (ticks per beat) is 0, which "
                              "gives no timing; the header is damaged", file=source, offset=pos + 12)
        tpb = division
        ticks_per_second = 0.0
    pos += 8 + hlen

    cols: list[int] = []      # flat note columns: start, end, packed info (see note-on)
    chunks: list[bytes] = []  # the same columns as int64 bytes, per track (compiled loop)
    chunk_tracks: list[int] = []  # the track index of each chunk
    note_tracks: list[int] = []  # (track index, number of notes) pairs, flat
    tempos: list[tuple[int, int]] = []
    meters: list[tuple[int, int, int]] = []
    keys: list[tuple[int, int, int]] = []
    ctl: list[int] = []       # flat control columns: tick, status << 16 | data1 << 8 | data2
    ctl_chunks: list[bytes] = []  # CONTROL_DTYPE records, per track (compiled loop)
    ctl_tracks: list[int] = []  # (track index, number of controls) pairs, flat
    texts: list[tuple[int, int, int, bytes]] = []
    names: list[str] = []
    first_text = ""
    end_tick = 0
    n_events = 0
    zero = hanging = unknown_meta = no_eot = unknown_chunks = 0
    ti = 0
    first_unknown: tuple[int, str, int] | None = None  # the first chunk of another name: byte, name, track
    while ti < ntrks:
        if pos + 8 > end:
            if first_unknown is not None and pos == end:
                # whole chunks, but some named otherwise: more likely a damaged 'MTrk' tag than a
                # file cut off (an audit: such a file was said to be cut off during download)
                at, name, where = first_unknown
                raise DecodeError("bad_chunk", f"the header declares {ntrks} tracks but the file holds "
                                  f"{ti} track chunks and {unknown_chunks} chunk(s) of other names, "
                                  f"the first {name!r} at byte {at} where track {where} would be, "
                                  "which a reader skips; a damaged 'MTrk' name is likely (or the file "
                                  "was cut off after its last whole chunk)", file=source, offset=at,
                                  track=where)
            raise DecodeError("truncated", f"the header declares {ntrks} tracks but the file ends "
                              f"after {ti} (at byte {end}); it was probably cut off during download",
                              file=source, offset=min(pos, end), track=ti)
        cid = data[pos:pos + 4]
        clen = int.from_bytes(data[pos + 4:pos + 8], "big")
        if cid != b"MTrk":
            if all(32 <= c < 127 for c in cid):
                if pos + 8 + clen > end:
                    raise DecodeError("truncated", f"chunk {cid.decode('ascii')!r} declares {clen} "
                                      f"bytes but only {end - pos - 8} remain after byte {pos + 8}; "
                                      "the file was probably cut off", file=source, offset=pos,
                                      track=ti)
                unknown_chunks += 1
                if first_unknown is None:
                    first_unknown = (pos, cid.decode("ascii"), ti)
                pos += 8 + clen
                continue
            raise DecodeError("bad_chunk", f"expected track chunk 'MTrk' but found bytes "
                              f"{cid.hex(' ')}; an earlier chunk length is probably wrong or the "
                              "file is damaged", file=source, offset=pos, track=ti)
        if pos + 8 + clen > end:
            raise DecodeError("truncated", f"track {ti} declares {clen} bytes but only "
                              f"{end - pos - 8} remain after byte {pos + 8}; the file was probably "
                              "cut off during download", file=source, offset=pos + 4, track=ti)
        base = pos + 8
        pos = base + clen
        if accelerated:
            got = accel.module.read_track(data, base, clen, ti)
            if got is None:  # the Python loop raises the exact DecodeError
                got = _read_track_alone(data, base, clen, ti, pos == end, source)
            tick, eot, name, text, n_ev, z, h, u, nb, t_ev, m_ev, k_ev, cb, x_ev = got
            chunks.append(nb)
            chunk_tracks.append(ti)
            k_track = len(nb) // 24
            c_track = 0  # the records carry their track
            if cb:
                ctl_chunks.append(cb)
            if x_ev:
                texts += [(tk, ti, mt, payload) for tk, mt, payload in x_ev]
            if t_ev:
                tempos += t_ev
            if m_ev:
                meters += m_ev
            if k_ev:
                keys += k_ev
        else:
            n0, c0, x0 = len(cols), len(ctl), len(texts)
            tick, eot, name, text, n_ev, z, h, u = read_track(
                data[base:base + clen], base, ti, pos == end, source, cols, tempos, meters, keys,
                ctl, texts)
            k_track = (len(cols) - n0) // 3
            c_track = (len(ctl) - c0) // 2
            if len(texts) > x0:
                texts[x0:] = [(tk, ti, mt, payload) for tk, mt, payload in texts[x0:]]
        n_events += n_ev
        zero += z
        hanging += h
        unknown_meta += u
        if text and not first_text:
            first_text = text
        if n_events > max_events:
            raise DecodeError("too_large", f"the file has more than {max_events} events (limit "
                              f"max_events) by track {ti}; raise max_events if such files are wanted",
                              file=source, offset=base, track=ti)
        if not eot:
            no_eot += 1
        note_tracks += (ti, k_track)
        if c_track:
            ctl_tracks += (ti, c_track)
        names.append((name or "").strip(" \t\r\n\x00"))
        if tick > end_tick:
            end_tick = tick
        ti += 1
    # Unknown chunks after the last track are as legal to skip as those between tracks.
    while pos + 8 <= end and all(32 <= c < 127 for c in data[pos:pos + 4]):
        clen = int.from_bytes(data[pos + 4:pos + 8], "big")
        if pos + 8 + clen > end:
            break
        unknown_chunks += 1
        pos += 8 + clen
    for k, v in (("zero_length_notes_dropped", zero), ("hanging_notes_closed", hanging),
                 ("unknown_meta_skipped", unknown_meta), ("missing_end_of_track", no_eot),
                 ("unknown_chunks_skipped", unknown_chunks), ("trailing_bytes_ignored", end - pos)):
        if v:
            repairs[k] = v

    if smpte:
        tempo_arr = np.array([(0, DEFAULT_TEMPO)], dtype=TEMPO_DTYPE)
        # us/beat that makes the nominal tpb exact; 500000 (120 BPM) when tps is even.
        tempo_arr["us_per_beat"][0] = round(tpb * 1e6 / ticks_per_second)
    else:
        tempo_arr = _tempo_map(tempos)
    if accelerated and _C_NOTE_LAYOUT:  # sorted table and tempo-map seconds built in C
        buf = accel.module.note_table(chunks, chunk_tracks, None if smpte else tempo_arr.tobytes(),
                                    tpb)
        notes = np.frombuffer(buf, dtype=NOTE_DTYPE) if buf else np.zeros(0, dtype=NOTE_DTYPE)
        if smpte and len(notes):
            _smpte_seconds(notes, ticks_per_second)
    else:
        flat = (np.frombuffer(b"".join(chunks), dtype=np.int64) if accelerated
                else np.array(cols, dtype=np.int64))
        notes = _note_table(flat, note_tracks)
        if not len(notes):
            pass
        elif smpte:
            _smpte_seconds(notes, ticks_per_second)
        else:
            secs = ticks_to_seconds(np.concatenate((notes["start"], notes["end"])), tempo_arr, tpb)
            k = len(notes)
            notes["start_s"] = secs[:k]
            notes["end_s"] = secs[k:]
    title = names[0] if names and names[0] else first_text
    if accelerated:
        controls = (np.frombuffer(bytearray().join(ctl_chunks), dtype=CONTROL_DTYPE)
                    if ctl_chunks else np.zeros(0, dtype=CONTROL_DTYPE))
    else:
        controls = _control_table(np.array(ctl, dtype=np.int64), ctl_tracks)
    return Piece(notes=notes, ticks_per_beat=tpb, tempos=tempo_arr,
                 time_signatures=_events(meters, METER_DTYPE),
                 key_signatures=_events(keys, KEY_DTYPE), format=fmt, n_tracks=ti,
                 end_tick=end_tick, track_names=tuple(names), title=title, smpte=smpte,
                 repairs=repairs, controls=controls, texts=tuple(texts))


def _read_track_alone(data: bytes, base: int, clen: int, ti: int, at_file_end: bool,
                      source: str) -> tuple:
    """``read_track`` on one track with its own lists, in the compiled loop's result shape
    (notes as int64 bytes, controls as CONTROL_DTYPE records). Called where the compiled loop
    gave up: it raises there."""
    cols: list[int] = []
    tempos: list = []
    meters: list = []
    keys: list = []
    ctl: list[int] = []
    texts: list = []
    head = read_track(data[base:base + clen], base, ti, at_file_end, source, cols, tempos,
                       meters, keys, ctl, texts)
    return (*head, np.array(cols, dtype=np.int64).tobytes(), tempos, meters, keys,
            _control_table(np.array(ctl, dtype=np.int64), [ti, len(ctl) // 2]).tobytes(), texts)


def _smpte_seconds(notes: np.ndarray, ticks_per_second: float) -> None:
    """SMPTE time is absolute: seconds = ticks / (frames/s x ticks/frame), in place."""
    notes["start_s"] = notes["start"] / ticks_per_second
    notes["end_s"] = notes["end"] / ticks_per_second


def _note_table(cols: np.ndarray, note_tracks: list[int]) -> np.ndarray:
    """Flat int64 (start, end, info) columns -> NOTE_DTYPE table in ``sort_notes`` order.

    Sorting the plain int64 columns before filling the structured table gives the same order
    as ``piece.sort_notes`` (start, pitch, track, channel, end) at a fraction of its cost.
    """
    k = len(cols) // 3
    notes = np.zeros(k, dtype=NOTE_DTYPE)
    if not k:
        return notes
    flat = cols.reshape(k, 3).T
    start, end, info = flat[0], flat[1], flat[2]
    track = np.repeat(np.array(note_tracks[0::2], dtype=np.int64),
                      np.array(note_tracks[1::2], dtype=np.int64))
    pitch = info & 0x7F
    channel = (info >> 7) & 0x0F
    if int(start.max()) < (1 << 36):
        order = np.lexsort((end, (start << 27) | (pitch << 20) | (track << 4) | channel))
    else:  # ticks too large to pack: plain five-key sort
        order = np.lexsort((end, channel, track, pitch, start))
    notes["start"] = start[order]
    notes["end"] = end[order]
    info = info[order]
    notes["pitch"] = info & 0x7F
    notes["channel"] = (info >> 7) & 0x0F
    notes["velocity"] = (info >> 11) & 0x7F
    notes["program"] = info >> 18
    notes["track"] = track[order]
    return notes


def _control_table(flat: np.ndarray, ctl_tracks: list[int]) -> np.ndarray:
    """Flat int64 (tick, status << 16 | data1 << 8 | data2) pairs -> CONTROL_DTYPE rows, in
    file order (track by track, ticks ascending within a track)."""
    k = len(flat) // 2
    out = np.zeros(k, dtype=CONTROL_DTYPE)
    if not k:
        return out
    pairs = flat.reshape(k, 2)
    msg = pairs[:, 1]
    out["tick"] = pairs[:, 0]
    out["track"] = np.repeat(np.array(ctl_tracks[0::2], dtype=np.int64),
                             np.array(ctl_tracks[1::2], dtype=np.int64))
    out["channel"] = (msg >> 16) & 0x0F
    out["kind"] = (msg >> 16) & 0xF0
    out["data1"] = (msg >> 8) & 0x7F
    out["data2"] = msg & 0x7F
    return out


def _tempo_map(tempos: list[tuple[int, int]]) -> np.ndarray:
    """Tempo events from all tracks -> a map starting at tick 0 (later event wins per tick)."""
    by_tick: dict[int, int] = {0: DEFAULT_TEMPO}
    for tick, us in sorted(tempos, key=lambda e: e[0]):  # stable: track order within a tick
        by_tick[tick] = us
    return np.array(sorted(by_tick.items()), dtype=TEMPO_DTYPE)


def _events(rows: list[tuple[int, int, int]], dtype: np.dtype) -> np.ndarray:
    rows = sorted(rows, key=lambda e: e[0])
    return np.array(rows, dtype=dtype) if rows else np.zeros(0, dtype=dtype)


def decode_file(path: str | Path, **limits: int) -> Piece:
    """Read and decode one file, checking its size against ``max_bytes`` before reading."""
    path = Path(path)
    max_bytes = limits.get("max_bytes", DEFAULT_LIMITS["max_bytes"])
    size = path.stat().st_size
    if size > max_bytes:
        _over_max_bytes(size, max_bytes, str(path))
    with open(path, "rb") as fh:
        data = fh.read(min(size, max_bytes) + 1)
    return decode(data, source=str(path), size=size, **limits)


def _over_max_bytes(size: int, max_bytes: int, source: str) -> NoReturn:
    raise DecodeError("too_large", f"the file has {size} bytes, over the limit max_bytes="
                      f"{max_bytes}; raise max_bytes if such files are wanted", file=source, offset=0)
