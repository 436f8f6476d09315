"""MIDI helpers shared by the evaluations: the decoder they use (the project's, with a small
mido-based reference beside it), key-signature meta events stripped from renderings, and the
tagged JSON of their music21 cache (bytes and tuples survive, nothing can run code on load)."""
from __future__ import annotations

import base64
import io
from typing import Any

import mido
import numpy as np

from ..midi.decode import decode as smf_decode
from ..midi.piece import (DEFAULT_TEMPO, KEY_DTYPE, METER_DTYPE, TEMPO_DTYPE, Piece, empty_notes,
                          sort_notes, ticks_to_seconds)


def to_json(value: Any) -> Any:
    """Tagged JSON for the cache: bytes and tuples survive, nothing can run code on load."""
    if isinstance(value, bytes):
        return {"__bytes__": base64.b64encode(value).decode("ascii")}
    if isinstance(value, tuple):
        return {"__tuple__": [to_json(v) for v in value]}
    if isinstance(value, list):
        return [to_json(v) for v in value]
    if isinstance(value, dict):
        return {"__dict__": [[to_json(k), to_json(v)] for k, v in value.items()]}
    if isinstance(value, np.generic):
        return value.item()
    return value


def from_json(value: Any) -> Any:
    if isinstance(value, list):
        return [from_json(v) for v in value]
    if isinstance(value, dict):
        if "__bytes__" in value:
            return base64.b64decode(value["__bytes__"])
        if "__tuple__" in value:
            return tuple(from_json(v) for v in value["__tuple__"])
        return {from_json(k): from_json(v) for k, v in value["__dict__"]}
    return value


def decode(data: bytes) -> Piece:
    """Decode MIDI bytes with the project's decoder (``decode_with_mido`` below is the
    reference the tests hold it against)."""
    return smf_decode(data)


def decode_with_mido(data: bytes) -> Piece:
    """A small reference decoder on top of mido (note-on/off pairing first-in first-out per
    track, channel and pitch; tempo, time- and key-signature events from all tracks)."""
    mf = mido.MidiFile(file=io.BytesIO(data))
    rows, tempos, metres, keys = [], [], [], []
    end_tick = 0
    for ti, track in enumerate(mf.tracks):
        tick = 0
        program = [0] * 16
        open_notes: dict[tuple[int, int], list[tuple[int, int, int]]] = {}
        for msg in track:
            tick += msg.time
            if msg.type == "program_change":
                program[msg.channel] = msg.program
            elif msg.type == "note_on" and msg.velocity > 0:
                open_notes.setdefault((msg.channel, msg.note), []).append(
                    (tick, msg.velocity, program[msg.channel]))
            elif msg.type in ("note_off", "note_on"):
                stack = open_notes.get((msg.channel, msg.note))
                if stack:
                    start, vel, prog = stack.pop(0)
                    rows.append((start, tick, msg.note, vel, msg.channel, prog, ti))
            elif msg.type == "set_tempo":
                tempos.append((tick, msg.tempo))
            elif msg.type == "time_signature":
                metres.append((tick, msg.numerator, msg.denominator))
            elif msg.type == "key_signature":
                sharps, minor = _key_to_sharps(msg.key)
                keys.append((tick, sharps, minor))
        end_tick = max(end_tick, tick)
    tempo_arr = np.array(sorted(tempos) or [(0, DEFAULT_TEMPO)], dtype=TEMPO_DTYPE)
    if tempo_arr["tick"][0] != 0:
        tempo_arr = np.concatenate([np.array([(0, DEFAULT_TEMPO)], dtype=TEMPO_DTYPE), tempo_arr])
    notes = empty_notes(len(rows))
    if rows:
        arr = np.array(rows, dtype=np.int64)
        for i, f in enumerate(("start", "end", "pitch", "velocity", "channel", "program", "track")):
            notes[f] = arr[:, i]
        notes["start_s"] = ticks_to_seconds(notes["start"], tempo_arr, mf.ticks_per_beat)
        notes["end_s"] = ticks_to_seconds(notes["end"], tempo_arr, mf.ticks_per_beat)
    return Piece(notes=sort_notes(notes), ticks_per_beat=mf.ticks_per_beat, tempos=tempo_arr,
                 time_signatures=np.array(sorted(metres), dtype=METER_DTYPE),
                 key_signatures=np.array(sorted(keys), dtype=KEY_DTYPE),
                 format=mf.type, n_tracks=len(mf.tracks), end_tick=end_tick)


_MAJOR_SHARPS = {"Cb": -7, "Gb": -6, "Db": -5, "Ab": -4, "Eb": -3, "Bb": -2, "F": -1, "C": 0,
                 "G": 1, "D": 2, "A": 3, "E": 4, "B": 5, "F#": 6, "C#": 7}
_MINOR_SHARPS = {"Ab": -7, "Eb": -6, "Bb": -5, "F": -4, "C": -3, "G": -2, "D": -1, "A": 0,
                 "E": 1, "B": 2, "F#": 3, "C#": 4, "G#": 5, "D#": 6, "A#": 7}


def _key_to_sharps(key: str) -> tuple[int, int]:
    if key.endswith("m"):
        return _MINOR_SHARPS[key[:-1]], 1
    return _MAJOR_SHARPS[key], 0


def strip_meta(data: bytes, types: tuple[str, ...]) -> bytes:
    """MIDI bytes with every meta event of the given types removed (delta times preserved)."""
    mf = mido.MidiFile(file=io.BytesIO(data))
    for track in mf.tracks:
        kept, carry = [], 0
        for msg in track:
            if msg.type in types:
                carry += msg.time
                continue
            kept.append(msg.copy(time=msg.time + carry))
            carry = 0
        track[:] = kept
    buf = io.BytesIO()
    mf.save(file=buf)
    return buf.getvalue()

