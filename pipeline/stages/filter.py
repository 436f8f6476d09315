"""The ``filter`` stage: drop pieces too short, too long, too sparse, too dense, ... for training.

Every measure of ``pipeline.analysis.stats`` goes into the manifest whatever the verdict, and each
limit goes into ``StageResult.thresholds`` under the measure's name, so ``explain`` can show a
value beside the rule it was held against. Each rule that drops a file has its own reason code;
rules are checked in the order of ``RULES`` (coarse and cheap to understand first), the first
failing rule gives the reason and ``detail`` lists every failure.

Every limit accepts ``null`` to switch its rule off.
"""
from __future__ import annotations

import copy
from dataclasses import dataclass
from typing import Any, Callable

from ..analysis.stats import MEASURES, piece_stats
from ..midi.piece import Piece
from ..printed import compared
from .base import FileContext, Option, Stage, StageResult, register

#: General MIDI Level 1 instrument families: 16 blocks of 8 programs. Source: MIDI Manufacturers
#: Association, General MIDI System Level 1 specification, "GM Sound Set" family table (from
#: memory). Program numbers here are the 0-based data byte (GM's "1-8 Piano" is 0-7).
GM_FAMILIES: dict[str, range] = {name: range(8 * i, 8 * i + 8) for i, name in enumerate((
    "piano", "chromatic_percussion", "organ", "guitar", "bass", "strings", "ensemble", "brass",
    "reed", "pipe", "synth_lead", "synth_pad", "synth_effects", "ethnic", "percussive",
    "sound_effects"))}
#: The name that stands for the drum channel (channel 10) in allow/deny lists.
DRUMS = "drums"


def _is_num(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _nonneg(name: str) -> Callable[[Any], str | None]:
    def check(v: Any) -> str | None:
        if v is None:
            return None
        if not _is_num(v) or v < 0:
            return f"{name} must be a number >= 0 or null (off)"
        return None
    return check


def _exclusions(v: Any) -> str | None:
    if v is None:
        return None
    if not all(isinstance(k, str) and isinstance(vals, list) and vals
               and all(isinstance(x, (str, int, float)) for x in vals) for k, vals in v.items()):
        return "metadata_exclude maps a column name to a list of values, e.g. {licence: [CC-BY-NC]}"
    return None


def _count(name: str) -> Callable[[Any], str | None]:
    """A count of notes or pitches: a whole number >= 0 (YAML ``32.0`` is accepted), or null."""
    def check(v: Any) -> str | None:
        if v is None:
            return None
        if not _is_num(v) or v < 0 or v != int(v):
            return f"{name} must be a whole number >= 0 or null (off)"
        return None
    return check


def _fraction(v: Any) -> str | None:
    if v is None:
        return None
    if not _is_num(v) or not 0 <= v <= 1:
        return "max_drum_fraction must be between 0 and 1 or null (off)"
    return None


def _range_pair(v: Any) -> str | None:
    if v is None:
        return None
    if (not isinstance(v, (list, tuple)) or len(v) != 2
            or not all(x is None or (_is_num(x) and x >= 0) for x in v)):
        return "notes_per_s must be a [low, high] pair of numbers >= 0 (null for no bound)"
    lo, hi = v
    if lo is not None and hi is not None and lo > hi:
        return f"notes_per_s low {lo} is above high {hi}; write [low, high]"
    return None


def _program_list(name: str) -> Callable[[Any], str | None]:
    def check(v: Any) -> str | None:
        if v is None:
            return None
        if not isinstance(v, (list, tuple)):
            return f"{name} must be a list of GM programs (0-127) or family names"
        for item in v:
            try:
                resolve_programs([item])
            except ValueError as e:
                return f"{name}: {e}"
        return None
    return check


def resolve_programs(items: list | tuple) -> frozenset:
    """GM program numbers (0-127) and family names -> a set of programs, plus ``"drums"``.

    Raises ValueError for an unknown family name, an out-of-range number or any other value
    (a fraction, null: no family name is suggested for what is not a name).
    """
    out: set = set()
    for item in items:
        if isinstance(item, bool) or not isinstance(item, (int, str)):
            raise ValueError(f"{item!r} is not a program: give a GM program number, a whole "
                             f"number from 0 to 127, or a family name ({', '.join(GM_FAMILIES)}, "
                             "or 'drums')")
        if isinstance(item, int):
            if not 0 <= item <= 127:
                raise ValueError(f"program {item} is outside 0-127 (GM 1-128 minus one)")
            out.add(item)
            continue
        key = str(item).strip().lower().replace(" ", "_").replace("-", "_")
        if key == DRUMS:
            out.add(DRUMS)
        elif key in GM_FAMILIES:
            out.update(GM_FAMILIES[key])
        else:
            near = sorted(GM_FAMILIES, key=lambda f: _distance(f, key))[0]
            raise ValueError(f"unknown instrument family {item!r}; did you mean {near!r}? "
                             f"(families: {', '.join(GM_FAMILIES)}, or 'drums')")
    return frozenset(out)


def _distance(a: str, b: str) -> int:
    """Levenshtein distance (for 'did you mean')."""
    prev = list(range(len(b) + 1))
    for i, ca in enumerate(a, 1):
        cur = [i]
        for j, cb in enumerate(b, 1):
            cur.append(min(prev[j] + 1, cur[j - 1] + 1, prev[j - 1] + (ca != cb)))
        prev = cur
    return prev[-1]


@dataclass(frozen=True)
class Rule:
    """One drop rule: its reason code, the measure it reads and how it fails."""

    reason: str
    measure: str
    fails: Callable[[dict, dict], str | None]   # (stats, opts) -> failure sentence or None


def _below(measure: str, opt: str, unit: str = "") -> Callable[[dict, dict], str | None]:
    def fails(s: dict, o: dict) -> str | None:
        lim = o[opt]
        if lim is not None and s[measure] < lim:
            value, limit = compared(s[measure], lim)
            return f"{measure} {value}{unit} < {opt} {limit}{unit}"
        return None
    return fails


def _above(measure: str, opt: str, unit: str = "") -> Callable[[dict, dict], str | None]:
    def fails(s: dict, o: dict) -> str | None:
        lim = o[opt]
        if lim is not None and s[measure] > lim:
            value, limit = compared(s[measure], lim)
            return f"{measure} {value}{unit} > {opt} {limit}{unit}"
        return None
    return fails


def _rate(bound: int) -> Callable[[dict, dict], str | None]:
    def fails(s: dict, o: dict) -> str | None:
        pair = o["notes_per_s"]
        lim = pair[bound] if pair is not None else None
        if lim is None:
            return None
        v = s["notes_per_s"]
        if (v < lim) if bound == 0 else (v > lim):
            side = "low" if bound == 0 else "high"
            op = "<" if bound == 0 else ">"
            value, limit = compared(v, lim)
            return f"notes_per_s {value} {op} notes_per_s {side} {limit}"
        return None
    return fails


def _programs(s: dict, o: dict) -> str | None:
    used = set(s["programs"]) | ({DRUMS} if s["has_drums"] else set())
    if o["programs_allow"] is not None:
        outside = used - resolve_programs(o["programs_allow"])
        if outside:
            return f"uses {_names(outside)} outside programs_allow"
    if o["programs_deny"] is not None:
        denied = used & resolve_programs(o["programs_deny"])
        if denied:
            return f"uses {_names(denied)} from programs_deny"
    return None


def _names(progs: set) -> str:
    nums = sorted(p for p in progs if p != DRUMS)
    parts = [f"program {p}" for p in nums] + ([DRUMS] if DRUMS in progs else [])
    return ", ".join(parts)


#: The rules in the documented order: the first failing one is the reason code.
RULES: tuple[Rule, ...] = (
    Rule("too_short", "duration_s", _below("duration_s", "min_seconds", " s")),
    Rule("too_long", "duration_s", _above("duration_s", "max_seconds", " s")),
    Rule("too_few_notes", "notes", _below("notes", "min_notes")),
    Rule("drums_only", "drum_fraction", _above("drum_fraction", "max_drum_fraction")),
    Rule("too_sparse", "notes_per_s", _rate(0)),
    Rule("too_dense", "notes_per_s", _rate(1)),
    Rule("too_few_pitches", "pitches", _below("pitches", "min_pitches")),
    Rule("too_polyphonic", "max_polyphony", _above("max_polyphony", "max_polyphony")),
    Rule("long_silence", "longest_silence_s", _above("longest_silence_s", "max_silence_s", " s")),
    Rule("stuck_note", "longest_note_s", _above("longest_note_s", "max_note_s", " s")),
    Rule("program_excluded", "programs", _programs),
)
REASONS = tuple(r.reason for r in RULES)

_NUM = (int, float, type(None))


@register
class Filter(Stage):
    """Drop pieces whose length, density or instrumentation does not suit a training corpus."""

    name = "filter"
    kind = "file"
    version = 3  # 2: a drop's detail prints a value apart from its limit (7.99998 s < 8 s); 3: large
    # values with their whole part (1500 s > 1200 s, not 1.5e+03 s > 1.2e+03 s)
    doc = ("Measures length and density of each piece and drops those outside the limits; "
           "every limit accepts null to switch its rule off.")
    options = (
        Option("min_seconds", _NUM, 8.0, "Shortest piece kept, in seconds (tempo map applied); "
               "shorter ones are dropped as too_short.", _nonneg("min_seconds")),
        Option("max_seconds", _NUM, 1200.0, "Longest piece kept, in seconds; longer ones are "
               "dropped as too_long (20 minutes: past a long symphonic movement).",
               _nonneg("max_seconds")),
        Option("min_notes", _NUM, 32, "Fewest notes (drums included) kept; fewer is too_few_notes.",
               _count("min_notes")),
        Option("max_drum_fraction", _NUM, 0.9, "Largest fraction of notes on the drum channel "
               "(channel 10); above it the file is dropped as drums_only (a pure drum file has "
               "1.0). Lower it (e.g. 0.5) to drop mostly-drum files too.", _fraction),
        Option("notes_per_s", (list, tuple, type(None)), [0.5, 60.0], "[low, high] notes per "
               "second; below low is too_sparse, above high is too_dense (dense 'black MIDI' "
               "runs into the hundreds).", _range_pair),
        Option("min_pitches", _NUM, 5, "Fewest distinct pitches (drum notes excluded); fewer is "
               "too_few_pitches.", _count("min_pitches")),
        Option("max_polyphony", _NUM, 48, "Most pitched notes sounding at once; more is "
               "too_polyphonic (well above an orchestral tutti; catches note clusters).",
               _count("max_polyphony")),
        Option("max_silence_s", _NUM, 30.0, "Longest stretch with no note sounding, leading "
               "silence included; longer is long_silence (often two pieces in one file, or a "
               "bad offset).", _nonneg("max_silence_s")),
        Option("max_note_s", _NUM, 60.0, "Longest pitched note in seconds; longer is "
               "stuck_note (a note-off that never came). Raise it for organ drones.",
               _nonneg("max_note_s")),
        Option("programs_allow", (list, tuple, type(None)), None, "If set, every instrument of a "
               "piece must be listed, or it is dropped as program_excluded. Items: GM program "
               "numbers 0-127 (the file's data byte: GM 1-128 minus one), GM family names "
               "(piano, organ, guitar, bass, strings, ...), or 'drums'. E.g. [piano] keeps "
               "piano-only pieces.", _program_list("programs_allow")),
        Option("programs_deny", (list, tuple, type(None)), None, "If set, a piece using any "
               "listed instrument is dropped as program_excluded (same items as programs_allow).",
               _program_list("programs_deny")),
        Option("metadata_exclude", (dict, type(None)), None, "Columns of the metadata table and "
               "the values that drop a file as metadata_excluded, e.g. {licence: [CC-BY-NC, "
               "unknown]} (compared casefolded, spaces trimmed; `title` may be used too).",
               _exclusions),
    )

    @property
    def uses_source_fields(self) -> bool:
        return bool(self.opts["metadata_exclude"])

    def source_verdict(self, fields: dict[str, Any]) -> StageResult | None:
        """metadata_excluded when one of the source's fields holds an excluded value."""
        for column, values in self.opts["metadata_exclude"].items():
            value = fields.get(column)
            if value is not None and str(value).strip().casefold() in {str(v).strip().casefold() for v in values}:
                return StageResult.drop("metadata_excluded", f"{column} is {value!r}, which "
                                        f"metadata_exclude lists", {column: value},
                                        {column: {"exclude": list(values)}})
        return None

    @classmethod
    def check_options(cls, opts: dict[str, Any]) -> str | None:
        """Limits that contradict each other would drop every file."""
        lo, hi = opts["min_seconds"], opts["max_seconds"]
        if lo is not None and hi is not None and lo > hi:
            return (f"min_seconds {lo:g} is above max_seconds {hi:g}: every file would be "
                    "dropped; swap them or raise max_seconds")
        return None

    def process(self, piece: Piece, ctx: FileContext) -> StageResult:
        stats = ctx.analysis("stats", piece_stats)
        return judge(stats, self.opts, self._thresholds())

    judges_stored = True

    def judge_stored(self, stored: dict[str, Any], earlier: dict[str, Any]) -> StageResult | None:
        """``judge`` on the measures the result recorded (every measure, and the programs with
        ``drums`` for the drum channel), whatever the limits were; None for a fault's empty
        values."""
        values = stored["values"]
        programs = values.get("programs")
        if not isinstance(programs, list) or any(m not in values for m in MEASURES):
            return None
        stats = dict(values, programs=[p for p in programs if p != DRUMS], has_drums=DRUMS in programs)
        return judge(stats, self.opts, self._thresholds())

    def _thresholds(self) -> dict[str, Any]:
        """``thresholds_of(self.opts)``, built once per option setting instead of once per
        file (results treat it as read-only, as ``records`` does when it shares equal ones)."""
        cached = self.__dict__.get("_thresholds_for")
        if cached is None or cached[0] != self.opts:
            cached = (copy.deepcopy(self.opts), thresholds_of(self.opts))
            self._thresholds_for = cached
        return cached[1]


def thresholds_of(opts: dict) -> dict[str, Any]:
    """Each measure's limits as ``{"min": .., "max": ..}`` (only the limits that are on)."""
    rate = opts["notes_per_s"] or (None, None)
    limits = {
        "duration_s": {"min": opts["min_seconds"], "max": opts["max_seconds"]},
        "notes": {"min": opts["min_notes"]},
        "drum_fraction": {"max": opts["max_drum_fraction"]},
        "notes_per_s": {"min": rate[0], "max": rate[1]},
        "pitches": {"min": opts["min_pitches"]},
        "max_polyphony": {"max": opts["max_polyphony"]},
        "longest_silence_s": {"max": opts["max_silence_s"]},
        "longest_note_s": {"max": opts["max_note_s"]},
        "programs": {"allow": opts["programs_allow"], "deny": opts["programs_deny"]},
    }
    out = {}
    for measure, lim in limits.items():
        lim = {k: v for k, v in lim.items() if v is not None}
        if lim:
            out[measure] = lim
    return out


def judge(stats: dict, opts: dict, thresholds: dict[str, Any] | None = None) -> StageResult:
    """Hold ``stats`` against the limits in ``opts``; the verdict with every failure listed.
    ``thresholds`` is ``thresholds_of(opts)`` when the caller has it already."""
    values = {m: stats[m] for m in MEASURES}
    values["programs"] = list(stats["programs"]) + ([DRUMS] if stats["has_drums"] else [])
    if thresholds is None:
        thresholds = thresholds_of(opts)
    failures = [(r.reason, msg) for r in RULES if (msg := r.fails(stats, opts))]
    if not failures:
        return StageResult.keep(values=values, thresholds=thresholds)
    detail = "; ".join(f"{msg} ({reason})" for reason, msg in failures)
    if len(failures) > 1:
        detail = f"{len(failures)} rules failed: {detail}"
    return StageResult.drop(failures[0][0], detail, values=values, thresholds=thresholds)
