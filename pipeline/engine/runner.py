"""One run of a config: the only writer of the ledger during a run.

A run has four steps:

1. **discover + fingerprint**: every ``.mid .midi .kar .rmi`` file under the input folder (case
   insensitive, symlinks not followed, the output folder excluded); a file whose size and mtime
   match the ledger keeps its recorded sha256, any other is hashed.
2. **per-file pass**: for each distinct content (sha256) the planner (``plan``) works out which
   stage results are missing from the ledger (key: sha256, stage, options fingerprint) and only
   those files go to the workers (``worker``, through ``executor``), which decode once and run
   the per-file stages in order (stopping at the first drop), the ``prepare`` step of each
   corpus stage, and render the normalized output into a staging folder. Results are committed
   to the ledger in batches.
3. **stage walk** (``walk``): stages are applied in config order over the files still alive:
   per-file verdicts come from the ledger, corpus stages (dedup, split) run over the survivors
   in the main process. A dropped file never reaches a later stage.
4. **outputs** (``pipeline.outputs``): normalized files placed under ``midi/<part>/``, split
   lists, manifest, summary, the run's page; then the ledger records the run.
"""
from __future__ import annotations

import gc
import hashlib
import json
import os
import sqlite3
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from ..config import Config
from ..errors import LedgerError
from ..export.freshness import stale_exports
from ..midi.accel import HAVE_ACCEL
from ..outputs import files as outfiles, manifest, render as rendering, summary as summaries
from ..outputs.changes import Changes, change_lines, file_changes, last_parts
from ..outputs.rowreuse import STATE as ROWS_STATE, ManifestCheck, RowReuse
from ..outputs.table import RunReport, in_part_order, split_lines
from ..stages import Stage
from ..stages.base import bind_stages
from ..store.ledger import Ledger
from ..store.lock import OutputLock
from ..store.records import Compactor, Verdicts
from . import uptodate
from .executor import Limits, run_tasks
from .heap import release_free_memory
from .plan import Everything, Planner
from .rejudge import judge_stages_again
from .sources import Contents, Discovery, SourceFile, check_folders, discover, fingerprint, source_path
from .walk import StageWalk, last_run_fingerprint
from .worker import FileTask, fault_outcome, process_file, warm_before_fork

#: Results + artifacts per ledger transaction (also flushed every 2 s): a few hundred files;
#: each commit costs a WAL write of its pages.
BATCH = 2048

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
        for i, s in enumerate(self.stages):
            h.update(f"{s.name}:{s.fingerprint};".encode())
            self._chains[s.name] = h.hexdigest()[:16]
            if s.weighs_later_verdicts:  # and on the per-file stages after it (dedup's keep choice)
                later = "".join(f"{t.name}:{t.fingerprint};" for t in self.stages[i + 1:] if t.kind == "file")
                self._chains[s.name] = hashlib.sha256(f"{self._chains[s.name]}|{later}".encode()).hexdigest()[:16]
        self.output_fp = rendering.output_fingerprint(self.stages)
        self._recomputed = ContentMarks({}, 0)  # contents whose per-file results this run computed
        self._remote: Any = None  # the Dask executor while a run names a scheduler
        self._values: dict[str, Any] = {}  # file stage -> its ledger.StoredValues (during a run)
        self._index: dict[str, int] = {}  # sha256 -> content index (position in ``_order``)
        #: contents a worker could not read as themselves (``FileOutcome.unread``): sha256 ->
        #: (reason, detail), this run's verdicts only, never stored as the content's
        self._unread: dict[str, tuple[str, str]] = {}
        self._order: list[str] = []  # the run's contents in first-source order

    # progress -----------------------------------------------------------------------------
    def _bar(self, desc: str, total: int, position: int = 0) -> Any:
        if self.quiet or not sys.stderr.isatty():
            return _NoBar()  # a disabled tqdm still starts its monitor thread
        from tqdm import tqdm
        # a terminal that reports no width (a pty without a window size, as some CI runners
        # give) gets bars 80 columns wide: tqdm's dynamic width drew them empty (an audit)
        try:
            width = os.get_terminal_size(sys.stderr.fileno()).columns
        except (OSError, ValueError):
            width = 0
        # the per-file pass works once per distinct content (the table's "contents decoded")
        return tqdm(total=total, desc=f"{desc:<17}", unit="content", position=position,
                    leave=True, dynamic_ncols=width > 0, ncols=None if width > 0 else 80)

    def run(self) -> RunReport:
        t_start = time.perf_counter()
        cfg = self.config
        check_folders(cfg.input, cfg.output)
        out = cfg.output
        # a Dask scheduler is reached (and its workers checked) before anything is written
        self._remote = _connect(cfg.executor)
        try:
            created = not out.exists()
            try:
                out.mkdir(parents=True, exist_ok=True)
            except OSError as e:
                raise LedgerError(f"cannot create the output folder ({e.strerror})", file=str(out)) from None
            if self._remote is not None:
                try:
                    self._remote.check_shared(str(cfg.input), str(out))
                except BaseException:
                    if created:  # nothing written: no empty folder left behind (an audit)
                        try:
                            out.rmdir()
                        except OSError:
                            pass
                    raise
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
        notes = list(notes)
        if not HAVE_ACCEL:  # pip says so only with -v (an audit): the run says it every time
            notes.append("note: the compiled decoder is not installed (no C compiler when the package "
                         "was installed?): decoding runs in pure Python, about 12 times slower, with "
                         "the same results; reinstall with a C compiler (cc) on the PATH")
        changed = fingerprint(files, known, notes, rehash=self.fresh)
        present = files.path_set()
        gone = [p for p in known if p not in present]
        with ledger.batch():
            ledger.put_sources(changed)
            ledger.forget_sources(gone)
        # the contents of sources added, changed or removed (which source represents them may
        # have changed: their rows are not settled, ``RowReuse.settle``); none to list on a
        # first run, which reuses no row
        touched = _touched_contents(changed, gone, known) if known else None
        edited = _edited_contents(changed, known)  # for the split: a file keeps its part across an edit
        # files added, changed and removed since the last completed run (``outputs.changes``):
        # the sources table holds those of the last run started, which may have stopped early
        last_done = ledger.last_run()
        if last_done is None:
            changes = None
        elif ledger.runs_unfinished(last_done["id"], run_id) == 0:
            changes = _file_changes(changed, gone, known)
        else:
            changes = _file_changes_since(files, ledger.decision_sources(), present)
        del known, changed, gone  # memory: a row per file, written
        timings["discover"] = time.perf_counter() - t
        unknown = cfg.metadata.unknown_sources(present)
        del present  # memory: a path text per file
        if unknown:
            notes = [*notes, f"metadata: {len(unknown)} row(s) of {cfg.metadata.path} name no input "
                             f"file (paths are relative to the input folder, '/'-separated), e.g. "
                             + ", ".join(repr(u) for u in unknown[:3])]

        files_h = uptodate.files_hash(files)
        state_key = uptodate.state_key(files_h, self._rows_base())
        qkey = uptodate.quick_key(cfg.raw, files_h)
        del files_h
        unchanged = self._unchanged(ledger, state_key)
        if unchanged is not None:  # same files, same options, outputs in place: nothing to do
            # the options as configured (one without effect changes no fingerprint: an audit)
            unchanged["options"] = {s.name: s.opts for s in self.stages}
            uptodate.record_unchanged(ledger, cfg.output, unchanged, run_id, qkey,
                                      timings["discover"], t_start, files.skipped)
            return uptodate.report_from(unchanged, cfg.output, time.perf_counter() - t_start, notes)

        # distinct contents, each represented by its first source path
        rep = Contents(files)
        root = files.root  # the folder discover searched

        t = time.perf_counter()
        # memory: per-file values stay in the ledger; a rebuilt row reads them (``_prefetch``)
        order = rep.order
        # content index by sha256 for the whole run: the per-file stages' verdict columns
        # (``records.Verdicts``) and the walk read by it
        self._order, self._index = order, rep.index
        self._recomputed = ContentMarks(self._index, len(order))
        self._values = {s.name: ledger.values_source(s.name, s.fingerprint, order)
                        for s in self.stages if s.kind == "file"}
        # speed: the last run's verdict columns, where they can be trusted (``Ledger.run_columns``)
        stored = None if self.fresh else ledger.run_columns(run_id, self._index)
        with _bulk_data():
            cache = {name: ledger.verdicts_for(Verdicts(source, self._index, self._compactor(name), len(order)),
                                               stored)
                     for name, source in self._values.items()}
        del stored
        # a changed limit reads no file where the stage judges its stored results again
        for name, n in judge_stages_again(ledger, self.stages, cache, order, self._recomputed.mark).items():
            notes.append(f"{name}: {n} verdicts judged again from the values stored under earlier "
                         "options (no file read for them)")
        # a corpus stage without a prepare step (the split reading dedup's signatures) has
        # nothing to store per file
        art_keys = {s.name: ledger.artifact_keys(s.name, s.artifact_fingerprint) if s.has_prepare()
                    else Everything() for s in self.stages if s.kind == "corpus"}
        recorded_out = ledger.outputs()
        existing_out = outfiles.existing_outputs(cfg.output, self.output_fp, recorded_out)
        # outputs a stopped run rendered and did not place yet are used, not rendered again
        self._staged = outfiles.staged_outputs(cfg.output, self.output_fp)
        has_out = existing_out.keys() | self._staged.keys() if self._staged else existing_out
        last_status = {sha: status for sha, status in ledger.decision_statuses()}
        planner = Planner(self.stages, cache, art_keys, has_out, last_status,
                          staging=str(cfg.output / outfiles.STAGING), output_fp=self.output_fp,
                          retry_failed=self.retry_failed)
        tasks = []
        for sha in rep:
            if planner.needs_work(sha):  # speed: a content that needs none costs no path
                rel = rep[sha]
                tasks.append(planner.task(sha, rel, source_path(root, rel)))
        computed = len(tasks)
        with _bulk_data():
            self._execute(ledger, tasks, cache)
        del tasks  # memory: a task per content (about 300 bytes each) is not needed any more
        timings["per_file"] = time.perf_counter() - t

        # stage walk
        t = time.perf_counter()
        with _bulk_data():
            walk = StageWalk(self.stages, cfg.metadata, self._compactor, self._bar, self._chains,
                             fresh=self.fresh, reassign=self.reassign, edited=edited).run(ledger, rep, cache, timings,
                                                                           self._staged, self._index,
                                                                           unread=self._unread)
        timings["corpus"] = time.perf_counter() - t

        # late renders: contents kept now that have no output (e.g. a cluster's new representative)
        t = time.perf_counter()
        kept_shas = [sha for sha in rep if walk.status[sha] is None]
        missing = [sha for sha in kept_shas
                   if sha not in existing_out and sha not in walk.staged]
        if missing:
            late = [planner.render_task(sha, rep[sha], source_path(root, rep[sha])) for sha in missing]
            # the walk is done: a fault while rendering is stored for the next run, and this
            # run's verdicts stay those it walked
            self._execute(ledger, late, None, walk.staged)
        # contents read in the per-file pass (their rows say so) and those only a late render
        # could not read (kept, without an output in this run)
        unread_late = sum(1 for sha in missing if sha in self._unread)
        placed = outfiles.place(cfg.output, walk, rep, existing_out, self.output_fp)
        # the files whose verdict or part turned are counted as their rows pass (``_DecisionSink``)
        last_part = last_parts(recorded_out) if changes is not None else {}
        del last_status
        if recorded_out != placed.recorded:  # write only what changed (a rerun adds a few outputs)
            with ledger.batch():
                ledger.forget_outputs([rel for rel in recorded_out if rel not in placed.recorded])
                ledger.put_outputs([(rel, *v) for rel, v in placed.recorded.items()
                                    if recorded_out.get(rel) != v])
        unsettled = (_unsettled_contents(touched, walk, recorded_out, placed.recorded)
                     if touched is not None else None)
        del recorded_out, touched
        timings["outputs"] = time.perf_counter() - t

        from ..outputs.page import Facts, RowFacts, read_manifest, write_report  # the run's page
        names = [s.name for s in self.stages]
        counted: list[Facts] = []  # the run's facts, once its rows are through

        def summary_of() -> dict:
            # the facts gathered from the rows, or read from the manifest just written when
            # the last run's could not be completed (``RowFacts.facts``)
            facts = page.facts() or read_manifest(cfg.output / "manifest.jsonl", stages=names)
            counted.append(facts)
            timings["total"] = time.perf_counter() - t_start
            summary = summaries.build_summary(facts, len(rep), walk, self.stages, timings, computed,
                                            len(rep) - computed, placed, cfg)
            # a run that could not read some files is not one a rerun may skip as unchanged:
            # it reads them again
            summary["counts"]["state_key"] = None if self._unread else state_key
            summary["counts"]["quick_key"] = None if self._unread else qkey
            # what the normalized files' bytes depend on beyond their sources (an export's
            # freshness check, ``export.freshness``)
            summary["counts"]["output_key"] = self.output_fp
            summary["warnings"].extend(unread_warnings(self._unread, unread_late))
            summary["skipped"] = summaries.skipped_summary(files.skipped)
            if changes is not None:
                decisions.flush()  # the last rows' verdicts compared
                summary["changes_since_last_run"] = changes.as_dict()
            return summary

        # one pass over the files writes the manifest and records the trails for explain, all
        # in the run's last transaction (a run killed before its commit leaves the previous
        # run's decisions in place)
        reuse = RowReuse(ledger, cfg.output, self._rows_base(), self._recomputed, run_id)
        reuse.settle(unsettled)  # speed: a settled row's digest is the last run's, not made again
        del unsettled
        # speed: gathered from the rows as they pass (a reused line from the last run's facts)
        page = RowFacts(names, reuse.facts, len(reuse.old)) if reuse.usable else RowFacts(names)
        corpus_positions = tuple(i for i, st in enumerate(self.stages) if st.kind == "corpus")
        with ledger.batch():
            decisions = _DecisionSink(ledger, reuse.gone(files) if reuse.usable else None,
                                      walk.trail_json, changes, last_part)
            check = ManifestCheck()
            summary = manifest.write_all(
                cfg.output, _seen(manifest.manifest_rows(files, walk, placed, decisions.add,
                                                        reuse, corpus_positions, self._prefetch,
                                                        page.unused),
                                  page.row),
                placed, summary_of, summaries.configured_parts(self.stages), check)
            decisions.flush()
            facts = counted[0]
            release_free_memory()  # memory: what the rows freed is not kept beside the states' texts
            ledger.put_state(ROWS_STATE, reuse.state_of(len(files), facts.to_state(), check.value))
            ledger.put_skipped(files.skipped)
            if self._unread:  # hashed again next run (not passed as known by their stat): a
                # file whose bytes changed under a kept stat was otherwise dropped on every run
                ledger.put_sources((files.rel(i), files.size(i), -1, files.sha256(i))
                                   for i in range(len(files)) if files.sha256(i) in self._unread)
            for name, st in walk.states.items():
                ledger.put_state(name, st)
            ledger.put_run_columns(run_id, self._order, cache.values())
            for name, (replace, rows) in walk.corpus_rows.items():
                fp = last_run_fingerprint(self._fps[name])
                if replace:
                    ledger.forget_results(name, fp)
                ledger.put_results((sha, name, fp, walk.corpus_record(name, sha)) for sha in rows)
            ledger.finish_run(run_id, summary["counts"])
        write_report(cfg.output, summary, names, cfg.input, facts)
        parts = in_part_order(dict(summary["split"]["outputs"]), summary["split"].get("part_order"))
        return RunReport(cfg.output, len(files), facts.kept, facts.dropped_by, timings, computed,
                         len(rep) - computed, parts, change_lines(changes) + notes + walk.notes,
                         # printed, not stored: an export made after this run is not stale
                         summary.get("warnings", []) + stale_exports(cfg.output),
                         split_lines=split_lines(summary["split"].get("stage")))

    def _prefetch(self, shas: list[str]) -> None:
        """Read the stored values of the contents whose rows are built next, one query per
        stage and few hundred files (each stage's values are left in the ledger)."""
        for source in self._values.values():
            source.prefetch(shas)

    # the nothing-changed shortcut ------------------------------------------------------------
    def _rows_base(self) -> str:
        """What every manifest row depends on besides its own file (``uptodate.rows_base``)."""
        return uptodate.rows_base(self.stages, self.output_fp, self.config.metadata.digest)

    def _unchanged(self, ledger: Ledger, state_key: str) -> dict | None:
        """The last run's summary when this run would reproduce it exactly, else None (no flag
        may ask for new work; see ``pipeline.engine.uptodate``)."""
        if self.fresh or self.reassign or self.retry_failed:
            return None
        return uptodate.last_summary_if(ledger, self.config.output, "state_key", state_key)

    # planning -------------------------------------------------------------------------------

    def _limits(self) -> Limits:
        """Reliability: the per-file limits the stages impose (``Stage.worker_limits``: the
        reading stage's options); a fault becomes that stage's cached drop."""
        for st in self.stages:
            lim = st.worker_limits()
            if lim:
                return Limits(owner=st.name, **lim)
        return Limits()

    def _compactor(self, stage: str) -> Compactor:
        """The stage's maker of compact result records (one per stage and run)."""
        memo = self.__dict__.setdefault("_compactors", {})
        if stage not in memo:
            memo[stage] = Compactor()
        return memo[stage]

    def _execute(self, ledger: Ledger, tasks: list[FileTask], cache: dict | None,
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
        file_stages = [s.name for s in self.stages if s.kind == "file" or s.has_prepare()]
        bar = self._bar(file_stages[0], len(tasks))
        stage_bars = {name: self._bar(name, len(tasks), i) for i, name in enumerate(file_stages) if i}
        pending_r, pending_a, pending_s = [], [], []
        fps = {s.name: s.fingerprint for s in self.stages}
        art_fps = {s.name: s.artifact_fingerprint for s in self.stages}
        last = time.monotonic()
        limits = self._limits()
        order, index = self._order, self._index
        if self._remote is None:
            warm_before_fork()
        outcomes = (self._remote.run_tasks(process_file, tasks, limits=limits, on_fault=fault_outcome)
                    if self._remote is not None else
                    run_tasks(process_file, tasks, self.config.workers, limits=limits,
                              on_fault=fault_outcome))
        try:
            for oc in outcomes:
                i = index[oc.sha256]  # every task's content is one of the run's
                sha = order[i]  # memory: the run's string, not a copy
                if oc.unread is not None:  # not the content's verdict: nothing stored
                    self._unread[sha] = oc.unread
                    self._recomputed.mark(i)  # its last row is not this run's
                if oc.results:
                    self._recomputed.mark(i)
                for name, stored in oc.results.items():
                    if cache is not None:
                        cache[name].put_stored(i, stored)  # its values are read from the ledger
                    pending_r.append((sha, name, fps[name], stored))
                for name, arts in oc.artifacts.items():
                    pending_a.append((sha, name, art_fps[name], arts))
                if oc.staged:  # memory: the same few suffix tuples, shared (paths are derived)
                    staged[sha] = suffixes.setdefault(oc.staged, oc.staged)
                    pending_s.append((sha, oc.staged))
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
            outcomes.close()  # the workers stop with the run, not when the generator is collected
            self._flush(ledger, pending_r, pending_a, pending_s)
            bar.close()
            for b in stage_bars.values():
                b.close()

    def _flush(self, ledger: Ledger, results: list, artifacts: list, staged: list) -> None:
        """Commit finished results and artifacts, then list the finished staged outputs (a
        listed output's results are always in the ledger); the committed results' values are
        read from the ledger (``records.Verdicts``)."""
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
        for source in self._values.values():
            source.rows_added()
        results.clear()
        artifacts.clear()
        outfiles.record_staged(self.config.output, self.output_fp, staged)
        staged.clear()


class ContentMarks:
    """A set of the run's contents as one byte per content index (memory: a set of 300,000
    hashes takes about 16 MB): ``mark(i)``, then ``sha in marks``; iterating gives the marked
    contents."""

    __slots__ = ("_index", "_marks")

    def __init__(self, index: dict[str, int], n: int):
        self._index = index  # sha256 -> content index
        self._marks = bytearray(n)

    def mark(self, i: int) -> None:
        self._marks[i] = 1

    def __contains__(self, sha: object) -> bool:
        i = self._index.get(sha)  # type: ignore[arg-type]
        return i is not None and self._marks[i] == 1

    def __iter__(self) -> Iterator[str]:
        marks = self._marks
        if 1 not in marks:  # speed: the usual rerun computed no known content again
            return iter(())
        return (sha for sha, i in self._index.items() if marks[i])


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
    walks every live object, and the heap grows through a run (DEVELOPERS.md, Bench notes)."""
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        gc.freeze()
        if enabled:
            gc.enable()



def _file_changes(changed: list[tuple[str, int, int, str]], gone: list[str],
                  known: dict[str, tuple[int, int, str]]) -> Changes:
    """The source files added, changed and removed: ``changed`` the fingerprinted rows that are
    new or differ in size or time from ``known`` (the last run's sources by path; a file counts
    as changed when its bytes did), ``gone`` the paths no longer there."""
    return file_changes((row[0] for row in changed if row[0] not in known),
                        (rel for rel, _, _ in _edited(changed, known)), gone)


def _edited(changed: list[tuple[str, int, int, str]],
            known: dict[str, tuple[int, int, str]]) -> Iterator[tuple[str, str, str]]:
    """(source, sha256 then, sha256 now) of each source whose bytes changed since the last run
    started (``changed``: the fingerprinted rows; ``known``: the last run's sources by path)."""
    for rel, _size, _mtime, sha in changed:
        old = known.get(rel)
        if old is not None and old[2] != sha:
            yield rel, old[2], sha


def _edited_contents(changed: list[tuple[str, int, int, str]],
                     known: dict[str, tuple[int, int, str]]) -> dict[str, str]:
    """For each source whose bytes changed (``_edited``), its new member id -> the id of the
    content the path held then (member ids are ``sha256[:16]``); the first path in source
    order when several changed to one content."""
    out: dict[str, str] = {}
    for _, then, now in _edited(changed, known):
        out.setdefault(now[:16], then[:16])
    return out


def _file_changes_since(files: Any, last: dict[str, str], present: set[str]) -> Changes:
    """The source files added, changed and removed against ``last`` (source -> sha256 of the
    last completed run's files; ``present``: this run's sources), after a run that stopped
    early rewrote the sources table."""
    added, edited = [], []
    for i in range(len(files)):
        old = last.get(files.rel(i))
        if old is None:
            added.append(files.rel(i))
        elif old != files.sha256(i):
            edited.append(files.rel(i))
    return file_changes(added, edited, (p for p in last if p not in present))


def unread_warnings(unread: dict[str, tuple[str, str]], late: int) -> list[str]:
    """The summary's warnings about files a worker could not read as the content hashed when
    the files were listed (``Runner._unread``; ``late`` of them only when rendering a kept
    file's output)."""
    if not unread:
        return []
    by_reason: dict[str, list[str]] = {}
    for reason, detail in unread.values():
        by_reason.setdefault(reason, []).append(detail)
    out = []
    for reason, details in sorted(by_reason.items()):
        out.append(f"{len(details)} content(s) not read in this run ({reason}), e.g. {details[0]}")
    if late:
        out.append(f"{late} kept content(s) have no normalized output in this run: their file "
                   "could not be read to render it; the next run renders it")
    return out


def _touched_contents(changed: list[tuple[str, int, int, str]], gone: list[str],
                      known: dict[str, tuple[int, int, str]]) -> set[str]:
    """The contents (sha256) of the sources this run found new or changed (``changed``: the
    fingerprinted rows), before and after, and of the sources gone since the last run."""
    touched = {row[3] for row in changed}
    for rel in [row[0] for row in changed] + gone:
        if rel in known:
            touched.add(known[rel][2])
    return touched


def _unsettled_contents(touched: set[str], walk: Any, recorded: dict[str, tuple[str, str]],
                        placed: dict[str, tuple[str, str]]) -> set[str]:
    """The contents whose manifest rows may differ from the last run's besides their per-file
    results (``RowReuse.settle``): ``touched`` sources, a corpus-stage record made in this run
    (not the last run's, as it is), a verdict of this run only (a source's fields, a missing
    result), an output added, moved or removed (``recorded``: the outputs table as the last
    run left it, ``placed``: as this run leaves it)."""
    unsettled = set(touched)
    for _replace, rows in walk.corpus_rows.values():  # all rows anew: every member is listed
        unsettled.update(rows)
    unsettled.update(sha for _stage, sha in walk.replaced)
    unsettled.update(v[0] for rel, v in placed.items() if recorded.get(rel) != v)
    unsettled.update(v[0] for rel, v in recorded.items() if placed.get(rel) != v)
    return unsettled


def _seen(rows: Iterator[dict | str], see: Any) -> Iterator[dict | str]:
    """The manifest rows, each shown to ``see`` on its way."""
    for r in rows:
        see(r)
        yield r


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
    are forgotten, and every other row stays as the previous run wrote it (``rowreuse``). With
    ``changes`` (a rerun's), each chunk's verdicts are compared with the last run's before they
    replace them (``Changes.verdict``; ``last_part``: sha256 -> the last run's part of each
    kept content); a row not built again is the last run's, its verdict and part unchanged."""

    CHUNK = 2000

    def __init__(self, ledger: Ledger, gone: list[str] | None, trail_json: Any,
                 changes: Changes | None = None, last_part: dict[str, str] | None = None):
        self.ledger = ledger
        self.trail_json = trail_json  # (source, sha256) -> the trail's stored JSON text
        self.rows: list[tuple[str, str, str, str]] = []
        self.digests: list[tuple[str, str]] = []
        self.parts: list[str | None] = []  # each row's part, None for a dropped file (``changes``)
        self.gone = gone
        self.first = True
        self.changes = changes
        self.last_part = last_part or {}

    def add(self, f: SourceFile, row: dict, trail: list, digest: str | None = None) -> None:
        """Record one built row's trail (``trail`` is the manifest's list form; the stored text
        comes from ``trail_json``)."""
        kept = row["status"] == "kept"
        self.rows.append((f.rel, f.sha256, "kept" if kept else "dropped",
                          self.trail_json(f.rel, f.sha256)))
        if self.changes is not None:
            self.parts.append(row["split"] if kept else None)
        if digest is not None:
            self.digests.append((f.rel, digest))
        if len(self.rows) >= self.CHUNK:
            self.flush()

    def flush(self) -> None:
        if not (self.rows or self.first):
            return
        if self.changes is not None and self.rows:
            replacing = self.gone is None
            if replacing and self.first:  # every trail is replaced: read the verdicts from a copy
                self.ledger.set_verdicts_aside()
            before = self.ledger.last_verdicts([r[0] for r in self.rows], aside=replacing)
            for (source, _, _, _), part in zip(self.rows, self.parts):
                self.changes.verdict(source, before.get(source), part, self.last_part)
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
        self.parts = []

