"""The worker side of a run: one file's pass through the per-file stages, as plain data.

A ``FileTask`` (made by ``pipeline.engine.plan``) names one content, the stages to compute or
the cached verdicts to follow, and where to render; ``process_file`` decodes it once, runs the
pass and returns a ``FileOutcome`` of stored forms (``pipeline.store.codec``), so the main
process neither serialises nor compacts per-file values. ``file_pass`` is the pass itself, the
one per-file loop: the benchmark times its steps and the fuzzer checks its verdicts through it.
"""
from __future__ import annotations

import errno
import hashlib
import os
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

from ..errors import MidisiftError
from ..midi.piece import Piece
from ..outputs.render import render
from ..stages.base import Variant
from ..stages import FileContext, Stage, StageResult, stage_class
from ..stages.base import options_fingerprint
from ..store.codec import stored_artifacts, stored_result
from .executor import Fault


@dataclass(slots=True)
class StagePlan:
    """What a worker needs to know of one stage for one file (read-only in the worker)."""

    name: str
    options: dict[str, Any]
    kind: str
    compute: bool
    cached: Any = None  # cached per-file verdict (a records.Result) when not computing
    fingerprint: str = ""       # the stage's options fingerprint, computed once in the main process


@dataclass(slots=True)  # memory: one per content to work on, no __dict__
class FileTask:
    """Plain-data description of the per-file work for one content."""

    sha256: str
    path: str
    source: str
    stages: list[StagePlan]
    render: str | None  # staging folder for normalized output, or None
    output_fp: str = ""


@dataclass(slots=True)  # memory: one per content to work on, no __dict__
class FileOutcome:
    """What a worker returns: results and artifacts of the stages it computed, staged outputs."""

    sha256: str
    results: dict[str, tuple] = field(default_factory=dict)  # stage -> codec.stored_result form
    artifacts: dict[str, tuple] = field(default_factory=dict)  # stage -> codec.stored_artifacts form
    staged: tuple[str, ...] = ()  # suffixes of the staged outputs (outputs.files.staged_path)
    seconds: float = 0.0
    #: (reason, detail) when the file could not be read as the content ``sha256`` names
    #: (``read_source``): no result then, and none is stored (it is not the content's verdict)
    unread: tuple[str, str] | None = None


#: Reason codes of a file the worker could not read as the content it was sent for; never
#: cached (the next run reads the file again): an I/O error, or bytes that are not the ones
#: hashed when the files were listed.
UNREADABLE, CHANGED = "unreadable", "changed_during_run"


class SourceUnread(Exception):
    """``read_source`` could not give the content's bytes: ``reason`` (``UNREADABLE``,
    ``CHANGED``) and a sentence."""

    def __init__(self, reason: str, detail: str):
        super().__init__(detail)
        self.reason, self.detail = reason, detail


def read_source(path: str, sha256: str, limit: int) -> tuple[bytes, int]:
    """The first ``limit + 1`` bytes of the file at ``path`` (the reading stage sees no more)
    and the file's size, checked to be the content ``sha256``: the results are stored under
    that hash, so bytes written after the file was hashed must not be judged in its name. The
    rest of a file longer than that is hashed too, not kept. Raises ``SourceUnread``."""
    try:
        with open(path, "rb") as fh:
            # the file's size bounds the buffer: read(n) allocates n bytes first, so a limit
            # above the memory limit (validate.max_bytes: 3e9) dropped every file
            size = os.fstat(fh.fileno()).st_size
            data = fh.read(min(size, limit) + 1)
            h = hashlib.sha256(data)
            if len(data) > limit:
                for block in iter(lambda: fh.read(1 << 20), b""):
                    h.update(block)
    except OSError as e:  # reliability: not the content's fault (moved away, a disk gone, EIO)
        raise SourceUnread(UNREADABLE, f"cannot read the file: {e.strerror or e} (errno "
                           f"{errno.errorcode.get(e.errno, e.errno)}); an I/O error is not "
                           "the content's verdict: it is not cached, and the next run reads "
                           "the file again") from None
    if h.hexdigest() != sha256:
        raise SourceUnread(CHANGED, "the file changed while the run was reading it (its bytes no "
                           "longer have the sha256 taken when the files were listed); not "
                           "judged nor cached in this run, the next run reads it again")
    return data, size


@dataclass
class FilePass:
    """One file's way through the per-file stages: the piece (None when the reader dropped
    it), each stage's verdict as a result dict (computed or cached) and each corpus stage's
    ``prepare`` output, in stage order; ``survived`` when no stage dropped it."""

    piece: Piece | None
    results: dict[str, dict] = field(default_factory=dict)
    computed: set[str] = field(default_factory=set)  # the stages whose verdicts were computed
    artifacts: dict[str, dict] = field(default_factory=dict)
    survived: bool = False


#: ``file_pass``'s step timer: called with a step's label and its start time (``time.process_time``).
StepClock = Callable[[str, float], None]


def file_pass(stages: Sequence[Stage], data: bytes, source: str, sha256: str = "", *,
              compute: Sequence[bool] | None = None, cached: Sequence[Any] | None = None,
              step: StepClock | None = None, size: int | None = None) -> FilePass:
    """Run one file's bytes through ``stages`` (the first reads the bytes: ``Stage.read``).

    ``compute[i]`` false means stage ``i``'s verdict is ``cached[i]`` (a file stage; a corpus
    stage's ``prepare`` is then skipped); the pass stops at the first drop. ``step(label, t0)``
    is told each step's label (the reader's name, a stage's, ``NAME.prepare``) after it ran.
    ``size``: the file's size when ``data`` holds only the bytes the reader needs."""
    n = len(stages)
    compute = compute if compute is not None else [True] * n
    cached = cached if cached is not None else [None] * n
    clock = time.process_time
    t = clock()
    reader = stages[0]
    result, piece = reader.read(data, source, size)
    out = FilePass(piece)
    out.results[reader.name] = result.to_json()
    if compute[0]:
        out.computed.add(reader.name)
    if step is not None:
        step(reader.name, t)
    if piece is None or not result.kept:
        return out
    ctx = FileContext(piece, source, sha256)
    for st, comp, old in zip(stages[1:], compute[1:], cached[1:]):
        t = clock()
        if st.kind == "corpus":
            if comp and st.has_prepare():
                out.artifacts[st.name] = st.prepare(piece, ctx)
                if step is not None:
                    step(f"{st.name}.prepare", t)
            continue
        if comp:
            rj = _run_file_stage(st, piece, ctx).to_json()
            out.computed.add(st.name)
        else:
            rj = old or {"kept": True, "values": {}}
        out.results[st.name] = rj
        if step is not None:
            step(st.name, t)
        if not rj["kept"]:
            return out
    out.survived = True
    return out


def output_variants(stages: Sequence[Stage], piece: Piece, results: dict[str, dict]) -> list[Variant]:
    """The normalized output(s) of a piece that survived: the piece itself, reshaped by each
    stage that shapes outputs (``Stage.output_variants``), in stage order."""
    variants = [Variant("", piece, piece.notes)]
    for st in stages:
        if st.shapes_output:
            variants = st.output_variants(piece, (results.get(st.name) or {}).get("values", {}), variants)
    return variants


# ---------------------------------------------------------------------------------------------
# in the worker process

_STAGE_CACHE: dict[tuple[str, str], Stage] = {}


def _stage(plan: StagePlan) -> Stage:
    """Build (once per worker process) the stage object for a plan entry."""
    key = (plan.name, plan.fingerprint or options_fingerprint(plan.name, 0, plan.options))
    st = _STAGE_CACHE.get(key)
    if st is None:
        st = stage_class(plan.name)(plan.options)
        _STAGE_CACHE[key] = st
    return st


def warm_before_fork() -> None:
    """Done once in the parent before it forks its workers, so each inherits it instead of
    doing it on its first task (about 15 ms of CPU per worker): numpy.random, which the MinHash
    permutations draw from (the main process imports it anyway for dedup's corpus step), and
    the compiled analyses' check (``midi.accel.compiled_analyses``)."""
    import numpy.random  # noqa: F401
    from ..midi.accel import compiled_analyses
    from ..midi.piece import empty_notes
    compiled_analyses(empty_notes())


def process_file(task: FileTask) -> FileOutcome:
    """Decode one file once and compute what the task asks for. Never raises for bad input."""
    t0 = time.perf_counter()
    stages = [_stage(p) for p in task.stages]
    try:
        data, size = read_source(task.path, task.sha256, stages[0].read_limit())
    except SourceUnread as e:
        return FileOutcome(task.sha256, unread=(e.reason, f"{task.source}: {e.detail}"),
                           seconds=time.perf_counter() - t0)
    done = file_pass(stages, data, task.source, task.sha256, size=size,
                     compute=[p.compute for p in task.stages], cached=[p.cached for p in task.stages])
    out = FileOutcome(task.sha256)
    for name in done.computed:
        out.results[name] = stored_result(done.results[name])
    for name, arts in done.artifacts.items():
        out.artifacts[name] = stored_artifacts(arts)
    if done.survived and task.render:
        variants = output_variants(stages, done.piece, done.results)
        out.staged = render(variants, task.render, task.sha256, task.output_fp)
    out.seconds = time.perf_counter() - t0
    return out


def fault_outcome(task: FileTask, fault: Fault) -> FileOutcome:
    """Reliability: the outcome of a task whose worker hung, crashed or ran out of memory.

    It is a drop by the reading stage with the fault's reason code (``timeout``,
    ``too_large``, ``decoder_crash``) and sentence, cached like any verdict, so the file is not
    retried on every rerun (``--retry-failed`` retries the RETRYABLE ones)."""
    plan = task.stages[0]
    limit = {"timeout": "timeout_s", "too_large": "max_memory_mb"}.get(fault.reason)
    thresholds = {limit: plan.options.get(limit)} if limit else {}
    out = FileOutcome(task.sha256)
    out.results[plan.name] = stored_result(StageResult.drop(fault.reason, fault.detail, {}, thresholds).to_json())
    return out


def _run_file_stage(st: Stage, piece: Piece, ctx: FileContext) -> StageResult:
    try:
        return st.process(piece, ctx)
    except MemoryError:  # reliability: the executor drops the file as too_large, replaces the worker
        raise
    except MidisiftError as e:
        return StageResult.drop("stage_error", f"stage {st.name} failed: {e.reason}")
    except Exception as e:  # a bug in a stage must not stop the run; the file says why
        return StageResult.drop("stage_error", f"stage {st.name} raised {type(e).__name__}: {e}")
