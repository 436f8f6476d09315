"""One ``midisift run`` inside this process, measured where the bench's process-level figures
cannot look: the main process's memory by phase and by source line, or its time by function.

    python -m pipeline.tools.trace_run rss|mem|prof|time CONFIG INPUT OUTPUT [--keep] [--profile FILE]

``rss`` samples the main process's resident memory every 0.1 s and reports its peak in each
phase (per-file pass, stage walk, manifest); ``mem`` traces its allocations (tracemalloc; the
workers are not traced) and prints the largest source lines after the per-file pass, when
dedup and split start, after the walk and half-way through the manifest, with the peak inside
each corpus stage; ``prof`` profiles the run (cProfile) and writes the profile to ``--profile``;
``time`` measures the wall and CPU time of the main process in each of the run's named steps
(``TIMED``: reads of stored state, the corpus stages and their searches, the outputs), without
a profiler's slowdown (a step's time includes the steps it calls and about 1 us a call of
the timer's own; calls are summed).
Every mode prints the main process's and the workers' CPU time. ``--keep`` runs into OUTPUT as
it is (a rerun); otherwise OUTPUT is emptied first. Tracing makes the run several times slower:
keep the corpus bounded (20,000 small files take a few minutes on 2 cores).
"""
from __future__ import annotations

import argparse
import gc
import resource
import shutil
import sys
import threading
import time
import tracemalloc
from collections import defaultdict
from importlib import import_module
from pathlib import Path
from typing import Any, Callable, Iterable

from ..config import load_config
from ..engine import executor, runner
from ..engine.walk import StageWalk
from ..outputs import manifest
from ..stages import REGISTRY


class _Phases:
    """The run's phases as the hooks below see them, and what each mode records at each."""

    def __init__(self, mode: str):
        self.mode = mode
        self.current = "per-file pass"
        self.peaks: dict[str, int] = {}  # phase -> peak RSS (MB)
        self.snapshots: dict[str, tuple[Any, int]] = {}  # label -> (snapshot, traced bytes)
        self.stage_peaks: list[str] = []

    def enter(self, label: str) -> None:
        self.current = label
        if self.mode == "mem":
            gc.collect()
            self.snapshots[label] = (tracemalloc.take_snapshot(), tracemalloc.get_traced_memory()[0])

    def sample_rss(self) -> None:
        while True:
            mb = _rss_mb()
            self.peaks[self.current] = max(self.peaks.get(self.current, 0), mb)
            time.sleep(0.1)


def _rss_mb() -> int:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS"):
                return int(line.split()[1]) // 1024
    return 0


def _hook(phases: _Phases) -> None:
    """Wrap the walk, the corpus stages and the manifest so the phases are seen."""
    walk_run = StageWalk.run

    def run_walk(self: StageWalk, *a: Any, **k: Any) -> Any:
        phases.enter("stage walk")
        walk = walk_run(self, *a, **k)
        phases.enter("after the walk")
        return walk

    StageWalk.run = run_walk  # type: ignore[method-assign]
    for cls in REGISTRY.values():  # the config's stages are imported by now
        if getattr(cls, "kind", None) == "corpus":
            cls.run_corpus = _traced_stage(cls.run_corpus, cls.name, phases)  # type: ignore[method-assign]
    rows_of = manifest.manifest_rows

    def rows(files: list, *a: Any, **k: Any) -> Any:
        for i, r in enumerate(rows_of(files, *a, **k)):
            if i == len(files) // 2:
                phases.enter("half the manifest")
            yield r

    manifest.manifest_rows = rows  # type: ignore[assignment]
    worker_main = executor._worker_main

    def untraced_worker(*a: Any, **k: Any) -> Any:  # a forked worker is not measured
        if tracemalloc.is_tracing():
            tracemalloc.stop()
        return worker_main(*a, **k)

    executor._worker_main = untraced_worker


#: The steps ``time`` measures: (module, attribute path). Chosen for a rerun: what reads every
#: content's stored state, the corpus stages and their candidate searches, the outputs.
TIMED = (
    ("pipeline.engine.sources", "discover"), ("pipeline.store.ledger", "Ledger.sources"),
    ("pipeline.store.ledger", "Ledger.verdicts_for"), ("pipeline.store.ledger", "Ledger.artifact_keys"),
    ("pipeline.store.ledger", "Ledger.decision_statuses"), ("pipeline.store.ledger", "Ledger.outputs"),
    ("pipeline.outputs.files", "existing_outputs"), ("pipeline.engine.plan", "Planner.needs_work"),
    ("pipeline.engine.plan", "Planner.task"),
    ("pipeline.engine.runner", "Runner._execute"), ("pipeline.engine.runner", "Runner._flush"),
    ("pipeline.engine.walk", "StageWalk.run"), ("pipeline.store.ledger", "Ledger.artifact_columns"),
    ("pipeline.engine.walk", "_last_results"), ("pipeline.store.ledger", "Ledger.state_for"),
    ("pipeline.stages.dedup", "Dedup.run_corpus"), ("pipeline.stages.split", "Split.run_corpus"),
    ("pipeline.stages.split", "Split._near_links"), ("pipeline.similarity.lsh", "LSHIndex.candidate_codes"),
    ("pipeline.similarity.overlap_sketch", "sketched_codes"), ("pipeline.similarity.links", "verify_codes"),
    ("pipeline.outputs.files", "place"), ("pipeline.outputs.manifest", "write_all"),
    ("pipeline.outputs.rowreuse", "row_digest"), ("pipeline.store.ledger", "Ledger.put_state"),
    ("pipeline.outputs.page", "write_report"),
)


def time_steps() -> tuple[dict[str, list], Callable[[], None]]:
    """The steps of ``TIMED``, clocked (``clock``), labelled ``module.path``."""
    return clock(TIMED, lambda module, path: f"{module.rsplit('.', 1)[-1]}.{path}")


def clock(steps: Iterable[tuple[str, str]], label_of: Callable[[str, str], str]
          ) -> tuple[dict[str, list], Callable[[], None]]:
    """Wrap each step (module, attribute path) of ``steps``, also where another module imported
    it by name, so its calls, wall and CPU time are summed: (``label_of(module, path)`` ->
    [calls, wall s, CPU s], a function that puts the steps back as they were)."""
    sums: dict[str, list] = defaultdict(lambda: [0, 0.0, 0.0])
    undo: list[tuple[Any, str, Any]] = []
    for module, path in steps:
        owner: Any = import_module(module)
        *outer, name = path.split(".")
        for part in outer:
            owner = getattr(owner, part)
        fn = getattr(owner, name)
        label = label_of(module, path)

        def timed(*a: Any, _fn: Callable = fn, _sum: list = sums[label], **k: Any) -> Any:
            t, c = time.perf_counter(), time.process_time()
            try:
                return _fn(*a, **k)
            finally:
                _sum[0] += 1
                _sum[1] += time.perf_counter() - t
                _sum[2] += time.process_time() - c

        undo.append((owner, name, owner.__dict__[name]))
        setattr(owner, name, timed)
        if not outer:  # a module's function: also under the names other modules import it by
            for mod in list(sys.modules.values()):
                if getattr(mod, "__name__", "").startswith("pipeline.") and getattr(mod, name, None) is fn:
                    undo.append((mod, name, fn))
                    setattr(mod, name, timed)

    def restore() -> None:
        for owner, name, original in reversed(undo):
            setattr(owner, name, original)

    return sums, restore


def _traced_stage(fn: Callable, name: str, phases: _Phases) -> Callable:
    def run_corpus(self: Any, members: Any, state: Any) -> Any:
        phases.enter(f"{name} starts")
        if phases.mode != "mem":
            return fn(self, members, state)
        before = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        res = fn(self, members, state)
        now, peak = tracemalloc.get_traced_memory()
        phases.stage_peaks.append(f"{name}: traced {before / 2**20:.1f} MB at its start, peak inside "
                                  f"{peak / 2**20:.1f} MB, {now / 2**20:.1f} MB at its end")
        return res
    return run_corpus


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m pipeline.tools.trace_run", description=__doc__.split("\n\n")[0])
    ap.add_argument("mode", choices=("rss", "mem", "prof", "time"))
    ap.add_argument("config")
    ap.add_argument("input")
    ap.add_argument("output")
    ap.add_argument("--keep", action="store_true", help="run into OUTPUT as it is (a rerun)")
    ap.add_argument("--workers", default="2")
    ap.add_argument("--profile", default="trace_run.prof", help="where prof writes its profile")
    ap.add_argument("--lines", type=int, default=15, help="source lines shown per snapshot (mem)")
    args = ap.parse_args(argv)
    if not args.keep:
        shutil.rmtree(args.output, ignore_errors=True)
    cfg = load_config(Path(args.config), input=args.input, output=args.output, workers=args.workers)
    phases = _Phases(args.mode)
    _hook(phases)
    if args.mode == "rss":
        threading.Thread(target=phases.sample_rss, daemon=True).start()
    if args.mode == "mem":
        tracemalloc.start()
    sums, untime = time_steps() if args.mode == "time" else (None, None)
    profile = None
    if args.mode == "prof":
        import cProfile
        profile = cProfile.Profile()
        profile.enable()
    t = time.perf_counter()
    report = runner.Runner(cfg, quiet=True).run()
    wall = time.perf_counter() - t
    if profile is not None:
        profile.disable()
        profile.dump_stats(args.profile)
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    print(f"{report.files} files, {wall:.2f} s; CPU: main process {me.ru_utime + me.ru_stime:.2f} s, "
          f"workers {kids.ru_utime + kids.ru_stime:.2f} s; main process peak RSS {me.ru_maxrss // 1024} MB")
    print("timings (s):", {k: round(v, 2) for k, v in report.timings.items()})
    if args.mode == "rss":
        print("peak RSS by phase (MB):", phases.peaks)
    if args.mode == "mem":
        print(f"traced peak {tracemalloc.get_traced_memory()[1] / 2**20:.1f} MB")
        for line in phases.stage_peaks:
            print(line)
        for label, (snap, traced) in phases.snapshots.items():
            print(f"== {label}: traced {traced / 2**20:.1f} MB")
            for st in snap.statistics("lineno")[:args.lines]:
                frame = st.traceback[0]
                print(f"  {st.size / 2**20:8.2f} MB {st.count:9d}  {frame.filename}:{frame.lineno}")
    if untime is not None:
        untime()
    if sums is not None:
        print("steps of the main process (wall s, CPU s, calls), the slowest first:")
        for label, (calls, wall_s, cpu_s) in sorted(sums.items(), key=lambda kv: -kv[1][1]):
            print(f"  {wall_s:8.3f} {cpu_s:8.3f} {calls:8d}  {label}")
    if profile is not None:
        print(f"profile written to {args.profile} (python -m pstats {args.profile})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
