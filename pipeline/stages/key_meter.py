"""Stage ``key_meter``: key and meter of the source file, plus tempo and quantization.

Never drops a file. A windowed key estimate (analysis.modulation) reports whether the piece
modulates (``key_modulates``, ``key_second``). Declared values are kept as the file says them (``key_declared``,
``meter_declared``) and flagged when they look like sequencer defaults: a one-beat time
signature such as 1/4 (then ``meter`` is the estimate), a C major key signature on a piece whose
estimated key has another signature. With ``meter_contradiction`` above 0 (default 0), a
declared meter whose compatible meters the estimate rules out is replaced by the estimate too.
With ``trust_file_key`` every key field describes the reported (file) key. A file without
pitched notes gets no key, and one with too few onsets no meter estimate (null fields). The
key estimate is memoized in the file context under a name
that includes every option that changes it, so ``transpose`` (before or after this stage)
reuses it.
"""
from __future__ import annotations

from typing import Any

from ..analysis import key as keymod
from ..analysis import meter as metermod
from ..analysis import timing
from ..analysis import modulation as modmod
from ..midi.piece import DRUM_CHANNEL, Piece
from .base import FileContext, Option, Stage, StageResult, in_range, register


def _check_profile(value: Any) -> str | None:
    try:
        keymod.resolve_profile(value)
    except ValueError as exc:
        return str(exc)
    return None


def _check_weight(value: Any) -> str | None:
    if isinstance(value, bool) or value < 0:
        return f"must be a number >= 0, not {value!r}"
    return None


#: Options shared by ``key_meter`` and ``transpose`` (same names, same defaults), so that both
#: stages compute, and share, the same estimate unless a config sets them differently.
KEY_OPTIONS: tuple[Option, ...] = (
    Option("profile", str, keymod.DEFAULT_PROFILE,
           "Key method: learned (the trained key classifier; key_confidence is the probability "
           "that the key is right) or a published profile for the Krumhansl-Schmuckler "
           "correlation: " + ", ".join(sorted(keymod.PROFILES))
           + " (key_confidence is then the correlation margin). Default chosen by "
           "cross-validation across genres.",
           _check_profile),
    Option("bass_weight", (int, float), keymod.DEFAULT_BASS_WEIGHT,
           "Published profiles only: extra weight (multiple of its duration) for the lowest note "
           "of each onset; 0 = plain method.",
           _check_weight),
    Option("final_weight", (int, float), keymod.DEFAULT_FINAL_WEIGHT,
           "Published profiles only: extra weight for notes sounding in the last 4 beats; 0 = off.",
           _check_weight),
    Option("trust_file_key", bool, False,
           "Report the key-signature event of the file instead of the estimate when the file "
           "declares one; key_confidence then describes that key (the estimate's probability "
           "of it; a published profile: its correlation margin) and key_runner_up is the most "
           "likely other key. Transpose's own trust_file_key decides the shift "
           "(transpose_key)."),
)

#: transpose's text of ``trust_file_key`` (the same option, acting on the shift).
TRUST_FILE_KEY_TRANSPOSE = (
    "Transpose by (and report) the key-signature event of the file instead of the estimate "
    "when the file declares one (not held back by min_key_confidence); key_confidence then "
    "describes that key, as in key_meter.")


def key_effective_options(opts: dict[str, Any], options: tuple[Option, ...]) -> dict[str, Any]:
    """``opts`` with the profile by its canonical name (``tkp`` is ``temperley_kostka_payne``)
    and the published profiles' weights at their defaults under the learned method, which
    reads neither (``Stage.effective_options``)."""
    try:
        profile = keymod.resolve_profile(opts["profile"])
    except (KeyError, ValueError):  # options of another version: as they are
        return opts
    out = {**opts, "profile": profile} if profile != opts["profile"] else opts
    if profile != keymod.LEARNED:
        return out
    defaults = {o.name: o.default for o in options}
    return {**out, "bass_weight": defaults["bass_weight"], "final_weight": defaults["final_weight"]}


def key_memo_name(opts: dict[str, Any]) -> str:
    """The ``FileContext.analysis`` name of the key estimate for these options."""
    return (f"key:{keymod.resolve_profile(opts['profile'])}:"
            f"{float(opts['bass_weight']):g}:{float(opts['final_weight']):g}")


def has_pitched_notes(piece: Piece) -> bool:
    """Whether the piece holds a note off the drum channel (a key needs one)."""
    return bool((piece.notes["channel"] != DRUM_CHANNEL).any())


def shared_key_estimate(ctx: FileContext, opts: dict[str, Any]) -> keymod.KeyEstimate | None:
    """The (memoized) key estimate of the source piece for these options; None when the piece
    has no pitched note (drums only): there is no key to estimate."""
    profile = keymod.resolve_profile(opts["profile"])
    bass, final = float(opts["bass_weight"]), float(opts["final_weight"])
    return ctx.analysis(key_memo_name(opts),
                        lambda p: keymod.estimate_key(p, profile, bass_weight=bass, final_weight=final)
                        if has_pitched_notes(p) else None)


def key_declared_suspect(declared: str | None, estimate: keymod.KeyEstimate | None) -> bool | None:
    """Whether a declared key looks like a sequencer default: a C major signature (no sharps
    or flats, major) on a piece whose estimated key has another signature. A piece estimated in
    A minor fits the signature (its relative major is C), so it is not flagged. None when the
    file declares no key, or has no estimate to compare it with."""
    if declared is None or estimate is None:
        return None
    return default_signature_on(declared, estimate.tonic_pc, estimate.mode)


def default_signature_on(declared: str, tonic_pc: int, mode: str) -> bool:
    """Whether ``declared`` is a C major signature on a piece in the key (``tonic_pc``,
    ``mode``) of another signature (``key_declared_suspect``'s rule)."""
    if keymod.parse_key(declared) != (0, "major"):
        return False
    relative_major = tonic_pc if mode == "major" else (tonic_pc + 3) % 12
    return relative_major != 0


def reported_key(piece: Piece, estimate: keymod.KeyEstimate | None,
                 trust_file_key: bool) -> tuple[int, str, str] | None:
    """(tonic_pc, mode, source) of the key to report: the estimate, or the file's declared key
    when ``trust_file_key`` is set and the file declares one; None when there is neither (no
    pitched note, ``shared_key_estimate``)."""
    declared = keymod.declared_key(piece) if trust_file_key else None
    if declared is not None:
        pc, mode = keymod.parse_key(declared)
        return pc, mode, "file"
    if estimate is None:
        return None
    return estimate.tonic_pc, estimate.mode, "estimated"


def key_index(pc: int, mode: str) -> int:
    """A key's index in ``KeyEstimate.scores`` (major keys on C..B, then minor)."""
    return pc + (12 if mode == "minor" else 0)


def reported_confidence(reported: tuple[int, str, str] | None,
                        estimate: keymod.KeyEstimate | None) -> float | None:
    """The confidence recorded for the reported key, rounded as the manifest shows it (so
    transpose's guard compares the value the row holds): the estimate's confidence, or for a
    key the file declares the estimate's confidence of that key
    (``KeyEstimate.confidence_of``); None without an estimate."""
    if reported is None or estimate is None:
        return None
    pc, mode, source = reported
    value = estimate.confidence if source == "estimated" else \
        estimate.confidence_of(key_index(pc, mode))
    return round(value, 4)


def key_fields(reported: tuple[int, str, str] | None,
               estimate: keymod.KeyEstimate | None) -> dict[str, Any]:
    """The manifest's key fields of a reported key (``reported_key``), recorded by every stage
    that reads the key (key_meter, transpose), so a file dropped by transpose or a run without
    key_meter still says which key was found. All null without a key."""
    if reported is None:
        return {"tonic": None, "tonic_pc": None, "mode": None, "key_source": None,
                "key_confidence": None}
    pc, mode, source = reported
    names = keymod.MAJOR_TONIC_NAMES if mode == "major" else keymod.MINOR_TONIC_NAMES
    return {"tonic": names[pc], "tonic_pc": pc, "mode": mode, "key_source": source,
            "key_confidence": reported_confidence(reported, estimate)}


@register
class KeyMeter(Stage):
    """Detect key (tonic, mode, confidence) and meter; measure tempo and quantization."""

    name = "key_meter"
    kind = "file"
    #: 6: contradiction by compatible meters, no meter estimate from too few onsets, no key
    #: without pitched notes, key fields of the reported key with trust_file_key
    #: 7: the declared key is the last of the key signatures at the earliest tick
    version = 7
    options = KEY_OPTIONS + (
        Option("meter_contradiction", (int, float), metermod.CONTRADICTION_PROBABILITY,
               "The declared meter is replaced by the estimate when the estimate gives the "
               "meters compatible with it (its family: duple, triple or compound; 3/8 and the "
               "compound meters share the dotted-quarter beat) less than this probability; "
               "0 = keep every declared meter that is not a default (chosen by measurement: "
               "higher values overruled more true declarations than wrong ones).",
               in_range(0, 1)),
        Option("modulation_share", (int, float), modmod.MIN_SHARE,
               "key_modulates is true when the windowed key estimate holds two key signatures, "
               "each on at least this share of the 8-beat segments in which a note starts.",
               in_range(0, 1)),
    )
    doc = ("Estimates key (a trained key classifier, or Krumhansl-Schmuckler key profiles), whether "
           "the piece modulates (a windowed key estimate) and meter "
           "(a classifier over onset accent autocorrelation and position features), records what the file declares and "
           "flags declared values that look like sequencer defaults, the average tempo and the "
           "fraction of onsets on a 16th/triplet grid. Never drops a file.")

    def effective_options(self) -> dict[str, Any]:
        """The options as they act (``key_effective_options``)."""
        return key_effective_options(self.opts, self.options)

    def process(self, piece: Piece, ctx: FileContext) -> StageResult:
        est = shared_key_estimate(ctx, self.opts)
        declared = keymod.declared_key(piece)
        reported = reported_key(piece, est, bool(self.opts["trust_file_key"]))
        agrees = runner_up = regions = None
        if est is not None:
            if declared is not None:
                agrees = keymod.parse_key(declared) == (est.tonic_pc, est.mode)
            # the fields of one row describe one key: the reported one (the file's, with
            # trust_file_key): its runner-up is never itself, its second key never itself
            main = key_index(*reported[:2])
            runner_up = est.runner_up_to(main)
            regions = modmod.key_regions(piece, main,
                                         min_share=float(self.opts["modulation_share"]),
                                         windowed=est.windowed)
        meter_est = ctx.analysis("meter", metermod.estimate_meter)
        file_meter = metermod.meter_from_file(piece)
        meter_issue = metermod.declared_meter_issue(file_meter, meter_est,
                                                    float(self.opts["meter_contradiction"]))
        use_file = file_meter is not None and meter_issue is None
        meter = file_meter if use_file else meter_est.meter
        values = {
            **key_fields(reported, est),
            "key_runner_up": runner_up,
            "key_declared": declared,
            "key_agrees": agrees,
            "key_declared_suspect": key_declared_suspect(declared, est),
            "key_modulates": None if regions is None else regions.modulates,
            "key_second": regions.second_key if regions is not None and regions.modulates else None,
            "meter": meter,
            "meter_source": None if meter is None else "file" if use_file else "estimated",
            "meter_declared": file_meter,
            "meter_declared_suspect": meter_issue,
            "meter_estimated": meter_est.meter,
            "meter_confidence": None if meter_est.meter is None else round(meter_est.confidence, 4),
            "bpm": round(timing.tempo_bpm(piece), 2),
            "grid_fraction": round(timing.grid_fraction(piece), 4),
        }
        key = "no key (no pitched notes)" if reported is None else \
            f"{values['tonic']} {values['mode']} ({values['key_source']})"
        meter_text = "no meter (too few onsets)" if meter is None else \
            f"{meter} ({values['meter_source']})"
        return StageResult.keep(detail=f"{key}, {meter_text}", values=values)
