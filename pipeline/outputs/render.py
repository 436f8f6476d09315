"""Worker side: the normalized output(s) of one piece, encoded into the staging folder."""
from __future__ import annotations

import hashlib
from dataclasses import replace
from pathlib import Path
from typing import Any

from ..errors import OutputError
from .files import staged_path

ENCODER_VERSION = 2

def output_fingerprint(stages: list) -> str:
    """What the normalized bytes depend on: the encoder version and the transpose options."""
    tr = next((s.fingerprint for s in stages if s.name == "transpose"), "none")
    return hashlib.sha256(f"encoder{ENCODER_VERSION}:{tr}".encode()).hexdigest()[:16]


def render(piece: Any, stage_plans: list, transpose_values: dict | None, staging: str, sha: str,
           output_fp: str) -> tuple[str, ...]:
    """Encode the normalized output(s) of one piece into the staging folder (worker side);
    returns their suffixes (``staged_path`` gives each file's path). The outputs keep the
    piece's control, pitch-bend, aftertouch and program-change events and its text-like metas
    unless transpose's ``notes_only`` is set; a transposition moves only notes (and the key
    numbers of polyphonic aftertouch on pitched channels) and key signatures."""
    from ..midi.encode import encode
    versions: list[tuple[str, Any, int]]
    tplan = next((p for p in stage_plans if p.name == "transpose"), None)
    if tplan is not None and tplan.options.get("notes_only"):
        piece = replace(piece, controls=piece.controls[:0], texts=())
    if tplan is not None and transpose_values is not None:
        from ..stages.transpose import Transpose
        versions = Transpose.output_notes(piece, transpose_values)
    else:
        versions = [("", piece.notes, 0)]
    for suffix, notes, semitones in versions:
        out_piece = piece if semitones == 0 else replace(
            piece, key_signatures=shift_key_signatures(piece.key_signatures, semitones),
            controls=shift_controls(piece.controls, semitones))
        _write_staged(Path(staged_path(staging, sha, output_fp, suffix)), encode(out_piece, notes))
    return tuple(suffix for suffix, _, _ in versions)


def shift_key_signatures(keys: Any, semitones: int) -> Any:
    """Key-signature events of a piece transposed by ``semitones``, so a normalized file declares
    the key it is now in. A signature's major tonic is ``7 * sharps`` (mod 12) on the circle of
    fifths (minor shares its relative major's signature), so the new signature is
    ``sharps + 7 * semitones`` (mod 12), written in the range -5..+6 (F# major, not Gb)."""
    import numpy as np
    out = keys.copy()
    if len(out):
        s = (out["sharps"].astype(int) + 7 * semitones) % 12
        out["sharps"] = np.where(s > 6, s - 12, s)
    return out


def shift_controls(controls: Any, semitones: int) -> Any:
    """Channel events of a piece transposed by ``semitones``: only polyphonic aftertouch
    carries a key number (data1), moved as its notes are on pitched channels (beyond 0..127
    folded back by octaves, as ``analysis.transpose.shift_notes`` folds notes); controller
    values, pitch bends and the drum channel stay as they are."""
    if not semitones or not len(controls) or not (controls["kind"] == 0xA0).any():
        return controls  # the usual case: no polyphonic aftertouch
    import numpy as np

    from ..midi.piece import DRUM_CHANNEL
    poly = (controls["kind"] == 0xA0) & (controls["channel"] != DRUM_CHANNEL)
    out = controls.copy()
    from ..analysis.transpose import fold_octaves
    out["data1"][poly] = fold_octaves(out["data1"][poly].astype(np.int64) + int(semitones))
    return out


def _write_staged(path: Path, data: bytes) -> None:
    """A staged file is written in place, without the temporary name of ``write_atomic``: it
    is used only once its worker has returned (a file left half-written by a killed worker is
    never placed, and the staging folder is removed after placing)."""
    try:
        try:
            fh = open(path, "wb")
        except FileNotFoundError:  # the first file of a run makes the staging folder
            path.parent.mkdir(parents=True, exist_ok=True)
            fh = open(path, "wb")
        with fh:
            fh.write(data)
    except OSError as e:
        raise OutputError(f"cannot write ({e.strerror}); check free space and permissions of the output folder",
                          file=str(path)) from None
