"""Worker side: the normalized output(s) of one piece, encoded into the staging folder.

Which outputs a piece has is the stages' business (``Stage.output_variants``: the transpose
stage gives the normalized piece and its augmentation copies); this module only encodes and
writes them.
"""
from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any, Sequence

from ..errors import OutputError
from ..midi.encode import encode
from .files import staged_path

ENCODER_VERSION = 2


def output_fingerprint(stages: Sequence[Any]) -> str:
    """What the normalized bytes depend on: the encoder version and the options of the stages
    that shape the outputs (``Stage.shapes_output``)."""
    shaping = ":".join(s.fingerprint for s in stages if s.shapes_output) or "none"
    return hashlib.sha256(f"encoder{ENCODER_VERSION}:{shaping}".encode()).hexdigest()[:16]


def render(variants: Sequence[Any], staging: str, sha: str, output_fp: str) -> tuple[str, ...]:
    """Encode each output of one piece (``stages.base.Variant``: suffix, piece, notes) into the
    staging folder (worker side); returns their suffixes (``staged_path`` gives each path)."""
    for v in variants:
        _write_staged(Path(staged_path(staging, sha, output_fp, v.suffix)), encode(v.piece, v.notes))
    return tuple(v.suffix for v in variants)


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
