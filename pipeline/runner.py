"""Plans the stages, feeds files through them, reuses cached results, shows progress.

A run has four steps:

1. **discover + fingerprint**: every ``.mid .midi .kar .rmi`` file under the input folder (case
   insensitive, symlinks not followed, the output folder excluded); a file whose size and mtime
   match the ledger keeps its recorded sha256, any other is hashed.
2. **per-file pass**: for each distinct content (sha256) the runner works out which stage results
   are missing from the ledger (key: sha256, stage, options fingerprint) and sends only those
   files to the workers, which decode once and run the per-file stages in order (stopping at the
   first drop), the ``prepare`` step of each corpus stage, and render the normalized output into
   a staging folder. Results are committed to the ledger in batches.
3. **stage walk**: stages are applied in config order over the files still alive: per-file
   verdicts come from the ledger, corpus stages (dedup, split) run over the survivors in the main
   process. A dropped file never reaches a later stage.
4. **outputs**: normalized files placed under ``midi/<part>/``, split lists, manifest, summary.
"""
from __future__ import annotations

import gc
import hashlib
import sqlite3
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from json.encoder import encode_basestring_ascii as _json_string
from typing import Any

from . import __version__, outputs, uptodate
from .config import Config
from .errors import LedgerError, MidisiftError
from .executor import Fault, Limits, run_tasks
from .ledger import Ledger, canonical_json, stored_artifacts, stored_result, thresholds_json
from .lock import OutputLock
from .records import Compactor, Result, TrailValues
from .reasons import RETRYABLE
from .report import RunReport, grouping_off, in_part_order
from .rowreuse import RowReuse
from .sources import Discovery, SourceFile, check_folders, discover, fingerprint
from .stages import CorpusState, FileContext, Member, Stage, StageResult, stage_class
from .stages.base import bind_stages, options_fingerprint

BATCH = 2048  # results + artifacts per ledger transaction (also flushed every 2 s): about 300
#               files; each commit costs a WAL write of its pages, about 1.5 ms
#: Stage names of the byte-identical shortcut and of the runner's own state.
RUNNER_STATE = "_runner"


def _reduce_by_fields(obj: Any) -> tuple:
    """Pickle a slotted dataclass as (class, field values) instead of the default state dicts
    of slotted classes: about half the bytes per task (a stage plan: 175 instead of 328)."""
    return (type(obj), tuple(getattr(obj, name) for name in obj.__slots__))


#: Plain-data form (nested tuples) of the plan lists shared by many tasks (plans without a
#: cached verdict), by the plans' object ids; each entry keeps its plans alive, so their ids
#: are not reused.
_SHARED_PLAN_FIELDS: dict[tuple[int, ...], tuple[list, tuple]] = {}


def _reduce_task(task: "FileTask") -> tuple:
    """Pickle a task; a plan list without cached verdicts goes as nested tuples of plain
    values, made once (pickled in C, without a Python ``__reduce__`` call per plan: 19 instead
    of 29 us per task in one measurement)."""
    plans = task.stages
    if any(p.cached is not None for p in plans):
        return _reduce_by_fields(task)
    key = tuple(map(id, plans))
    hit = _SHARED_PLAN_FIELDS.get(key)
    if hit is None or any(a is not b for a, b in zip(hit[0], plans)):
        fields = tuple(tuple(getattr(p, n) for n in p.__slots__) for p in plans)
        hit = _SHARED_PLAN_FIELDS[key] = (list(plans), fields)
    return (_task_from_fields, (task.sha256, task.path, task.source, hit[1], task.render,
                                task.output_fp))


def _task_from_fields(sha256: str, path: str, source: str, plans: tuple, render: str | None,
                      output_fp: str) -> "FileTask":
    """The task pickled by ``_reduce_task`` (worker side)."""
    return FileTask(sha256, path, source, [StagePlan(*p) for p in plans], render, output_fp)


@dataclass(slots=True)
class StagePlan:
    """What a worker needs to know of one stage for one file (read-only in the worker)."""

    __reduce__ = _reduce_by_fields

    name: str
    options: dict[str, Any]
    kind: str
    compute: bool
    cached: Any = None  # cached per-file verdict (a records.Result) when not computing
    fingerprint: str = ""       # the stage's options fingerprint, computed once in the main process


@dataclass(slots=True)  # memory: one per file, no __dict__
class FileTask:
    """Plain-data description of the per-file work for one content."""

    __reduce__ = _reduce_task

    sha256: str
    path: str
    source: str
    stages: list[StagePlan]
    render: str | None  # staging folder for normalized output, or None
    output_fp: str = ""


@dataclass(slots=True)  # memory: one per file, no __dict__
class FileOutcome:
    """What a worker returns: results and artifacts of the stages it computed, staged outputs."""

    __reduce__ = _reduce_by_fields

    sha256: str
    results: dict[str, tuple] = field(default_factory=dict)  # stage -> ledger.stored_result form
    artifacts: dict[str, tuple] = field(default_factory=dict)  # stage -> ledger.stored_artifacts form
    staged: tuple[str, ...] = ()  # suffixes of the staged outputs (outputs.staged_path)
    seconds: float = 0.0


# ---------------------------------------------------------------------------------------------
# the worker side

_STAGE_CACHE: dict[tuple[str, str], Stage] = {}


def _stage(plan: StagePlan) -> Stage:
    """Build (once per worker process) the stage object for a plan entry."""
    key = (plan.name, plan.fingerprint or options_fingerprint(plan.name, 0, plan.options))
    st = _STAGE_CACHE.get(key)
    if st is None:
        st = stage_class(plan.name)(plan.options)
        _STAGE_CACHE[key] = st
    return st


def process_file(task: FileTask) -> FileOutcome:
    """Decode one file once and compute what the task asks for. Never raises for bad input."""
    t0 = time.perf_counter()
    out = FileOutcome(task.sha256)
    validate_plan = task.stages[0]
    with open(task.path, "rb") as fh:
        data = fh.read(int(validate_plan.options.get("max_bytes", 16_000_000)) + 1)
    result, piece = _stage(validate_plan).check(data, task.source)
    if validate_plan.compute:
        out.results[validate_plan.name] = stored_result(result.to_json())
    if piece is None or not result.kept:
        out.seconds = time.perf_counter() - t0
        return out
    ctx = FileContext(piece, task.source, task.sha256)
    survived = True
    transpose_values = None
    for plan in task.stages[1:]:
        st = _stage(plan)
        if plan.kind == "corpus":
            if plan.compute:
                out.artifacts[plan.name] = stored_artifacts(st.prepare(piece, ctx))
            continue
        if plan.compute:
            rj = _run_file_stage(st, piece, ctx, task.source).to_json()
            out.results[plan.name] = stored_result(rj)
        else:
            rj = plan.cached or {"kept": True, "values": {}}
        if plan.name == "transpose":
            transpose_values = rj.get("values", {})
        if not rj["kept"]:
            survived = False
            break
    if survived and task.render:
        out.staged = outputs.render(piece, task.stages, transpose_values, task.render,
                                    task.sha256, task.output_fp)
    out.seconds = time.perf_counter() - t0
    return out


def fault_outcome(task: FileTask, fault: Fault) -> FileOutcome:
    """Reliability: the outcome of a task whose worker hung, crashed or ran out of memory.

    It is a ``validate`` drop with the fault's reason code (``timeout``, ``too_large``,
    ``decoder_crash``) and sentence, cached like any verdict, so the file is not retried on every
    rerun (``--retry-failed`` retries the RETRYABLE ones)."""
    plan = task.stages[0]
    limit = {"timeout": "timeout_s", "too_large": "max_memory_mb"}.get(fault.reason)
    thresholds = {limit: plan.options.get(limit)} if limit else {}
    out = FileOutcome(task.sha256)
    out.results[plan.name] = stored_result(StageResult.drop(fault.reason, fault.detail, {}, thresholds).to_json())
    return out


def _run_file_stage(st: Stage, piece: Any, ctx: FileContext, source: str) -> StageResult:
    try:
        return st.process(piece, ctx)
    except MemoryError:  # reliability: the executor drops the file as too_large, replaces the worker
        raise
    except MidisiftError as e:
        return StageResult.drop("stage_error", f"stage {st.name} failed: {e.reason}")
    except Exception as e:  # a bug in a stage must not stop the run; the file says why
        return StageResult.drop("stage_error", f"stage {st.name} raised {type(e).__name__}: {e}")


# ---------------------------------------------------------------------------------------------
# the main side

class Runner:
    """One run of a config over its input folder."""

    def __init__(self, config: Config, *, fresh: bool = False, quiet: bool = False,
                 reassign: bool = False, retry_failed: bool = False,
                 discovered: Discovery | None = None):
        self.config = config
        self.discovered = discovered  # a listing of the input folder made moments ago (cli)
        self.fresh = fresh
        self.quiet = quiet
        self.reassign = reassign
        self.retry_failed = retry_failed
        self.stages: list[Stage] = bind_stages([sc.build() for sc in config.stages])
        self._fps = {s.name: s.fingerprint for s in self.stages}
        # a stage's results depend on its options and on every stage before it
        self._chains: dict[str, str] = {}
        h = hashlib.sha256()
        for s in self.stages:
            h.update(f"{s.name}:{s.fingerprint};".encode())
            self._chains[s.name] = h.hexdigest()[:16]
        self.output_fp = outputs.output_fingerprint(self.stages)
        self._recomputed: set[str] = set()  # contents whose per-file results this run computed
        self._remote: Any = None  # the Dask executor while a run names a scheduler

    # progress -----------------------------------------------------------------------------
    def _bar(self, desc: str, total: int, position: int = 0) -> Any:
        if self.quiet or not sys.stderr.isatty():
            return _NoBar()  # a disabled tqdm still starts its monitor thread
        from tqdm import tqdm
        # the per-file pass works once per distinct content (the table's "contents decoded")
        return tqdm(total=total, desc=f"{desc:<17}", unit="content", position=position,
                    leave=True, dynamic_ncols=True)

    def run(self) -> RunReport:
        t_start = time.perf_counter()
        cfg = self.config
        if not cfg.input.is_dir():
            raise MidisiftError("the input folder does not exist or is not a folder; check 'input' in the config "
                                "or --input", file=str(cfg.input))
        check_folders(cfg.input, cfg.output)
        out = cfg.output
        # a Dask scheduler is reached (and its workers checked) before anything is written
        self._remote = _connect(cfg.executor)
        try:
            try:
                out.mkdir(parents=True, exist_ok=True)
            except OSError as e:
                raise LedgerError(f"cannot create the output folder ({e.strerror})", file=str(out)) from None
            if self._remote is not None:
                self._remote.check_shared(str(cfg.input), str(out))
            with OutputLock(out):
                with Ledger(out / "state.sqlite") as ledger:
                    try:
                        return self._run(ledger, t_start)
                    finally:
                        gc.unfreeze()  # the run's frozen objects are the collector's again
        finally:
            if self._remote is not None:
                self._remote.close()
                self._remote = None

    def _run(self, ledger: Ledger, t_start: float) -> RunReport:
        cfg = self.config
        timings: dict[str, float] = {}
        run_id = ledger.start_run({"config": cfg.raw, "stages": [[s.name, s.opts] for s in self.stages]})
        if self.fresh:
            with ledger.batch():
                ledger.clear_cache()

        t = time.perf_counter()
        d, self.discovered = self.discovered, None
        if d is not None and d.matches(cfg.input, cfg.output):
            files, notes = d.files, d.notes
        else:
            files, notes = discover(cfg.input, cfg.output)
        known = ledger.sources()
        changed = fingerprint(files, known)
        present = {f.rel for f in files}
        with ledger.batch():
            ledger.put_sources(changed)
            ledger.forget_sources([p for p in known if p not in present])
        timings["discover"] = time.perf_counter() - t
        unknown = cfg.metadata.unknown_sources(present)
        if unknown:
            notes = [*notes, f"metadata: {len(unknown)} row(s) of {cfg.metadata.path} name no input "
                             f"file (paths are relative to the input folder, '/'-separated), e.g. "
                             + ", ".join(repr(u) for u in unknown[:3])]

        state_key = self._state_key(files)
        qkey = uptodate.quick_key(cfg.raw, files)
        unchanged = self._unchanged(ledger, state_key)
        if unchanged is not None:  # same files, same options, outputs in place: nothing to do
            uptodate.record_unchanged(ledger, cfg.output, unchanged, run_id, qkey,
                                      timings["discover"], t_start)
            return uptodate.report_from(unchanged, cfg.output, time.perf_counter() - t_start, notes)

        # distinct contents, each represented by its first source path
        rep: dict[str, str] = {}
        for f in files:
            rep.setdefault(f.sha256, f.rel)
        path_of = {f.rel: f.path for f in files}

        t = time.perf_counter()
        with _bulk_data():
            # speed: stored values stay JSON text until a row that needs them is rebuilt
            cache = {s.name: ledger.results_for(s.name, s.fingerprint, self._compactor(s.name).make_stored,
                                                values_as_text=True)
                     for s in self.stages if s.kind == "file"}
        # a corpus stage without a prepare step (the split reading dedup's signatures) has
        # nothing to store per file
        art_keys = {s.name: ledger.artifact_keys(s.name, s.artifact_fingerprint) if _prepares(s) else _EVERY
                    for s in self.stages if s.kind == "corpus"}
        recorded_out = ledger.outputs()
        existing_out = outputs.existing_outputs(cfg.output, self.output_fp, recorded_out)
        # outputs a stopped run rendered and did not place yet are used, not rendered again
        self._staged = outputs.staged_outputs(cfg.output, self.output_fp)
        has_out = existing_out.keys() | self._staged.keys() if self._staged else existing_out
        last_status = {sha: status for sha, status in ledger.decision_statuses()}
        tasks = []
        for sha, rel in rep.items():
            task = self._plan(sha, rel, path_of[rel], cache, art_keys, has_out, last_status)
            if task is not None:
                tasks.append(task)
        computed = len(tasks)
        with _bulk_data():
            self._execute(ledger, tasks, cache)
        del tasks  # memory: a task per content (about 300 bytes each) is not needed any more
        timings["per_file"] = time.perf_counter() - t

        # stage walk
        t = time.perf_counter()
        with _bulk_data():
            walk = self._walk(ledger, rep, cache, timings)
        timings["corpus"] = time.perf_counter() - t

        # late renders: contents kept now that have no output (e.g. a cluster's new representative)
        t = time.perf_counter()
        kept_shas = [sha for sha in rep if walk.status[sha] is None]
        missing = [sha for sha in kept_shas
                   if sha not in existing_out and sha not in walk.staged]
        if missing:
            late = [self._render_task(sha, rep[sha], path_of[rep[sha]], cache) for sha in missing]
            self._execute(ledger, late, cache, walk.staged)
        placed = outputs.place(ledger, cfg.output, walk, rep, existing_out, self.output_fp, recorded_out)
        del recorded_out
        timings["outputs"] = time.perf_counter() - t

        tally = outputs.Tally()

        def summary_of() -> dict:
            timings["total"] = time.perf_counter() - t_start
            summary = outputs.build_summary(tally, walk, self.stages, timings, computed,
                                            len(rep) - computed, placed, cfg)
            summary["counts"]["state_key"] = state_key
            summary["counts"]["quick_key"] = qkey
            return summary

        # one pass over the files writes the manifest and records the trails for explain, all
        # in the run's last transaction (a run killed before its commit leaves the previous
        # run's decisions in place)
        reuse = RowReuse(ledger, cfg.output, self._rows_base(), self._recomputed)
        corpus_positions = tuple(i for i, st in enumerate(self.stages) if st.kind == "corpus")
        with ledger.batch():
            decisions = _DecisionSink(ledger, reuse.gone(present) if reuse.usable else None,
                                      walk.trail_json)
            summary = outputs.write_all(
                cfg.output, outputs.manifest_rows(files, walk, placed, tally, decisions.add,
                                                  reuse, corpus_positions),
                placed, summary_of, outputs.configured_parts(self.stages))
            decisions.flush()
            reuse.save(ledger, len(files))
            for name, st in walk.states.items():
                ledger.put_state(name, st)
            for name, (replace, rows) in walk.corpus_rows.items():
                fp = _last_fingerprint(self._fps[name])
                if replace:
                    ledger.forget_results(name, fp)
                ledger.put_results((sha, name, fp, rec) for sha, rec in rows)
            ledger.finish_run(run_id, summary["counts"])
        from .html_report import write_report  # the run's page, from what was just written
        write_report(cfg.output, summary, [s.name for s in self.stages], cfg.input)
        parts = in_part_order(dict(summary["split"]["outputs"]), summary["split"].get("part_order"))
        return RunReport(cfg.output, len(files), tally.kept, tally.dropped_by, timings, computed,
                         len(rep) - computed, parts, notes + walk.notes,
                         summary.get("warnings", []),
                         grouping_off=grouping_off(summary["split"].get("stage")))

    # the nothing-changed shortcut ------------------------------------------------------------
    def _state_key(self, files: list[SourceFile]) -> str:
        """Hash of everything a run's outputs depend on: every (source, sha256) and what every
        row depends on besides its own file (``_rows_base``: the stages' options fingerprints,
        which include their versions, the output fingerprint, the package version)."""
        h = hashlib.sha256()
        uptodate.files_digest(h, files)
        h.update(self._rows_base().encode())
        return h.hexdigest()

    def _rows_base(self) -> str:
        """What every manifest row depends on besides its own file: the stages, their options
        fingerprints, the output fingerprint and the package version (``pipeline.rowreuse``)."""
        h = hashlib.sha256()
        for st in self.stages:
            h.update(f"{st.name}:{st.kind}:{st.fingerprint}\n".encode())
        h.update(f"{self.output_fp}\nmidisift {__version__}".encode())
        h.update(f"\nmetadata {self.config.metadata.digest}".encode())  # its columns are in rows
        return h.hexdigest()

    def _unchanged(self, ledger: Ledger, state_key: str) -> dict | None:
        """The last run's summary when this run would reproduce it exactly, else None (no flag
        may ask for new work; see ``pipeline.uptodate``)."""
        if self.fresh or self.reassign or self.retry_failed:
            return None
        return uptodate.last_summary_if(ledger, self.config.output, "state_key", state_key)

    # planning -------------------------------------------------------------------------------
    def _plan(self, sha: str, rel: str, path: str, cache: dict, art_keys: dict, existing_out: dict,
              last_status: dict) -> FileTask | None:
        if not self._needs_work(sha, cache, art_keys, existing_out, last_status):
            return None  # a rerun's known files: no plan objects are built for them
        plans: list[StagePlan] = []
        uncertain = False
        fate_known_dropped = False
        # memory: plans without a cached result are the same for every file, so tasks share them
        common = self.__dict__.setdefault("_common_plans", {})
        for st in self.stages:
            if st.kind == "corpus":
                compute = sha not in art_keys[st.name]
                key = (st.name, compute)
                if key not in common:
                    common[key] = StagePlan(st.name, st.opts, st.kind, compute, fingerprint=self._fps[st.name])
                plans.append(common[key])
                continue
            cached = cache[st.name].get(sha)
            if cached is not None and self.retry_failed and is_retryable(cached):
                cached = None
            if cached is None:
                key = (st.name, True)
                if key not in common:
                    common[key] = StagePlan(st.name, st.opts, st.kind, True, fingerprint=self._fps[st.name])
                plans.append(common[key])
                uncertain = True
                continue
            plans.append(StagePlan(st.name, st.opts, st.kind, False, cached, self._fps[st.name]))
            if not cached["kept"] and not uncertain:
                fate_known_dropped = True
                break
        # render the normalized output now when the file will probably be kept
        render = None
        if not fate_known_dropped and sha not in existing_out and last_status.get(sha, "kept") == "kept":
            render = str(self.config.output / outputs.STAGING)
        return FileTask(sha, str(path), rel, plans, render, self.output_fp)

    def _needs_work(self, sha: str, cache: dict, art_keys: dict, existing_out: dict,
                    last_status: dict) -> bool:
        """Whether this content needs a task: a corpus stage's artifacts or a per-file result is
        missing (or is a fault that ``--retry-failed`` retries), or the file will probably be
        kept and has no output yet. ``_plan`` builds the task only then."""
        for st in self.stages:
            if st.kind == "corpus":
                if sha not in art_keys[st.name]:
                    return True
                continue
            cached = cache[st.name].get(sha)
            if cached is None or (self.retry_failed and is_retryable(cached)):
                return True
            if not cached.kept:
                return False  # dropped by a cached verdict: nothing after it is needed
        return sha not in existing_out and last_status.get(sha, "kept") == "kept"

    def _compactor(self, stage: str) -> Compactor:
        """The stage's maker of compact result records (one per stage and run)."""
        memo = self.__dict__.setdefault("_compactors", {})
        if stage not in memo:
            memo[stage] = Compactor()
        return memo[stage]

    def _render_task(self, sha: str, rel: str, path: str, cache: dict) -> FileTask:
        plans = [StagePlan(st.name, st.opts, st.kind, False, cache.get(st.name, {}).get(sha), self._fps[st.name])
                 for st in self.stages]
        return FileTask(sha, str(path), rel, plans, str(self.config.output / outputs.STAGING), self.output_fp)

    def _execute(self, ledger: Ledger, tasks: list[FileTask], cache: dict,
                 staged: dict[str, tuple[str, ...]] | None = None) -> None:
        if not tasks:
            return
        if staged is None:
            staged = self._staged
        suffixes: dict[tuple[str, ...], tuple[str, ...]] = {}
        # one bar per per-file stage (files/s): validate's counts every file decoded, the others
        # the files whose result for that stage came back (a dropped file stops early)
        # in config order: the per-file stages and the per-file step of corpus stages (dedup's
        # signatures); the corpus steps get their own bars in the walk
        file_stages = [s.name for s in self.stages if s.kind == "file" or _prepares(s)]
        bar = self._bar(file_stages[0], len(tasks))
        stage_bars = {name: self._bar(name, len(tasks), i) for i, name in enumerate(file_stages) if i}
        pending_r, pending_a, pending_s = [], [], []
        fps = {s.name: s.fingerprint for s in self.stages}
        art_fps = {s.name: s.artifact_fingerprint for s in self.stages}
        last = time.monotonic()
        # reliability: per-file limits are validate options; a fault becomes a cached drop
        vopts = self.stages[0].opts
        limits = Limits(float(vopts.get("timeout_s", 60.0)), int(vopts.get("max_memory_mb", 2048)))
        try:
            outcomes = (self._remote.run_tasks(process_file, tasks, limits=limits, on_fault=fault_outcome)
                        if self._remote is not None else
                        run_tasks(process_file, tasks, self.config.workers, limits=limits,
                                  on_fault=fault_outcome))
            for oc in outcomes:
                if oc.results:
                    self._recomputed.add(oc.sha256)
                for name, stored in oc.results.items():
                    cache[name][oc.sha256] = self._compactor(name).from_stored(stored)
                    pending_r.append((oc.sha256, name, fps[name], stored))
                for name, arts in oc.artifacts.items():
                    pending_a.append((oc.sha256, name, art_fps[name], arts))
                if oc.staged:  # memory: the same few suffix tuples, shared (paths are derived)
                    staged[oc.sha256] = suffixes.setdefault(oc.staged, oc.staged)
                    pending_s.append((oc.sha256, oc.staged))
                bar.update(1)
                for name, stage_bar in stage_bars.items():
                    if name in oc.results or name in oc.artifacts:
                        stage_bar.update(1)
                    else:  # dropped before this stage (or its verdict was cached): not coming
                        _shrink(stage_bar)
                if len(pending_r) + len(pending_a) >= BATCH or time.monotonic() - last > 2.0:
                    self._flush(ledger, pending_r, pending_a, pending_s)
                    last = time.monotonic()
        finally:  # also when the run is stopped (Ctrl-C, SIGTERM): finished work is kept
            self._flush(ledger, pending_r, pending_a, pending_s)
            bar.close()
            for b in stage_bars.values():
                b.close()

    def _flush(self, ledger: Ledger, results: list, artifacts: list, staged: list) -> None:
        """Commit finished results and artifacts, then list the finished staged outputs (a
        listed output's results are always in the ledger)."""
        if not results and not artifacts and not staged:
            return
        try:
            with ledger.batch():
                ledger.put_results(results)
                ledger.put_artifacts(artifacts)
        except sqlite3.Error as e:  # reliability: disk full / I/O error names the ledger's path
            raise LedgerError(f"cannot save results to the state database ({e}); check free space "
                              "and permissions of the output folder, then rerun (committed results "
                              "are kept)", file=str(ledger.path)) from None
        results.clear()
        artifacts.clear()
        outputs.record_staged(self.config.output, self.output_fp, staged)
        staged.clear()

    def _source_verdict(self, st: Stage, kept: Any, trail: list, source: str) -> Any:
        """The stage's verdict on the source's own fields (metadata, title); a drop replaces
        the content's kept result in this run's trail only (it is never stored as the
        content's result: another path may hold the same bytes)."""
        file_title = TrailValues(trail).get("file_title")
        drop = st.source_verdict(outputs.source_fields(source, file_title, self.config.metadata))
        if drop is None:
            return kept
        values = {**kept.values, **drop.values}
        return self._compactor(st.name).make(False, drop.reason, drop.detail, values,
                                             {**kept.thresholds, **drop.thresholds})

    # the stage walk ---------------------------------------------------------------------------
    def _walk(self, ledger: Ledger, rep: dict[str, str], cache: dict, timings: dict) -> "Walk":
        names = [st.name for st in self.stages]
        walk = Walk(staged=self._staged, stage_names=names, metadata=self.config.metadata)
        alive = list(rep)  # contents in first-source order (sorted paths)
        # memory: a trail holds the cached result records themselves (no copies, no merged
        # values dict per file); trail_of and value_of build what a reader needs one file at a time
        trails: dict[str, list] = {sha: [] for sha in rep}
        upstream: dict[str, dict[str, Any]] = {}  # stage -> id -> Result (reads like StageResult)
        for st in self.stages:
            t = time.perf_counter()
            if st.kind == "file":
                survivors = []
                stage_cache = cache[st.name]
                for sha in alive:
                    r = stage_cache.get(sha)
                    if r is None:  # cannot happen unless a worker died; keep the file's trail honest
                        r = self._compactor(st.name).make(
                            False, "decoder_crash", "the worker processing this file did not "
                            "return a result", {}, {})
                    elif st.uses_source_fields and r["kept"]:
                        r = self._source_verdict(st, r, trails[sha], rep[sha])
                    trails[sha].append(r)
                    if r["kept"]:
                        survivors.append(sha)
                    else:
                        walk.status[sha] = (st.name, r["reason"])
                alive = survivors
            else:
                # speed, memory: the large per-file arrays a stage compares only in pairs stay
                # in the ledger until compared (Stage.deferred_artifacts)
                arts = (ledger.artifacts_for(st.name, st.artifact_fingerprint, set(alive),
                                             defer=st.deferred_artifacts)
                        if _prepares(st) else {})
                members = []
                for sha in alive:
                    values = TrailValues(trails[sha])
                    meta = (outputs.source_fields(rep[sha], values.get("file_title"), self.config.metadata)
                            if st.uses_source_fields else {})
                    members.append(Member(sha[:16], sha, rep[sha], values, {st.name: arts.pop(sha, {})},
                                          meta=meta))
                del arts
                for m in members:  # artifacts of earlier corpus stages travel along
                    for prev, res in walk.artifacts.items():
                        if m.sha256 in res:
                            m.artifacts[prev] = res[m.sha256]
                walk.artifacts[st.name] = {m.sha256: m.artifacts[st.name] for m in members}
                saved = ledger.state_for(st.name)
                last = None  # the last run's results of this stage, when it stored them
                if not self.fresh and saved.get(CORPUS_RESULTS) == self._chains[st.name]:
                    last = _last_results(ledger, st.name, st.fingerprint, self._compactor(st.name))
                state = CorpusState(saved, upstream, {"fresh": self.fresh, "reassign": self.reassign,
                                                      "previous_results": last})
                bar = self._bar(f"{st.name} (corpus)", len(members))
                res = st.run_corpus(members, state) if members else {}
                del members
                bar.update(len(alive))
                bar.close()
                walk.states[st.name] = {**state.current, CORPUS_RESULTS: self._chains[st.name]}
                walk.notes.extend(state.notes)
                survivors = []
                make = self._compactor(st.name).make
                keep = make(True, None, "", {}, {})
                compact: dict[str, Any] = {}
                new_rows: list[tuple[str, Any]] = []  # results this run computed (to store)
                for sha in alive:
                    r = res.get(sha[:16])
                    if type(r) is Result:  # the last run's record, returned as it is
                        rec = r
                    else:
                        rec = keep if r is None else make(r.kept, r.reason, r.detail, r.values, r.thresholds)
                        new_rows.append((sha, rec))
                    if r is not None:
                        compact[sha[:16]] = rec
                    trails[sha].append(rec)
                    if rec.kept:
                        survivors.append(sha)
                    else:
                        walk.status[sha] = (st.name, rec.reason)
                # memory: later stages read this stage's verdicts as the compact records (same
                # attributes as StageResult), and a dropped file's artifacts are let go
                upstream[st.name] = compact
                # all rows anew, or (when some were reused) only the new ones
                walk.corpus_rows[st.name] = (len(new_rows) == len(alive), new_rows)
                del res
                gone = set(alive) - set(survivors)
                for arts_of in walk.artifacts.values():
                    for sha in gone:
                        arts_of.pop(sha, None)
                alive = survivors
            timings[f"stage:{st.name}"] = time.perf_counter() - t
        walk.artifacts.clear()  # memory: signatures and shingles are not needed after the walk
        for sha in alive:
            walk.status[sha] = None
        walk.trails = trails
        walk.byte_copy_stage = "dedup" if "dedup" in names else None
        walk.rep = rep
        return walk


def _connect(executor: str) -> Any:
    """None for local worker processes; for a scheduler's address, a connected
    ``executor_dask.DaskExecutor`` (dask is imported only then)."""
    if executor == "local":
        return None
    from .executor_dask import DaskExecutor
    return DaskExecutor.connect(executor)


@contextmanager
def _bulk_data() -> Iterator[None]:
    """A phase that builds many long-lived, acyclic records (the result cache, the per-file
    results coming back from the workers, the members and results of the corpus stages): no
    cyclic collection inside it (cyclic garbage made in it is collected after it), and what it
    built is exempted from the collector's passes until the run ends (``gc.freeze``; reference
    counting still frees it, and ``Runner.run`` unfreezes at its end). Speed: each full pass
    walks every live object, and the heap grows through a run: on a cached 100,000-file run 14
    full passes took 3.2 of 42 s, on a 1%-new rerun of 10,000 files 0.18 of 1.9 s."""
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        gc.freeze()
        if enabled:
            gc.enable()


def _prepares(stage: Stage) -> bool:
    """Whether a corpus stage has a per-file ``prepare`` step of its own to run (the split has
    none when it reads dedup's signatures or does not group near-duplicates)."""
    return stage.has_prepare()


class _Everything:
    """The artifact keys of a corpus stage without a prepare step: every content has them."""

    def __contains__(self, sha: object) -> bool:
        return True


_EVERY = _Everything()


#: Key of a corpus stage's saved state: the fingerprints (its own and those of the stages
#: before it) under which its results of the last run were stored.
CORPUS_RESULTS = "_results"


def _last_fingerprint(fp: str) -> str:
    """Ledger key of a corpus stage's stored results of the last run (beside per-file results)."""
    return f"{fp}:last-run"


def _last_results(ledger: Ledger, stage: str, fingerprint: str, compactor: Compactor) -> dict[str, Result]:
    """A corpus stage's results of the last run, by member id (values stay JSON text until
    read). A stage returns such a record as it is for a member whose result did not change;
    the runner then neither compacts nor stores it again. Read when the stage starts: a stage
    given them looks up nearly every member."""
    rows = ledger.results_for(stage, _last_fingerprint(fingerprint), compactor.make_stored,
                              values_as_text=True)
    return {sha[:16]: r for sha, r in rows.items()}


def _shrink(bar: Any) -> None:
    """One item fewer to wait for, so a stage's bar ends at 100% when files drop earlier."""
    if getattr(bar, "total", None):
        bar.total -= 1
        bar.refresh()


class _NoBar:
    """The progress bar of a quiet run (or one whose stderr is not a terminal)."""

    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass


class _DecisionSink:
    """Buffers the decision rows (trail and row digest) of a run and writes them in chunks.

    Without ``gone`` the first chunk replaces the previous run's rows; with it (the list of the
    previous run's sources that are gone), only the rows passed in are replaced, those sources
    are forgotten, and every other row stays as the previous run wrote it (``rowreuse``)."""

    CHUNK = 2000

    def __init__(self, ledger: Ledger, gone: list[str] | None, trail_json: Any):
        self.ledger = ledger
        self.trail_json = trail_json  # (source, sha256) -> the trail's stored JSON text
        self.rows: list[tuple[str, str, str, str]] = []
        self.digests: list[tuple[str, str]] = []
        self.gone = gone
        self.first = True

    def add(self, f: SourceFile, row: dict, trail: list, digest: str | None = None) -> None:
        """Record one built row's trail (``trail`` is the manifest's list form; the stored text
        comes from ``trail_json``)."""
        self.rows.append((f.rel, f.sha256, "kept" if row["status"] == "kept" else "dropped",
                          self.trail_json(f.rel, f.sha256)))
        if digest is not None:
            self.digests.append((f.rel, digest))
        if len(self.rows) >= self.CHUNK:
            self.flush()

    def flush(self) -> None:
        if not (self.rows or self.first):
            return
        if self.gone is None:
            self.ledger.put_decisions(self.rows, replace=self.first)
            self.ledger.put_row_digests(self.digests, replace=self.first)
        else:
            gone = self.gone if self.first else ()
            self.ledger.update_decisions(self.rows, gone)
            self.ledger.put_row_digests(self.digests, gone)
        self.first = False
        self.rows = []
        self.digests = []


def is_retryable(result: dict) -> bool:
    """A cached drop caused by the environment (time, memory, a crash), not by the file's bytes."""
    if result["kept"]:
        return False
    if result["reason"] in RETRYABLE:
        return True
    return result["reason"] == "too_large" and "max_memory_mb" in (result.get("thresholds") or {})


@dataclass
class Walk:
    """The outcome of the stage walk, per content (sha256).

    ``trails[sha]`` lists the content's results (``pipeline.records.Result``: ``kept``,
    ``reason``, ``detail``, ``values``, ``thresholds``) in stage order, one per stage it
    reached; ``stage_names`` names them. They are the result cache's own records."""

    staged: dict[str, tuple[str, ...]] = field(default_factory=dict)  # sha -> staged suffixes
    #: corpus stage -> (replace all stored rows, [(sha, record)] this run computed)
    corpus_rows: dict[str, tuple[bool, list]] = field(default_factory=dict)
    status: dict[str, tuple[str, str] | None] = field(default_factory=dict)
    trails: dict[str, list] = field(default_factory=dict)
    artifacts: dict[str, dict[str, dict]] = field(default_factory=dict)
    states: dict[str, dict] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    byte_copy_stage: str | None = None
    rep: dict[str, str] = field(default_factory=dict)
    metadata: Any = None  # the config's metadata table (``pipeline.metadata``)
    stage_names: list[str] = field(default_factory=list)

    def is_byte_copy(self, rel: str, sha: str) -> bool:
        """A source whose bytes equal an earlier source's (it is not the representative)."""
        return self.rep.get(sha) != rel

    def value_of(self, sha: str, key: str, default: Any = None) -> Any:
        """One value of a content's trail (the latest stage that set it)."""
        return TrailValues(self.trails.get(sha, ())).get(key, default)

    def _reached(self, sha: str, stage: str) -> int | None:
        """Position of ``stage`` in the content's trail, or None when it did not reach it."""
        try:
            i = self.stage_names.index(stage)
        except ValueError:
            return None
        return i if i < len(self.trails.get(sha, ())) else None

    def reached_names(self, rel: str, sha: str) -> list[str]:
        """The stages this source's trail (``trail_of``) has a step for."""
        n = len(self.trails.get(sha, ()))
        if self.byte_copy_stage and self.is_byte_copy(rel, sha):
            idx = self._reached(sha, self.byte_copy_stage)
            if idx is not None:
                n = idx + 1
        return self.stage_names[:n]

    def trail_of(self, rel: str, sha: str) -> list:
        """The trail of one source, each step with its ``stage`` name: its content's, cut at
        dedup for a byte-identical copy."""
        trail = [{"stage": name, "kept": r.kept, "reason": r.reason, "detail": r.detail,
                  "values": r.values, "thresholds": r.thresholds}
                 for name, r in zip(self.stage_names, self.trails.get(sha, ()))]
        if self.byte_copy_stage and self.is_byte_copy(rel, sha):
            idx = self._reached(sha, self.byte_copy_stage)
            if idx is not None:
                trail = trail[:idx] + [byte_copy_result(self.rep[sha], sha, trail[idx])]
        return trail

    def trail_json(self, rel: str, sha: str) -> str:
        """``trail_of`` as the ledger stores it (``ledger.canonical_json``), assembled from the
        records' stored texts: no values are parsed or serialised again (a byte-identical
        copy's trail, whose dedup step is rewritten, goes through the json module)."""
        if self.byte_copy_stage and self.is_byte_copy(rel, sha) and \
                self._reached(sha, self.byte_copy_stage) is not None:
            return canonical_json(self.trail_of(rel, sha))
        esc = _json_string
        steps = [
            # the keys in sorted order, as canonical_json writes them
            '{"detail":' + ("null" if r.detail is None else esc(r.detail))
            + ',"kept":' + ("true" if r.kept else "false")
            + ',"reason":' + ("null" if r.reason is None else esc(r.reason))
            + ',"stage":' + esc(name) + ',"thresholds":' + thresholds_json(r.thresholds)
            + ',"values":' + r.values_json() + "}"
            for name, r in zip(self.stage_names, self.trails.get(sha, ()))]
        return "[" + ",".join(steps) + "]"

    def final(self, rel: str, sha: str) -> tuple[str, str] | None:
        """(stage, reason) that dropped this source, or None when kept. A byte-identical copy
        that reached dedup ends there, with the verdict of ``byte_copy_result``."""
        if self.byte_copy_stage and self.is_byte_copy(rel, sha):
            idx = self._reached(sha, self.byte_copy_stage)
            if idx is not None:
                r = self.trails[sha][idx]
                return (self.byte_copy_stage, "exact_duplicate" if r.kept else r.reason)
        return self.status.get(sha)


def byte_copy_result(rep_rel: str, sha: str, rep_result: dict) -> dict:
    """The dedup verdict of a byte-identical copy of a file that reached dedup: an exact
    duplicate of it when dedup kept it; when dedup dropped it as the duplicate of another
    file, the same verdict (same reason, ``duplicate_of`` and ``similarity``: the copy's own
    pair with that file is the same bytes' pair)."""
    vals = dict(rep_result.get("values", {}))
    if not rep_result.get("kept", True):
        return {"stage": "dedup", "kept": False, "reason": rep_result.get("reason"),
                "detail": f"byte-identical copy of {sha[:16]} ({rep_rel}), which dedup dropped: "
                          f"{rep_result.get('detail')}", "values": vals,
                "thresholds": rep_result.get("thresholds", {})}
    vals.update({"duplicate_of": sha[:16], "similarity": 1.0, "duplicate_kind": "bytes"})
    return {"stage": "dedup", "kept": False, "reason": "exact_duplicate",
            "detail": f"byte-identical copy of {sha[:16]} ({rep_rel}); sha256 equal", "values": vals,
            "thresholds": rep_result.get("thresholds", {})}
