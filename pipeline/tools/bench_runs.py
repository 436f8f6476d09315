"""The benchmark's corpora and measured runs: corpora made once with ``midisift synth`` and
reused between bench runs (``SEEDS``), and one ``midisift run`` in its own process timed with
the memory of its whole process tree (``run_pipeline``). Shared by the sections in ``bench``
and ``bench_cluster``."""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any, Callable

from ..cpus import usable_cpus

#: Seeds of the bench corpora (fixed, so corpora are reused between bench runs).
SEEDS = {"small": 11, "large": 12, "mem": 100, "rerun_new": 900}


# ---------------------------------------------------------------------------------------------
# corpora

def ensure_corpus(folder: Path, count: int, seed: int, profile: str = "small") -> Path:
    """A synth corpus in ``folder`` (reused when its truth.json says it was made the same way)."""
    from .synth import generate
    truth = folder / "truth.json"
    if truth.is_file():
        try:
            gen = json.loads(truth.read_text())["generator"]
            if (gen.get("count"), gen.get("seed"), gen.get("profile")) == (count, seed, profile):
                return folder
        except (ValueError, KeyError):
            pass
    shutil.rmtree(folder, ignore_errors=True)
    generate(folder, count, seed=seed, profile=profile)
    return folder


def ensure_chunked(folder: Path, total: int, chunk: int, seed: int) -> list[Path]:
    """``total`` small-class files as chunks of ``chunk`` files (``c0``, ``c1``, ...), built in
    parallel processes; chunk ``c0`` alone is the smaller memory corpus."""
    n = max(1, total // chunk)
    jobs = [(folder / f"c{i}", chunk, seed + i) for i in range(n)]
    todo = [j for j in jobs if not _corpus_ok(*j)]
    if todo:
        import multiprocessing as mp
        pool = mp.get_context("fork" if sys.platform.startswith("linux") else "spawn").Pool(
            min(len(todo), usable_cpus()))
        try:
            pool.starmap(ensure_corpus, todo)
        except BaseException:
            pool.terminate()
            raise
        # the workers leave on their own: terminate() would SIGTERM them, and they inherited
        # the command's SIGTERM handler (a traceback each)
        pool.close()
        pool.join()
    return [j[0] for j in jobs]


def _corpus_ok(folder: Path, count: int, seed: int) -> bool:
    try:
        gen = json.loads((folder / "truth.json").read_text())["generator"]
    except (OSError, ValueError, KeyError):
        return False
    return (gen.get("count"), gen.get("seed"), gen.get("profile")) == (count, seed, "small")


def midi_files(folder: Path) -> list[Path]:
    """The MIDI files of a corpus in path order (same suffixes as the runner)."""
    from ..engine.sources import MIDI_SUFFIXES
    return sorted(p for p in folder.rglob("*") if p.suffix.lower() in MIDI_SUFFIXES and p.is_file())


def corpus_facts(folder: Path) -> dict[str, Any]:
    """Files, mean bytes and median notes (from truth.json) of a corpus."""
    files = midi_files(folder)
    sizes = sorted(p.stat().st_size for p in files)
    notes = []
    for truth in folder.rglob("truth.json"):
        notes += [t["notes"] for t in json.loads(truth.read_text())["files"].values() if t.get("notes")]
    notes.sort()
    return {"files": len(files), "mean_bytes": round(sum(sizes) / max(1, len(sizes))),
            "median_notes": notes[len(notes) // 2] if notes else 0}


def link_tree(src: Path, dst: Path) -> None:
    """Mirror the MIDI files of ``src`` under ``dst`` as hard links (copies across devices)."""
    for p in midi_files(src):
        target = dst / p.relative_to(src)
        target.parent.mkdir(parents=True, exist_ok=True)
        try:
            os.link(p, target)
        except OSError:
            shutil.copy2(p, target)


# ---------------------------------------------------------------------------------------------
# measuring a process tree

def _children(pid: int) -> list[int]:
    try:
        with open(f"/proc/{pid}/task/{pid}/children") as fh:
            return [int(x) for x in fh.read().split()]
    except OSError:
        return []


def _status_kb(pid: int, field: str) -> int:
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith(field):
                    return int(line.split()[1])
    except (OSError, ValueError):
        pass
    return 0


def _pss_kb(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/smaps_rollup") as fh:
            for line in fh:
                if line.startswith("Pss:"):
                    return int(line.split()[1])
    except (OSError, ValueError):
        pass
    return 0


class TreeMemory:
    """Samples a process and its descendants: peak of the summed PSS (shared pages counted
    once), peak RSS of the main process (its VmHWM) and of each worker."""

    def __init__(self, pid: int, interval: float = 0.25, pss_every: int = 4):
        self.pid, self.interval, self.pss_every = pid, interval, pss_every
        self.peak_pss_kb = 0
        self.peak_rss_sum_kb = 0
        self.hwm: dict[int, int] = {}
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self.available = os.path.isdir(f"/proc/{pid}")

    def __enter__(self) -> "TreeMemory":
        self._thread.start()
        return self

    def __exit__(self, *exc: Any) -> None:
        self._stop.set()
        self._thread.join()

    def _tree(self) -> list[int]:
        out, todo = [], [self.pid]
        while todo:
            p = todo.pop()
            out.append(p)
            todo.extend(_children(p))
        return out

    def _loop(self) -> None:
        # VmHWM (exact peak per process) and VmRSS are cheap to read; PSS makes the kernel walk
        # the page tables, so it is sampled less often to keep the sampler off the CPU.
        tick = 0
        while not self._stop.is_set():
            pids = self._tree()
            pss = sum(_pss_kb(p) for p in pids) if tick % self.pss_every == 0 else 0
            tick += 1
            rss = 0
            for p in pids:
                r = _status_kb(p, "VmRSS:")
                rss += r
                h = _status_kb(p, "VmHWM:")
                if h:
                    self.hwm[p] = max(self.hwm.get(p, 0), h)
            self.peak_pss_kb = max(self.peak_pss_kb, pss)
            self.peak_rss_sum_kb = max(self.peak_rss_sum_kb, rss)
            self._stop.wait(self.interval)

    def result(self) -> dict[str, float]:
        main = self.hwm.get(self.pid, 0)
        workers = [v for k, v in self.hwm.items() if k != self.pid]
        return {"peak_pss_tree_mb": round(self.peak_pss_kb / 1024, 1),
                "peak_rss_tree_mb": round(self.peak_rss_sum_kb / 1024, 1),
                "peak_rss_main_mb": round(main / 1024, 1),
                "peak_rss_worker_mb": round(max(workers, default=0) / 1024, 1)}


class RunTimeout(Exception):
    """A measured process was still running at its time limit (it was stopped)."""

    def __init__(self, seconds: float, memory: dict):
        super().__init__(f"stopped after {seconds:.0f} s")
        self.seconds, self.memory = seconds, memory


class RunFailed(Exception):
    """A measured process exited with an error (its last stderr lines are kept)."""

    def __init__(self, code: int, stderr: str, seconds: float, memory: dict):
        last = stderr.splitlines()[-1] if stderr else ""
        super().__init__(f"exited with {code}: {last}")
        self.code, self.stderr, self.seconds, self.memory = code, stderr, seconds, memory


def _limit_memory(mb: int | None) -> Callable[[], None] | None:
    """A ``preexec_fn`` that caps the child's address space (RLIMIT_AS) at ``mb`` megabytes."""
    if not mb:
        return None

    def apply() -> None:
        import resource
        cap = mb * 1024 * 1024
        soft, hard = resource.getrlimit(resource.RLIMIT_AS)
        if hard != resource.RLIM_INFINITY:
            cap = min(cap, hard)
        resource.setrlimit(resource.RLIMIT_AS, (cap, hard))
    return apply


def _timed_process(cmd: list[str], cwd: Path | None = None, timeout: float | None = None,
                   memory_mb: int | None = None) -> tuple[float, dict, str]:
    """Run ``cmd``; wall seconds, memory figures and stdout. Raises on a non-zero exit, and
    ``RunTimeout`` (after stopping the process and its workers: its own process group) when it
    runs past ``timeout`` seconds."""
    import resource
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    ru0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, cwd=cwd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env,
                            text=True, start_new_session=True, preexec_fn=_limit_memory(memory_mb))
    with TreeMemory(proc.pid) as mem:
        try:
            out, err = proc.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            import signal
            os.killpg(proc.pid, signal.SIGKILL)
            proc.communicate()
            raise RunTimeout(time.perf_counter() - t0, mem.result()) from None
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RunFailed(proc.returncode, err.strip()[-2000:], time.perf_counter() - t0, mem.result())
    ru1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    # CPU seconds of the process and its workers (waited for): what a shared machine's load
    # does not inflate, unlike the wall time
    cpu = {"cpu_user_s": round(ru1.ru_utime - ru0.ru_utime, 3), "cpu_sys_s": round(ru1.ru_stime - ru0.ru_stime, 3)}
    return wall, {**mem.result(), **cpu}, out


def run_pipeline(config: Path, inp: Path, out: Path, workers: str, fresh_output: bool = True,
                 timeout: float | None = None, memory_mb: int | None = None) -> dict[str, Any]:
    """One ``midisift run`` in its own process: wall time, memory, what the summary says.
    A run stopped at ``timeout`` comes back with ``timed_out`` and the memory seen until then."""
    if fresh_output:
        shutil.rmtree(out, ignore_errors=True)
    cmd = [sys.executable, "-m", "pipeline.cli", "run", str(config), "--input", str(inp),
           "--output", str(out), "--workers", str(workers), "--quiet"]
    try:
        wall, mem, _ = _timed_process(cmd, timeout=timeout, memory_mb=memory_mb)
    except RunTimeout as t:
        return {"workers": workers, "files": len(midi_files(inp)), "timed_out": True,
                "wall_s": round(t.seconds, 1), "files_per_s": None, **t.memory}
    except RunFailed as f:
        return {"workers": workers, "files": len(midi_files(inp)), "timed_out": True,
                "failed": str(f), "stderr": f.stderr, "wall_s": round(f.seconds, 1),
                "files_per_s": None, **f.memory}
    summary = json.loads((out / "summary.json").read_text())
    files = summary["counts"]["files"]
    cpu_ms = 1000 * (mem["cpu_user_s"] + mem["cpu_sys_s"]) / files if files else None
    return {"workers": workers, "files": files, "wall_s": round(wall, 3),
            "files_per_s": round(files / wall, 1) if wall > 0 else None,
            "cpu_ms_per_file": round(cpu_ms, 3) if cpu_ms is not None else None,
            "internal_s": summary["timings_s"].get("total"),
            "timings_s": summary["timings_s"], "counts": summary["counts"], **mem}
