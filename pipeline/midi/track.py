"""The per-track event loop of the decoder: one MTrk chunk's events, in one tight Python loop.

It is the specification of the compiled loop (``_smf_accel.read_track``), which gives up where
this one would raise; ``decode`` then runs this one on that track, so every error is this
module's. The policies it follows are listed in ``pipeline.midi.decode``.
"""
from __future__ import annotations

from ..errors import DecodeError
from .piece import TEXT_METAS

#: Meta event types of SMF 1.0 (others are counted as unknown and skipped).
_KNOWN_META = frozenset(list(range(0x00, 0x10)) + [0x20, 0x21, 0x2F, 0x51, 0x54, 0x58, 0x59, 0x7F])


#: Flag of an open note's info: its key had a note-off at the note-on's own tick. Such a note
#: still open at the end of its track is a zero-length note written note-off first (writers that
#: order the events of one tick offs before ons do so; music21's MIDI writer does it for some
#: notes): dropped as zero-length, as pretty_midi drops it, rather than held to the track's end.
OFF_FIRST = 1 << 25


def read_track(t: bytes, base: int, ti: int, at_file_end: bool, source: str, cols: list,
                tempos: list, meters: list, keys: list, ctl: list, texts: list) -> tuple:
    """Parse one MTrk body ``t`` (starting at absolute byte ``base``) in one tight loop.

    Appends notes to ``cols`` (start, end, info triples), tempo, meter and key events to
    their lists, the other channel events to ``ctl`` (tick, status << 16 | data1 << 8 | data2
    pairs) and text-like metas (``TEXT_METAS``) to ``texts`` as (tick, type, payload); returns (last tick, saw end-of-track, track name or None, first text,
    events, zero-length notes dropped, hanging notes closed, unknown metas).
    """
    n_events = zero = hanging = unknown_meta = 0
    text = ""
    nt = len(t)
    p = 0
    tick = 0
    status = 0
    eot = False
    progs = [0] * 16
    opened: list = [None] * 2048  # open notes per key = channel << 7 | pitch
    last_off: dict[int, int] = {}  # key -> tick of its last note-off (OFF_FIRST)
    name = None
    ev_start = p
    try:
        while p < nt:
            ev_start = p
            b = t[p]
            p += 1
            if b < 0x80:
                tick += b
            else:
                d = b & 0x7F
                b = t[p]
                p += 1
                d = (d << 7) | (b & 0x7F)
                if b > 0x7F:
                    b = t[p]
                    p += 1
                    d = (d << 7) | (b & 0x7F)
                    if b > 0x7F:
                        b = t[p]
                        p += 1
                        d = (d << 7) | (b & 0x7F)
                        if b > 0x7F:
                            raise DecodeError(
                                "bad_event", "a delta time is longer than the 4 bytes SMF "
                                "allows; the track data is damaged", file=source,
                                offset=base + ev_start, track=ti)
                tick += d
            st = t[p]
            if st > 0x7F:
                p += 1
                if st >= 0xF0:
                    if st == 0xFF:
                        mt = t[p]
                        ln, p = _payload_length(t, p + 1, f"meta event 0x{mt:02x}", source,
                                                base + ev_start, ti)
                        if mt == 0x51:
                            if ln != 3:
                                raise _bad_meta(source, base + ev_start, ti, "tempo", 3, ln)
                            tempo = (t[p] << 16) | (t[p + 1] << 8) | t[p + 2]
                            if tempo == 0:
                                raise DecodeError(
                                    "bad_event", "a tempo event sets 0 microseconds per beat, "
                                    "which has no meaning; the file is damaged", file=source,
                                    offset=base + ev_start, track=ti)
                            tempos.append((tick, tempo))
                        elif mt == 0x2F:
                            eot = True
                        elif mt == 0x03:
                            if name is None:
                                name = t[p:p + ln].decode("latin-1")
                        elif mt == 0x58:
                            if ln != 4:
                                raise _bad_meta(source, base + ev_start, ti, "time signature", 4, ln)
                            num, dd = t[p], t[p + 1]
                            if num == 0 or dd > 6:
                                raise DecodeError(
                                    "bad_event", f"a time signature must have numerator >= 1 "
                                    f"and denominator 2**0..2**6, but it is {num}/2**{dd}; the "
                                    "event is damaged", file=source, offset=base + ev_start,
                                    track=ti)
                            meters.append((tick, num, 1 << dd))
                        elif mt == 0x59:
                            if ln != 2:
                                raise _bad_meta(source, base + ev_start, ti, "key signature", 2, ln)
                            sf, mi = t[p], t[p + 1]
                            if sf > 127:
                                sf -= 256
                            if not -7 <= sf <= 7 or mi > 1:
                                raise DecodeError(
                                    "bad_event", f"a key signature must have -7..7 sharps and "
                                    f"mode 0 or 1, but it has {sf} and {mi}; the event is damaged",
                                    file=source, offset=base + ev_start, track=ti)
                            keys.append((tick, sf, mi))
                        elif mt in TEXT_METAS:
                            texts.append((tick, mt, t[p:p + ln]))
                            if mt == 0x01 and not text:
                                text = t[p:p + ln].decode("latin-1").strip(" \t\r\n\x00")
                        elif mt not in _KNOWN_META:
                            unknown_meta += 1
                        p += ln
                    elif st == 0xF0 or st == 0xF7:
                        ln, p = _payload_length(t, p, "sysex event", source, base + ev_start, ti)
                        p += ln
                    else:
                        raise DecodeError(
                            "bad_event", f"the track holds status byte 0x{st:02x}, a system "
                            "common/real-time message that a Standard MIDI File does not allow "
                            "(SMF stores only channel, meta and sysex events)",
                            file=source, offset=base + p - 1, track=ti)
                    n_events += 1
                    continue
                status = st
            elif status:
                st = status
            else:
                raise DecodeError(
                    "bad_event", f"data byte 0x{st:02x} appears where a status byte is needed "
                    "and no running status is in effect yet; the track is damaged",
                    file=source, offset=base + p, track=ti)
            n_events += 1
            if st < 0xA0:  # note-off 0x8n or note-on 0x9n
                a = t[p]
                v = t[p + 1]
                p += 2
                if (a | v) > 0x7F:
                    raise _bad_data(source, base + p - 2, ti, st, a, v)
                key = ((st & 0x0F) << 7) | a
                if v and st > 0x8F:
                    # info packs pitch | channel << 7 | velocity << 11 | program << 18, and
                    # OFF_FIRST when the key had a note-off at this very tick
                    info = key | (v << 11) | (progs[st & 0x0F] << 18)
                    if last_off.get(key) == tick:
                        info |= OFF_FIRST
                    cur = opened[key]
                    if cur is None:
                        opened[key] = [tick, info]
                    else:
                        cur += (tick, info)
                else:
                    last_off[key] = tick
                    cur = opened[key]
                    if cur is not None:
                        opened[key] = None
                        if len(cur) == 2:
                            if cur[0] != tick:
                                cols += (cur[0], tick, cur[1] & ~OFF_FIRST)
                            else:
                                zero += 1
                        else:
                            keep = []
                            for j in range(0, len(cur), 2):
                                if cur[j] != tick:
                                    cols += (cur[j], tick, cur[j + 1] & ~OFF_FIRST)
                                else:
                                    keep += (cur[j], cur[j + 1])
                            if keep:
                                if len(keep) < len(cur):
                                    opened[key] = keep
                                else:
                                    zero += len(keep) // 2
                continue
            hi = st & 0xF0
            if hi == 0xC0:
                a = t[p]
                p += 1
                if a > 0x7F:
                    raise _bad_data(source, base + p - 1, ti, st, a, 0)
                progs[st & 0x0F] = a
                ctl += (tick, (st << 16) | (a << 8))
            elif hi == 0xD0:
                a = t[p]
                p += 1
                if a > 0x7F:
                    raise _bad_data(source, base + p - 1, ti, st, a, 0)
                ctl += (tick, (st << 16) | (a << 8))
            else:
                a = t[p]
                v = t[p + 1]
                p += 2
                if (a | v) > 0x7F:
                    raise _bad_data(source, base + p - 2, ti, st, a, v)
                ctl += (tick, (st << 16) | (a << 8) | v)
    except IndexError:
        if at_file_end:
            raise DecodeError("truncated", f"the file ends inside an event of track {ti} that "
                              f"starts at byte {base + ev_start}; it was probably cut off",
                              file=source, offset=base + ev_start, track=ti) from None
        raise DecodeError("bad_event", f"the event at byte {base + ev_start} runs past the end "
                          f"of track {ti}'s chunk ({nt} bytes); the chunk length or the event "
                          "is damaged", file=source, offset=base + ev_start, track=ti) from None
    if opened.count(None) < 2048:
        for cur in filter(None, opened):
            for j in range(0, len(cur), 2):
                if cur[j] != tick and not cur[j + 1] & OFF_FIRST:
                    cols += (cur[j], tick, cur[j + 1])
                    hanging += 1
                else:  # its note-off came first, at its own tick: a zero-length note
                    zero += 1
    return tick, eot, name, text, n_events, zero, hanging, unknown_meta


def _payload_length(t: bytes, p: int, what: str, source: str, offset: int,
                    track: int) -> tuple[int, int]:
    """The variable-length payload size of a meta or sysex event read at ``t[p]``: (size, the
    payload's first byte). A size running past the chunk is an error naming the event."""
    b = t[p]
    p += 1
    ln = b & 0x7F
    while b > 0x7F:
        b = t[p]
        p += 1
        ln = (ln << 7) | (b & 0x7F)
    if p + ln > len(t):
        raise DecodeError("bad_event", f"{what} declares {ln} bytes but only {len(t) - p} remain "
                          "in the track chunk; the track is damaged", file=source, offset=offset,
                          track=track)
    return ln, p


def _bad_meta(source: str, offset: int, track: int, what: str, want: int, got: int) -> DecodeError:
    return DecodeError("bad_event", f"a {what} meta event must carry {want} bytes, but it carries "
                       f"{got}; the event is damaged", file=source, offset=offset, track=track)


def _bad_data(source: str, offset: int, track: int, st: int, a: int, v: int) -> DecodeError:
    bad = a if a > 0x7F else v
    return DecodeError("bad_event", f"data bytes of a channel message must be 0..127, but status "
                       f"0x{st:02x} is followed by 0x{bad:02x}; the track is damaged or misaligned",
                       file=source, offset=offset, track=track)
