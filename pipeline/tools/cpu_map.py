"""Where a run's CPU goes, per file: every named step of the per-file path and of the main
process, and the cost of moving tasks and outcomes between processes.

    python -m pipeline.tools.cpu_map steps CONFIG INPUT OUTPUT [--rounds N]
    python -m pipeline.tools.cpu_map executor CONFIG INPUT OUTPUT [--rounds N] [--workers N]

``steps`` runs the whole run in this process, the workers' tasks in line (no fork), with a
``time.process_time`` clock around each step of ``STEPS`` (a few calls per file; no profiler,
whose cost per call would distort the small steps), and pickles each task and each outcome as
the executor's pipes do (``multiprocessing``'s ``ForkingPickler``; one task per message and
``--batch`` per message) and reads the bytes it just made back, to report their cost. ``executor`` plans the run, records the outcomes of the first 200 tasks, and runs every
task through ``executor.run_tasks`` answered with a recorded outcome: the executor's own CPU
per task, in the parent and in the workers.

It imports the package by its absolute name, so run as a file from another checkout's folder
with that checkout's interpreter (``cd OTHER && OTHER_PYTHON /path/to/cpu_map.py steps ...``)
it measures that checkout's code: the README's side-by-side figures were made that way.
"""
from __future__ import annotations

import argparse
import resource
import shutil
import time
from importlib import import_module
from multiprocessing.reduction import ForkingPickler
from pathlib import Path
from typing import Any, Callable, Iterator

#: The timed steps: (module, attribute path). Worker side first, then the main process.
STEPS = (
    ("pipeline.engine.worker", "process_file"), ("pipeline.engine.worker", "file_pass"),
    ("pipeline.stages.validate", "Validate.read"), ("pipeline.midi.decode", "decode"),
    ("pipeline.stages.transpose", "Transpose.process"), ("pipeline.stages.key_meter", "KeyMeter.process"),
    ("pipeline.stages.filter", "Filter.process"), ("pipeline.stages.dedup", "Dedup.prepare"),
    ("pipeline.store.codec", "stored_result"), ("pipeline.store.codec", "stored_artifacts"),
    ("pipeline.engine.worker", "output_variants"), ("pipeline.outputs.render", "render"),
    ("pipeline.midi.encode", "encode"), ("pipeline.outputs.render", "_write_staged"),
    ("pipeline.engine.runner", "Runner._execute"), ("pipeline.engine.runner", "Runner._flush"),
    ("pipeline.engine.walk", "StageWalk.run"), ("pipeline.stages.dedup", "Dedup.run_corpus"),
    ("pipeline.stages.split", "Split.run_corpus"), ("pipeline.outputs.files", "place"),
    ("pipeline.outputs.manifest", "write_all"), ("pipeline.outputs.page", "write_report"),
    ("pipeline.engine.sources", "discover"), ("pipeline.engine.sources", "fingerprint"),
    ("pipeline.engine.plan", "Planner.task"), ("pipeline.store.ledger", "Ledger.__init__"),
    ("pipeline.store.ledger", "Ledger.close"),
)


def clock_steps() -> tuple[dict[str, list], Callable[[], None]]:
    """The steps of ``STEPS``, clocked (``trace_run.clock``), labelled by their attribute path:
    (label -> [calls, wall s, CPU s], a function that puts the steps back as they were)."""
    from .trace_run import clock
    return clock(STEPS, lambda module, path: path)


def _config(args: argparse.Namespace) -> Any:
    from pipeline.config import load_config
    return load_config(Path(args.config), input=args.input, output=args.output, workers="1")


def steps(args: argparse.Namespace) -> dict[str, list]:
    """The ``steps`` mode (module docstring); returns label -> [calls, wall s, CPU s]."""
    from pipeline.engine import runner
    import pipeline.stages  # noqa: F401 - the stage modules, so their steps can be wrapped
    for module in {m for m, _ in STEPS}:
        import_module(module)
    sums, restore = clock_steps()
    moved = {"task alone": [0.0, 0], f"tasks {args.batch} a message": [0.0, 0], "outcome": [0.0, 0]}

    def pickled(label: str, obj: Any) -> None:
        c = time.process_time()
        data = ForkingPickler.dumps(obj)  # as Connection.send and recv do, in memory
        ForkingPickler.loads(data)
        moved[label][0] += time.process_time() - c
        moved[label][1] += len(data)

    def in_line(fn: Callable, tasks: Any, workers: int, limits: Any = None, on_fault: Any = None) -> Iterator:
        tasks = list(tasks)
        for i in range(0, len(tasks), args.batch):
            pickled(f"tasks {args.batch} a message", list(enumerate(tasks[i:i + args.batch])))
        for i, task in enumerate(tasks):
            pickled("task alone", (i, task))
            outcome = fn(task)
            pickled("outcome", (i, "ok", outcome))
            yield outcome

    run_tasks, runner.run_tasks = runner.run_tasks, in_line
    cpu = 0.0
    files = 0
    try:
        for _ in range(args.rounds):
            shutil.rmtree(args.output, ignore_errors=True)
            c = time.process_time()
            files += runner.Runner(_config(args), quiet=True).run().files
            cpu += time.process_time() - c
    finally:
        runner.run_tasks = run_tasks
        restore()
    shutil.rmtree(args.output, ignore_errors=True)
    print(f"{files} files in {args.rounds} round(s): the run's CPU {1000 * cpu / files:.3f} ms per file "
          "(one process, imports excluded)")
    print("CPU per file (ms), calls, step:")
    for label, (calls, _wall, spent) in sums.items():
        print(f"  {1000 * spent / files:8.4f} {calls:8d}  {label}")
    for label, (spent, size) in moved.items():
        print(f"  pickled and unpickled, {label}: {1000 * spent / files:.4f} ms and {size / files:.0f} bytes per file")
    return sums


def executor_cost(args: argparse.Namespace) -> None:
    """The ``executor`` mode (module docstring)."""
    from pipeline.engine import executor, runner, worker
    tasks: list = []

    def keep(fn: Callable, ts: Any, workers: int, limits: Any = None, on_fault: Any = None) -> Iterator:
        tasks.extend(ts)
        return iter(())

    run_tasks, runner.run_tasks = runner.run_tasks, keep
    shutil.rmtree(args.output, ignore_errors=True)
    try:
        runner.Runner(_config(args), quiet=True).run()
    except Exception:  # noqa: BLE001 - the run has no results to walk; its tasks are what we want
        pass
    finally:
        runner.run_tasks = run_tasks
    shutil.rmtree(args.output, ignore_errors=True)
    if not tasks:
        raise SystemExit("no tasks: the input folder has no MIDI file")
    recorded = {t.sha256: worker.process_file(t) for t in tasks[:200]}
    shutil.rmtree(args.output, ignore_errors=True)
    default = next(iter(recorded.values()))

    def answer(task: Any) -> Any:
        return recorded.get(task.sha256, default)

    for _ in range(args.rounds):
        s0, c0 = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
        n = sum(1 for _ in executor.run_tasks(answer, tasks, args.workers))
        s1, c1 = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
        parent = s1.ru_utime + s1.ru_stime - s0.ru_utime - s0.ru_stime
        kids = c1.ru_utime + c1.ru_stime - c0.ru_utime - c0.ru_stime
        print(f"{n} tasks, {args.workers} workers: the executor's CPU per task {1000 * parent / n:.4f} ms in the "
              f"parent, {1000 * kids / n:.4f} ms in the workers")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m pipeline.tools.cpu_map", description=__doc__.split("\n\n")[0])
    ap.add_argument("mode", choices=("steps", "executor"))
    ap.add_argument("config")
    ap.add_argument("input")
    ap.add_argument("output", help="a scratch output folder (emptied, removed at the end)")
    ap.add_argument("--rounds", type=int, default=1)
    ap.add_argument("--batch", type=int, default=4, help="tasks per message in the transfer figure (steps)")
    ap.add_argument("--workers", type=int, default=2, help="worker processes (executor)")
    args = ap.parse_args(argv)
    (steps if args.mode == "steps" else executor_cost)(args)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
