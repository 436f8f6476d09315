"""Normalized SMF writer: ``Piece`` (or a transposed note table) -> deterministic bytes.

Layout: format 1; track 0 is the conductor track (title as track name, then time signatures,
key signatures, the tempo map and the piece's text-like metas: lyrics, text, markers, cue
points, copyright, after the conductor's own events at a tick, by source track); then one track
per (source track, channel) group, in that order, holding its notes and the piece's other
channel events of that group (``Piece.controls``: control changes, pitch bends, aftertouch,
program changes). Note-offs are written as note-on with velocity 0, which lets a whole group
track use running status (common practice; smallest files). At equal ticks a group track
writes note-offs (by pitch), then the other channel events (in file order), then note-ons in
(start, pitch) order, each preceded by a program change when the program in force in the
track (the last program change written) is not the note's. So the bytes are a pure function of
the piece, and the decoder reads back exactly the same notes and controls (a note-off never
closes the note that starts at its own tick). Each group track carries its source track's name.
Zero-length notes are not written (the decoder drops them too).

SMPTE pieces are re-based on 480 ticks per beat at one 120 BPM tempo (960 ticks per second)
from their exact seconds. Limits: overlapping notes of one pitch and channel in one group cannot
be told apart in MIDI; they read back under the decoder's stacking policy (see pipeline.midi.decode).

The group tracks' event bytes come from the compiled ``_smf_accel.group_events`` when it is
built and ``pipeline.midi.accel.USE_ACCEL`` is on (``MIDISIFT_PURE_PYTHON=1`` turns both off), else
from the numpy ``_all_group_events``; the bytes are identical (tests/test_smf_accel.py). A
contiguous note table whose notes all end after they start goes to the compiled code whole
(``table_group_events``: the same columns taken in C).
"""
from __future__ import annotations


import numpy as np


from . import accel
from .accel import compiled_analyses
from .piece import CONTROL_DTYPE, DEFAULT_TEMPO, Piece

__all__ = ["encode", "SMPTE_TICKS_PER_BEAT"]

SMPTE_TICKS_PER_BEAT = 480


_ONE_BYTE = tuple(bytes((i,)) for i in range(0x80))


def vlq(value: int) -> bytes:
    """A variable-length quantity (SMF 1.0: 7 bits per byte, high bit = more follow)."""
    if 0 <= value < 0x80:  # one byte: the usual delta and meta length
        return _ONE_BYTE[value]
    if value < 0 or value > 0x0FFFFFFF:
        raise ValueError(f"a delta time must be 0..0x0FFFFFFF, got {value}")
    out = [value & 0x7F]
    value >>= 7
    while value:
        out.append(0x80 | (value & 0x7F))
        value >>= 7
    return bytes(reversed(out))


def _chunk(name: bytes, body: bytes) -> bytes:
    return name + len(body).to_bytes(4, "big") + body


def _track(events: list[tuple[int, bytes]]) -> bytes:
    """Meta events (absolute tick, bytes), already in order -> an MTrk chunk with EOT."""
    out = bytearray()
    last = 0
    for tick, msg in events:
        out += vlq(tick - last)
        last = tick
        out += msg
    out += b"\x00\xff\x2f\x00"
    return _chunk(b"MTrk", bytes(out))


def _meta(kind: int, payload: bytes) -> bytes:
    return bytes((0xFF, kind)) + vlq(len(payload)) + payload


def encode(piece: Piece, notes: np.ndarray | None = None, *,
           accelerated: bool | None = None) -> bytes:
    """The piece as a normalized format-1 SMF; ``notes`` replaces its note table (e.g.
    transposed notes). The same input always gives the same bytes. ``accelerated`` as in
    ``decode.decode``: None follows ``accel.USE_ACCEL``; both paths give the same bytes."""
    if accelerated is None:
        accelerated = accel.USE_ACCEL
    elif accelerated and not accel.HAVE_ACCEL:
        raise ValueError("accelerated=True, but pipeline.midi._smf_accel is not built; pass False")
    notes = piece.notes if notes is None else notes
    if piece.smpte:
        per_s = 2.0 * SMPTE_TICKS_PER_BEAT  # ticks per second at 120 BPM
        rebase = lambda t: np.rint(piece.ticks_to_seconds(t) * per_s).astype(np.int64)  # noqa: E731
    else:
        rebase = lambda t: np.asarray(t, dtype=np.int64)  # noqa: E731
    ctl = piece.controls
    bodies = None  # the group tracks' event bytes, straight from the tables when compiled
    deferred = None  # their error, raised where the group tracks are made (after the conductor)
    if accelerated and not piece.smpte and len(notes) and ctl.dtype == CONTROL_DTYPE:
        compiled = compiled_analyses(notes)
        if compiled is not None:  # None back: a note that does not end after it starts
            try:
                bodies = (compiled.table_group_events(notes, np.ascontiguousarray(ctl)) if len(ctl)
                          else compiled.table_group_events(notes))
            except ValueError as exc:
                deferred = exc
    extra: tuple = ()  # the other channel events as columns (group, tick, message), sorted
    if bodies is None and len(ctl):
        cgroup = ctl["track"].astype(np.int64) * 16 + ctl["channel"]
        ctick = rebase(ctl["tick"])
        o = np.lexsort((ctick, cgroup))  # stable: file order within a tick
        cmsg = ((ctl["kind"].astype(np.int64) | ctl["channel"]) << 16
                | ctl["data1"].astype(np.int64) << 8 | ctl["data2"])
        extra = (cgroup[o], np.ascontiguousarray(ctick[o]), cmsg[o])
    if piece.smpte:
        tpb = SMPTE_TICKS_PER_BEAT
        per_s = 2.0 * tpb  # ticks per second at 120 BPM
        starts = np.rint(notes["start_s"] * per_s).astype(np.int64)
        ends = np.rint(notes["end_s"] * per_s).astype(np.int64)
        ends = np.maximum(ends, starts + 1)  # keep every note audible after rounding
        tempos = [(0, DEFAULT_TEMPO)]
    else:
        tpb = piece.ticks_per_beat
        if bodies is None:
            starts = notes["start"].astype(np.int64)
            ends = notes["end"].astype(np.int64)
            if (ends < starts).any():
                raise ValueError("a note ends before it starts; the note table is corrupt")
            audible = ends > starts
            if not audible.all():
                notes, starts, ends = notes[audible], starts[audible], ends[audible]
        tempos = list(zip(piece.tempos["tick"].tolist(), piece.tempos["us_per_beat"].tolist()))

    cond: list[tuple[int, int, bytes]] = []  # (tick, order, bytes)
    if piece.title:
        cond.append((0, 0, _meta(0x03, piece.title.encode("latin-1", "replace"))))
    ts = piece.time_signatures
    for t, num, den in zip(rebase(ts["tick"]).tolist(), ts["numerator"].tolist(),
                           ts["denominator"].tolist()):
        cond.append((t, 1, _meta(0x58, bytes((num, int(den).bit_length() - 1, 24, 8)))))
    ks = piece.key_signatures
    for t, sf, mi in zip(rebase(ks["tick"]).tolist(), ks["sharps"].tolist(), ks["minor"].tolist()):
        cond.append((t, 2, _meta(0x59, bytes((sf & 0xFF, mi)))))
    for t, us in tempos:
        cond.append((t, 3, _meta(0x51, int(us).to_bytes(3, "big"))))
    if piece.texts:  # after the conductor's own events at a tick, by (tick, source track)
        xt = rebase(np.array([x[0] for x in piece.texts], dtype=np.int64)).tolist()
        texts = sorted(zip(xt, (x[1] for x in piece.texts), range(len(xt)),
                           (x[2] for x in piece.texts), (x[3] for x in piece.texts)))
        cond += [(t, 4, _meta(kind, payload)) for t, _, _, kind, payload in texts]
    cond.sort(key=lambda e: (e[0], e[1]))
    tracks = [_track([(t, m) for t, _, m in cond])]

    if bodies is not None or len(notes) or extra:
        names = piece.track_names
        if deferred is not None:
            raise deferred
        if bodies is None:
            tr = notes["track"].astype(np.int64)
            group = tr * 16 + notes["channel"].astype(np.int64)
            group_events = accel.module.group_events if accelerated else _all_group_events
            bodies = group_events(group, np.ascontiguousarray(starts), np.ascontiguousarray(ends),
                                  notes["pitch"].astype(np.int64),
                                  notes["velocity"].astype(np.int64),
                                  notes["program"].astype(np.int64), *extra)
        for g, body in bodies:
            src = g // 16
            head = b""
            if src < len(names) and names[src]:
                head = b"\x00" + _meta(0x03, names[src].encode("latin-1", "replace"))
            tracks.append(_chunk(b"MTrk", head + body + b"\x00\xff\x2f\x00"))

    header = _chunk(b"MThd", (1).to_bytes(2, "big") + len(tracks).to_bytes(2, "big")
                    + int(tpb).to_bytes(2, "big"))
    return header + b"".join(tracks)


def _group_events(start: np.ndarray, end: np.ndarray, pitch: np.ndarray, vel: np.ndarray,
                  prog: np.ndarray, channel: int) -> bytes:
    """Event bytes of one (track, channel) group, vectorized.

    Order: by tick; at one tick note-offs first (by pitch), then note-ons in (start, pitch)
    order, each preceded by a program change when its program differs from the previous
    note-on's. Running status: a status byte is written only where it changes.
    """
    o = np.lexsort((pitch, start))
    start, end, pitch, vel, prog = start[o], end[o], pitch[o], vel[o], prog[o]
    n = len(o)
    pc = np.ones(n, dtype=bool)
    pc[1:] = prog[1:] != prog[:-1]
    seq = np.arange(n, dtype=np.int64) * 2
    n_pc = int(pc.sum())
    # columns of all events: tick, class, tie key, status, data1, data2, has data2
    tick = np.concatenate((start[pc], start, end))
    cls = np.concatenate((np.ones(n_pc + n, np.int64), np.zeros(n, np.int64)))
    tie = np.concatenate((seq[pc], seq + 1, pitch))
    status = np.concatenate((np.full(n_pc, 0xC0 | channel), np.full(2 * n, 0x90 | channel)))
    d1 = np.concatenate((prog[pc], pitch, pitch))
    d2 = np.concatenate((np.zeros(n_pc, np.int64), vel, np.zeros(n, np.int64)))
    order = np.lexsort((tie, cls, tick))
    tick, status, d1, d2 = tick[order], status[order], d1[order], d2[order]
    delta = np.diff(tick, prepend=0)
    if len(delta) and (delta.min() < 0 or delta.max() > 0x0FFFFFFF):
        raise ValueError("note times must be 0..0x0FFFFFFF ticks apart and not negative")
    is_pc = status == (0xC0 | channel)
    need_status = np.ones(len(tick), dtype=bool)
    need_status[1:] = status[1:] != status[:-1]
    table = np.stack([((delta >> 21) & 0x7F) | 0x80, ((delta >> 14) & 0x7F) | 0x80,
                      ((delta >> 7) & 0x7F) | 0x80, delta & 0x7F, status, d1, d2], axis=1)
    mask = np.stack([delta >= 1 << 21, delta >= 1 << 14, delta >= 1 << 7,
                     np.ones(len(tick), dtype=bool), need_status,
                     np.ones(len(tick), dtype=bool), ~is_pc], axis=1)
    return table.astype(np.uint8)[mask].tobytes()


def _all_group_events(group: np.ndarray, start: np.ndarray, end: np.ndarray, pitch: np.ndarray,
                      vel: np.ndarray, prog: np.ndarray, cgroup: np.ndarray | None = None,
                      ctick: np.ndarray | None = None,
                      cmsg: np.ndarray | None = None) -> list[tuple[int, bytes]]:
    """The event bytes of every (track, channel) group of a note table, in one vectorized
    pass: ``(group, event bytes)`` in ascending group order.

    Notes give note-on/note-off pairs; ``cgroup``/``ctick``/``cmsg`` (optional, in (group,
    tick, file) order) give the other channel events, ``cmsg`` = status << 16 | data1 << 8 |
    data2. Order within a group: by tick; at one tick note-offs (by pitch), then the other
    events (in their given order), then note-ons in (start, pitch) order. A note-on is preceded
    by a program change when the program in force in the track (set by the last program change
    written, given or added) is not the note's, so every note reads back with its program.
    Running status: a status byte is written only where it changes; deltas restart per group.
    Without other events this is byte for byte ``_group_events`` of each group on its own."""
    o = np.lexsort((pitch, start, group))
    group, start, end, pitch, vel, prog = group[o], start[o], end[o], pitch[o], vel[o], prog[o]
    n = len(o)
    if cgroup is None:
        cgroup = ctick = cmsg = np.zeros(0, dtype=np.int64)
    nc = len(cgroup)
    seq = np.arange(n, dtype=np.int64)
    cstatus = cmsg >> 16
    # columns of the notes' and the given events: group, tick, class, tie key, status, data1,
    # data2, program carried, whether it carries one
    gid = np.concatenate((group, cgroup, group))
    tick = np.concatenate((end, ctick, start))
    cls = np.concatenate((np.zeros(n, np.int64), np.ones(nc, np.int64), np.full(n, 2, np.int64)))
    tie = np.concatenate((pitch, np.arange(nc, dtype=np.int64), seq))
    status = np.concatenate((0x90 | (group & 0x0F), cstatus, 0x90 | (group & 0x0F)))
    d1 = np.concatenate((pitch, (cmsg >> 8) & 0xFF, pitch))
    d2 = np.concatenate((np.zeros(n, np.int64), cmsg & 0xFF, vel))
    carried = np.concatenate((np.zeros(n, np.int64), (cmsg >> 8) & 0xFF, prog))
    carrier = np.concatenate((np.zeros(n, bool), (cstatus & 0xF0) == 0xC0, np.ones(n, bool)))
    order = np.lexsort((tie, cls, tick, gid))
    gid, tick, status, d1, d2, carried, carrier = (
        gid[order], tick[order], status[order], d1[order], d2[order], carried[order],
        carrier[order])
    m = len(tick)
    # the program in force before each event: that of the last carrier before it (a note-on
    # leaves its own program in force, whether or not a program change was added for it)
    at = np.where(carrier, np.arange(m), -1)
    last = np.maximum.accumulate(at) if m else at
    before = np.concatenate(([-1], last[:-1]))
    is_on = order >= n + nc
    prev_ok = (before >= 0) & (gid[np.maximum(before, 0)] == gid)
    need = is_on & ~(prev_ok & (carried[np.maximum(before, 0)] == carried))
    where = np.flatnonzero(need)
    if len(where):  # a program change right before each of those note-ons
        g_at = gid[where]
        gid = np.insert(gid, where, g_at)
        tick = np.insert(tick, where, tick[where])
        d1 = np.insert(d1, where, carried[where])
        d2 = np.insert(d2, where, 0)
        status = np.insert(status, where, 0xC0 | (g_at & 0x0F))
        m = len(tick)
    first = np.ones(m, dtype=bool)
    first[1:] = gid[1:] != gid[:-1]
    delta = np.diff(tick, prepend=0)
    delta[first] = tick[first]
    if m and (delta.min() < 0 or delta.max() > 0x0FFFFFFF):
        raise ValueError("note times must be 0..0x0FFFFFFF ticks apart and not negative")
    need_status = first.copy()
    need_status[1:] |= status[1:] != status[:-1]
    one_byte = (status & 0xE0) == 0xC0  # program change, channel aftertouch
    table = np.stack([((delta >> 21) & 0x7F) | 0x80, ((delta >> 14) & 0x7F) | 0x80,
                      ((delta >> 7) & 0x7F) | 0x80, delta & 0x7F, status, d1, d2], axis=1)
    ones = np.ones(m, dtype=bool)
    mask = np.stack([delta >= 1 << 21, delta >= 1 << 14, delta >= 1 << 7, ones, need_status,
                     ones, ~one_byte], axis=1)
    flat = table.astype(np.uint8)[mask].tobytes()
    ends = np.cumsum(mask.sum(axis=1))
    starts_at = np.flatnonzero(first)
    cut = [0] + ends[np.append(starts_at[1:], m) - 1].tolist()
    return [(g, flat[cut[i]:cut[i + 1]]) for i, g in enumerate(gid[starts_at].tolist())]
