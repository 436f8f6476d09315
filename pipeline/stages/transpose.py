"""Stage ``transpose``: move each piece so its tonic becomes the target for its mode.

The key comes from the same memoized estimate as ``key_meter`` (same option names and
defaults); the manifest's key fields keep describing the source file. ``output_notes`` gives
the writer the shifted note tables: the normalized piece and one copy per ``augment`` shift.
"""
from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np

from ..analysis import key as keymod
from ..analysis import meter as metermod
from ..analysis.transpose import (DIRECTIONS, fold_count, in_canonical_order, shift_controls,
                                  shift_key_signatures, shift_notes, smallest_shift)
from ..midi.accel import compiled_analyses
from ..midi.piece import DRUM_CHANNEL, Piece, sort_notes
from ..printed import compared
from .base import FileContext, Option, Stage, StageResult, Variant, register
from .key_meter import (KEY_OPTIONS, TRUST_FILE_KEY_TRANSPOSE, default_signature_on,
                        key_effective_options, key_fields, reported_key, shared_key_estimate)


def _check_note(value: Any) -> str | None:
    try:
        keymod.note_name_to_pc(value)
    except ValueError as exc:
        return str(exc)
    return None


def _check_direction(value: Any) -> str | None:
    if value not in DIRECTIONS:
        return f"must be one of {', '.join(DIRECTIONS)}, not {value!r}"
    return None


def _check_augment(value: Any) -> str | None:
    if not isinstance(value, (list, tuple)):
        return f"must be a list of whole semitone shifts, e.g. [-5, -4, 1, 2], not {value!r}"
    bad = [v for v in value if isinstance(v, bool) or not isinstance(v, int) or not -11 <= v <= 11]
    zero = 0 in [v for v in value if not isinstance(v, bool)]
    if bad:  # every wrong value at once (an audit: [12, 0] named 12, then 0 on the next try)
        also = "; and 0 is the normalized file itself, written anyway: remove it" if zero else ""
        return f"shifts must be whole numbers in -11..11, got {bad!r}{also}"
    if zero:
        return "0 is the normalized file itself, written anyway; remove it from augment"
    twice = sorted({v for v in value if value.count(v) > 1})
    if twice:
        return f"each shift may appear once, but {twice} appear more than once"
    return None


def _check_confidence(value: Any) -> str | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 <= value <= 1:
        return f"must be a number in 0..1 (a key_confidence), not {value!r}"
    return None


#: What transpose does with a file whose key_confidence is below min_key_confidence.
BELOW_CONFIDENCE = ("keep", "drop")


def _check_below(value: Any) -> str | None:
    if value not in BELOW_CONFIDENCE:
        return (f"must be keep (write the file untransposed) or drop (drop it as "
                f"key_uncertain), not {value!r}")
    return None


def augment_shifts(value: list[int]) -> list[int]:
    """The extra shifts actually written: distinct, sorted, without 0 (that is the main copy)."""
    return sorted({int(v) for v in value} - {0})


def augment_suffix(shift: int) -> str:
    """Output-name suffix of an augmentation copy, e.g. ``.t+3``, ``.t-5``."""
    return f".t{shift:+d}"


@register
class Transpose(Stage):
    """Transpose-normalize to a target tonic per mode; optional transposed copies."""

    name = "transpose"
    kind = "file"
    #: 5: its results carry the key it read (``key_fields``), as key_meter's do
    #: 6: and the key the shift used (``transpose_key``, ``transpose_key_confidence``); the
    #: guard compares the recorded (rounded) confidence; no key without pitched notes
    #: 7: the outputs leave out declarations flagged as sequencer defaults (``output_variants``)
    #: 8: the declared key is the last of the key signatures at the earliest tick
    version = 8
    options = (
        Option("major_to", str, "C", "Target tonic for major pieces (note name, e.g. C, Eb, F#).",
               _check_note),
        Option("minor_to", str, "A", "Target tonic for minor pieces.", _check_note),
        Option("direction", str, "nearest",
               "nearest (-6..+5 semitones), up (0..11) or down (-11..0).", _check_direction),
        Option("augment", list, [],
               "Extra semitone shifts (relative to the normalized piece) written as additional "
               "copies of each kept file, e.g. [-5, -4, -3, -2, -1, 1, 2, 3, 4, 5, 6]; all copies "
               "share the source's group id.", _check_augment),
        Option("notes_only", bool, False,
               "Write only notes (with the program changes they need) and the tempo, meter and "
               "key events to the normalized MIDI. false keeps the control changes (pedal, "
               "volume...), pitch bends, aftertouch, program changes, lyrics, text and markers, "
               "at their times; only notes and polyphonic-aftertouch keys are transposed."),
        Option("min_key_confidence", (int, float), 0.0,
               "Transpose only files whose estimated key_confidence is at least this (0..1, the "
               "probability that the key is right with the default profile); 0 = always.",
               _check_confidence),
        Option("below_confidence", str, "keep",
               "What to do below min_key_confidence: keep (write the file untransposed, "
               "transpose 0, transpose_held_back true) or drop (reason key_uncertain).",
               _check_below),
    ) + tuple(replace(o, doc=TRUST_FILE_KEY_TRANSPOSE) if o.name == "trust_file_key" else o
              for o in KEY_OPTIONS)
    doc = ("Shifts pitched notes so the estimated tonic becomes major_to/minor_to; drum channel "
           "untouched; notes beyond 0..127 folded by octaves and counted. A key estimated with "
           "a confidence below min_key_confidence is not applied: the file is kept untransposed "
           "or dropped, as below_confidence says.")

    def effective_options(self) -> dict[str, Any]:
        """The key options as they act (``key_effective_options``), and ``below_confidence``
        at its default when ``min_key_confidence`` is 0 (every estimate is applied)."""
        opts = key_effective_options(self.opts, self.options)
        if opts["min_key_confidence"] == 0:  # 0 and 0.0 alike (an audit: 0 decoded every file)
            default = next(o.default for o in self.options if o.name == "below_confidence")
            opts = {**opts, "below_confidence": default, "min_key_confidence": 0.0}
        return opts

    def process(self, piece: Piece, ctx: FileContext) -> StageResult:
        est = shared_key_estimate(ctx, self.opts)
        reported = reported_key(piece, est, bool(self.opts["trust_file_key"]))
        extra = augment_shifts(self.opts["augment"])
        limit = float(self.opts["min_key_confidence"])
        found = key_fields(reported, est)
        if reported is None:  # no pitched note: nothing to move, no key to guard
            values = {**found, "transpose": 0, "transpose_held_back": False, "transpose_folded": 0,
                      "transpose_key": None, "transpose_key_confidence": None,
                      "augment": extra, "augment_folded": 0}
            return StageResult.keep(detail="no pitched notes: not transposed", values=values)
        pc, mode, source = reported
        key = keymod.key_name(pc, mode)
        # the key the shift (or the guard) used, recorded apart from the key fields, which a
        # later key_meter with other key options replaces: every row can be checked
        confidence = found["key_confidence"]
        used = {"transpose_key": key, "transpose_key_confidence": confidence}
        # a key declared by the file (trust_file_key) is not an estimate: no guard; the guard
        # compares the recorded (rounded) confidence, so the row and the decision agree
        uncertain = source == "estimated" and confidence < limit
        if uncertain:
            shown, bar = compared(confidence, limit)  # never "0.300, below 0.3"
            why = f"key {key} estimated with confidence {shown}, below min_key_confidence {bar}"
            thresholds = {"key_confidence": limit}
            if self.opts["below_confidence"] == "drop":
                return StageResult.drop("key_uncertain", why,
                                        values={**found, **used, "transpose_held_back": True},
                                        thresholds=thresholds)
            values = {**found, **used, "transpose": 0, "transpose_held_back": True,
                      "transpose_folded": 0, "augment": extra,
                      "augment_folded": sum(fold_count(piece.notes, e) for e in extra)}
            return StageResult.keep(detail=f"not transposed: {why}", values=values,
                                    thresholds=thresholds)
        target = keymod.note_name_to_pc(self.opts["major_to" if mode == "major" else "minor_to"])
        shift = smallest_shift(pc, target, self.opts["direction"])
        folded = fold_count(piece.notes, shift)
        folded_aug = sum(fold_count(piece.notes, shift + e) for e in extra)
        values = {**found, **used, "transpose": shift, "transpose_held_back": False,
                  "transpose_folded": folded, "augment": extra, "augment_folded": folded_aug}
        detail = f"{key} shifted {shift:+d} semitones"
        if folded:
            detail += f", {folded} notes folded by octaves"
        return StageResult.keep(detail=detail, values=values)

    @staticmethod
    def output_notes(piece: Piece, values: dict) -> list[tuple[str, np.ndarray, int]]:
        """(suffix, notes, total semitones) for the normalized output (suffix "") and each
        augmentation copy, each computed from the source notes by one total shift (so folding
        happens once), in canonical note order."""
        shift = int(values.get("transpose") or 0)
        notes = piece.notes
        accel = compiled_analyses(notes)
        # a shift moves pitched notes past the drum notes of their onsets, so a shifted table
        # with drums is rarely in order: sort it; others are checked first (and kept as they
        # are when in order, as the stable sort would keep them)
        # (a speed shortcut only: in_canonical_order decides exactly either way)
        has_drums = accel is None and bool((notes["channel"] == DRUM_CHANNEL).any())

        def ordered(total: int) -> np.ndarray:
            if accel is not None:  # the same table in one compiled pass (tests/test_smf_accel.py)
                got = accel.shift_sort(notes, total)
                if got is not None:
                    return np.frombuffer(got[0], dtype=notes.dtype)
            table = shift_notes(notes, total)[0]
            if total and has_drums:
                return sort_notes(table)
            return table if in_canonical_order(table) else sort_notes(table)

        out = [("", ordered(shift), shift)]
        for extra in values.get("augment") or []:
            total = shift + int(extra)
            out.append((augment_suffix(int(extra)), ordered(total), total))
        return out

    shapes_output = True

    def output_variants(self, piece: Piece, values: dict, variants: list[Variant]) -> list[Variant]:
        """The normalized piece and one copy per ``augment`` shift (``output_notes``); a
        transposition moves only notes, the key numbers of polyphonic aftertouch on pitched
        channels and key signatures. With ``notes_only`` the outputs drop the control,
        pitch-bend, aftertouch and program-change events and the text-like metas. The outputs
        leave out the declarations the manifest flags as sequencer defaults
        (``without_default_declarations``)."""
        if self.opts["notes_only"]:
            piece = replace(piece, controls=piece.controls[:0], texts=())
        piece = without_default_declarations(piece, values.get("transpose_key"))
        out = []
        for suffix, notes, semitones in self.output_notes(piece, values):
            shifted = piece if semitones == 0 else replace(
                piece, key_signatures=shift_key_signatures(piece.key_signatures, semitones),
                controls=shift_controls(piece.controls, semitones))
            out.append(Variant(suffix, shifted, notes))
        return out


def without_default_declarations(piece: Piece, key: str | None) -> Piece:
    """The piece without the declarations the manifest flags as sequencer defaults: when its
    declared meter (the longest-lasting, ``meter.meter_from_file``) is a one-beat bar
    (``meter.is_default_meter``: 1/4 is what many sequencers write when no meter was set), its
    one-beat time signatures; when its declared key is a C major signature on a piece in
    ``key`` (the key the shift used) of another signature (``key_meter.default_signature_on``),
    the C major signatures before its first other one. A normalized file would otherwise carry
    a declaration the manifest flags as wrong (an audit: 59 of 67 POP909 outputs with a key
    signature, 349 of 453 with the 1/4 time signature); a pickup's 1/4 bar before a 4/4
    piece, or a later return to C major, is the music's and stays (a second audit)."""
    ts, ks = piece.time_signatures, piece.key_signatures
    keep_ts = np.ones(len(ts), dtype=bool)
    declared_meter = metermod.meter_from_file(piece)
    if declared_meter is not None and metermod.is_default_meter(declared_meter):
        keep_ts = np.array([not metermod.is_default_meter(f"{n}/{d}")
                            for n, d in zip(ts["numerator"].tolist(), ts["denominator"].tolist())], dtype=bool)
    keep_ks = np.ones(len(ks), dtype=bool)
    declared = keymod.declared_key(piece)
    if declared is not None and key is not None and default_signature_on(declared, *keymod.parse_key(key)):
        c_major = (ks["sharps"] == 0) & (ks["minor"] == 0)
        other = ks["tick"][~c_major]
        first_other = int(other.min()) if len(other) else None
        keep_ks = ~c_major if first_other is None else ~(c_major & (ks["tick"] < first_other))
    if keep_ts.all() and keep_ks.all():
        return piece
    return replace(piece, time_signatures=ts[keep_ts], key_signatures=ks[keep_ks])
