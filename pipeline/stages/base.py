"""The stage interface: what a stage declares and what it returns.

A stage is a class with a ``name``, a ``kind`` (``"file"``: sees one decoded piece at a time in a
worker process; ``"corpus"``: sees all survivors at once in the main process), a table of
``options`` (name, type, default, check, doc) and a ``version`` (bump it when the stage's logic
changes so cached results are recomputed).

Per-file stages implement ``process(piece, ctx)``. Corpus stages implement ``prepare(piece, ctx)``
(per file, in the worker; its arrays are cached in the ledger) and ``run_corpus(members, state)``.
Every verdict is a ``StageResult``; the runner, not the stage, keeps counts, logs and caches.

Results must be pure functions of the source file bytes and the stage's own options (analyses
describe the source file whatever the stage order), which is what makes per-(sha256, stage,
options-fingerprint) caching correct.
"""
from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Callable, ClassVar, Mapping, NamedTuple

import numpy as np


from ..midi import DECODER_VERSION
from ..midi.piece import Piece
from ..store.codec import canonical_json
from ..store.records import Result


@dataclass(frozen=True)
class Option:
    """One configurable option of a stage.

    ``kind`` is the expected Python type (or tuple of types) after YAML loading; ``check``
    returns an error sentence for a bad value, or None. ``doc`` is the README text.
    """

    name: str
    kind: type | tuple[type, ...]
    default: Any
    doc: str
    check: Callable[[Any], str | None] | None = None


#: The verdict of a stage on one file (``keep``/``drop``; ``values`` go into the manifest,
#: ``thresholds`` map a measure to the limit it was held against, for ``explain``; ``reason``
#: is None when kept, else a reason code of the README's table). The same type carries the
#: verdicts of earlier stages (``CorpusState.upstream``) and of the last run.
StageResult = Result


class FileContext:
    """Per-file memo shared by the per-file stages of one worker task.

    ``analysis(name, fn)`` computes an analysis of the *source* piece once and returns the
    cached value afterwards, so ``transpose`` and ``key_meter`` share one key estimate whatever
    their order.
    """

    def __init__(self, piece: Piece, source: str = "", sha256: str = ""):
        self.piece = piece
        self.source = source
        self.sha256 = sha256
        self._memo: dict[str, Any] = {}

    def analysis(self, name: str, fn: Callable[[Piece], Any]) -> Any:
        if name not in self._memo:
            self._memo[name] = fn(self.piece)
        return self._memo[name]


@dataclass(slots=True)  # memory: one per file that reaches a corpus stage
class Member:
    """A file that reached a corpus stage.

    ``values`` holds every manifest value measured so far (e.g. ``notes``, ``duration_s``);
    ``artifacts`` maps a corpus stage name to what its ``prepare`` returned for this file;
    ``group`` is an id shared by outputs that must travel together (augmentation copies).
    """

    id: str
    sha256: str
    source: str
    values: dict[str, Any]
    artifacts: dict[str, dict[str, Any]]
    outputs: list[str] = field(default_factory=list)
    #: per-source fields beside the measured values: ``title`` and the metadata table's columns
    meta: dict[str, Any] = field(default_factory=dict)
    #: the other sources of its content (byte-identical copies), each with its own fields
    copies: tuple[tuple[str, Mapping[str, Any]], ...] = ()

    def sources(self) -> list[tuple[str, Mapping[str, Any]]]:
        """Every source of the member with its own fields: the first (``source``, ``meta``),
        then its byte-identical copies. A grouping by folder or field ties each of them."""
        return [(self.source, self.meta), *self.copies]


class CorpusState:
    """Persistent JSON state a corpus stage keeps between runs (backed by the ledger).

    ``previous`` holds what the stage saved in the last completed run; ``save`` records what
    this run's state will be once the run completes. ``upstream`` maps an earlier corpus
    stage's name to its results of this run, keyed by member id.
    """

    def __init__(self, previous: dict[str, Any] | None = None,
                 upstream: dict[str, dict[str, StageResult]] | None = None,
                 flags: dict[str, Any] | None = None):
        self.previous = previous or {}
        self.current: dict[str, Any] = {}
        self.upstream = upstream or {}
        self.flags = flags or {}
        self.notes: list[str] = []

    def save(self, key: str, value: Any) -> None:
        self.current[key] = value

    def report(self, line: str) -> None:
        """A line for the run summary (e.g. a file that moved between split parts)."""
        self.notes.append(line)


class Stage:
    """Base class of all stages. Instantiate with validated options (a dict)."""

    name: ClassVar[str] = ""
    kind: ClassVar[str] = "file"
    version: ClassVar[int] = 1
    options: ClassVar[tuple[Option, ...]] = ()
    doc: ClassVar[str] = ""
    #: Names of ``prepare`` arrays a corpus stage reads only for some members (e.g. the sets it
    #: compares in pairs): they reach ``run_corpus`` as ``ledger.StoredArray`` handles, read
    #: with ``ledger.load_arrays``.
    deferred_artifacts: ClassVar[tuple[str, ...]] = ()

    def __init__(self, opts: dict[str, Any] | None = None):
        merged = {o.name: o.default for o in self.options}
        merged.update(opts or {})
        self.opts = merged

    @property
    def fingerprint(self) -> str:
        """Hash of the stage name, version and options as they act (``effective_options``):
        the cache key of its results."""
        return options_fingerprint(self.name, self.version, self.effective_options())

    def effective_options(self) -> dict[str, Any]:
        """The options with each one that has no effect under the others at its default, so
        that changing it reuses every result (a published profile's weight under the learned
        key method). The options themselves by default."""
        return self.opts

    @property
    def uses_source_fields(self) -> bool:
        """True when the stage reads each source's own fields (``title``, the metadata table's
        columns): a per-file stage through ``source_verdict``, after its content's verdict; a
        corpus stage through ``Member.meta`` (left empty otherwise)."""
        return False

    def source_verdict(self, fields: dict[str, Any]) -> StageResult | None:
        """A drop for one source whose content this stage kept, judged on fields of the path
        rather than the bytes (so never cached with the content's result), or None."""
        return None

    #: A corpus stage's options that its per-file ``prepare`` reads (None: all of them).
    #: Its stored artifacts are keyed by these alone, so changing an option that only the
    #: corpus step reads (a threshold) re-decodes no file.
    prepare_options: tuple[str, ...] | None = None

    @property
    def artifact_fingerprint(self) -> str:
        """The cache key of the stage's per-file ``prepare`` artifacts."""
        if self.prepare_options is None:
            return self.fingerprint
        return options_fingerprint(f"{self.name}.prepare", self.version,
                                   {k: self.opts[k] for k in self.prepare_options})

    # per-file stages
    def process(self, piece: Piece, ctx: FileContext) -> StageResult:  # pragma: no cover
        raise NotImplementedError

    #: True when the stage can give its verdict under new options from the result it stored
    #: under earlier ones (``judge_stored``): a rerun with other options then reads no file for
    #: the contents it judges (``engine.rejudge``).
    judges_stored = False

    def judge_stored(self, stored: dict[str, Any], earlier: dict[str, Any]) -> StageResult | None:
        """The verdict ``process`` gives a content whose result under the stage's ``earlier``
        options (of this version) was ``stored`` (kept, reason, detail, values, thresholds),
        or None when the piece must be seen again."""
        return None

    def bind(self, earlier: list["Stage"]) -> None:
        """Called once by whoever runs a config, with the stages configured before this one
        (e.g. the split reads dedup's signatures when they are the ones it needs)."""

    # corpus stages
    def prepare(self, piece: Piece, ctx: FileContext) -> dict[str, Any]:
        """Per-file work for a corpus stage, run in the worker. Returns numpy arrays/scalars."""
        return {}

    def has_prepare(self) -> bool:
        """Whether this corpus stage has per-file ``prepare`` work to run and store."""
        return type(self).prepare is not Stage.prepare

    def run_corpus(self, members: Sequence[Member], state: CorpusState) -> dict[str, StageResult]:  # pragma: no cover
        """Results by member id for the files that reached this stage. ``members`` is read,
        not changed: the walk's members are made as they are read (``walk.StepMembers``)."""
        raise NotImplementedError

    # hooks the engine calls, so that it names no stage ----------------------------------------
    #: The stage that reads each file's bytes and makes the piece (``read``); the config's
    #: first stage must be one.
    reads_bytes: ClassVar[bool] = False

    def read(self, data: bytes, source: str, size: int | None = None) -> tuple[StageResult, Piece | None]:
        """Decode a file's bytes: the verdict, and the piece when kept (a reading stage).
        ``size`` is the file's size when ``data`` holds only its first ``read_limit() + 1``
        bytes (a verdict on its size states the file's, not the bytes read)."""
        raise NotImplementedError(f"stage {self.name} does not read files")

    def read_limit(self) -> int:
        """Most bytes of a file that ``read`` needs (a reading stage); the worker reads one more."""
        raise NotImplementedError(f"stage {self.name} does not read files")

    def worker_limits(self) -> dict[str, Any]:
        """Per-file limits this stage imposes on the workers: ``timeout_s`` (seconds) and
        ``max_memory_mb``, both options of this stage (faults are its drops)."""
        return {}

    #: Whether the stage's results change the normalized output files (``output_variants``);
    #: its options fingerprint is then part of the output fingerprint.
    shapes_output: ClassVar[bool] = False

    def output_variants(self, piece: Piece, values: dict[str, Any],
                        variants: list["Variant"]) -> list["Variant"]:
        """The normalized outputs of a kept piece, given the earlier stages' ``variants`` and
        this stage's recorded ``values`` for it."""
        return variants

    #: Whether a corpus stage reads the verdicts of the per-file stages after it
    #: (``state.flags["dropped_later"]``): its results then depend on their options too.
    weighs_later_verdicts: ClassVar[bool] = False

    #: Whether the stage judges byte-identical copies of a file it saw: a copy's trail ends at
    #: this stage with ``byte_copy_verdict`` (one verdict per content is stored, not per path).
    judges_byte_copies: ClassVar[bool] = False

    def byte_copy_verdict(self, rep_source: str, sha: str, rep_result: dict) -> dict:
        """The verdict (a trail step) of a byte-identical copy of ``rep_source``, whose own
        verdict at this stage is ``rep_result``."""
        raise NotImplementedError

    def reads_from(self) -> tuple[str, ...]:
        """The earlier corpus stages whose ``prepare`` artifacts this stage reads (they reach
        ``run_corpus`` as ``Member.artifacts[name]``; decided in ``bind``)."""
        return ()

    def parts(self) -> list[str] | None:
        """The output parts this stage assigns kept files to, in the config's order, or None."""
        return None

    def add_to_summary(self, summary: dict[str, Any], saved: dict[str, Any]) -> None:
        """Add this stage's own entries to summary.json (``saved``: its corpus state of the run)."""


class Variant(NamedTuple):
    """One normalized output of a piece: its file name suffix ("" for the main output, e.g.
    ".t+3" for an augmentation copy), the piece to write and its note table."""

    suffix: str
    piece: Piece
    notes: np.ndarray


def options_fingerprint(name: str, version: int, opts: dict[str, Any]) -> str:
    """A stable 16-hex-digit hash of a stage's identity and options, and of the decoder's rules
    (``midi.DECODER_VERSION``: every result is made from decoded notes)."""
    blob = canonical_json({"stage": name, "version": version, "options": opts,
                           "decoder": DECODER_VERSION})
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def bind_stages(stages: list[Stage]) -> list[Stage]:
    """Tell each stage of a config which stages come before it (``Stage.bind``); returns them."""
    for i, st in enumerate(stages):
        st.bind(stages[:i])
    return stages


REGISTRY: dict[str, type[Stage]] = {}



def register(cls: type[Stage]) -> type[Stage]:
    """Class decorator that makes a stage known to the config loader and the runner."""
    if not cls.name:
        raise TypeError(f"{cls.__name__} has no stage name")
    REGISTRY[cls.name] = cls
    return cls


# Small option checkers: each returns an error sentence or None (STYLE: one checker per rule).
def positive(value: float) -> str | None:
    return None if value > 0 else "must be greater than 0"


def unit_interval(value: float) -> str | None:
    return None if 0 < value <= 1 else "must be in (0, 1]"


def in_range(lo: float, hi: float) -> Callable[[Any], str | None]:
    def check(value: Any) -> str | None:
        return None if lo <= value <= hi else f"must be between {lo} and {hi}"
    return check


def one_of(*choices: Any) -> Callable[[Any], str | None]:
    def check(value: Any) -> str | None:
        return None if value in choices else f"must be one of {', '.join(map(repr, choices))}"
    return check
