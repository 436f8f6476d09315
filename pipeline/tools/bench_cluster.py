"""The bench's ``cluster`` section: the Dask executor on a ``distributed.LocalCluster`` of 2
worker processes (one thread each, 127.0.0.1 only) against the local pool, on the same small-class
corpus, each run a separate ``midisift run`` process timed from the outside.

Reported: both wall times and their ratio (the cost of going through a scheduler on the same
cores), the CPU time of everything that worked in each run and its ratio (steadier than wall time
on a shared machine), whether the two output folders hold the same bytes (manifest, split lists, normalized
MIDI), the same check on the demo corpus with the default config, the loopback bytes moved
during the cluster run per file (an upper bound of the network volume: the counter also sees
the scheduler's own messages and any other local traffic), the ledger's size per file, and two
reruns of both (1% new files, then nothing changed) with their fraction of the full run.
"""
from __future__ import annotations

import json
import shutil
import sys
import time
from pathlib import Path
from typing import Any

#: Output files that hold timings, never compared byte for byte.
_TIMED = {"summary.json", "report.html"}


def _loopback_bytes() -> int | None:
    """Bytes carried by the loopback interface so far (Linux /proc/net/dev; its received
    count: every byte sent over loopback is also received there, so counted once)."""
    try:
        for line in Path("/proc/net/dev").read_text().splitlines():
            name, _, rest = line.partition(":")
            if name.strip() == "lo":
                return int(rest.split()[0])
    except (OSError, ValueError, IndexError):
        pass
    return None


def same_outputs(a: Path, b: Path) -> bool:
    """Whether two output folders hold the same bytes (the ledger and timed files aside)."""
    def files(root: Path) -> dict[str, bytes]:
        return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*"))
                if p.is_file() and not p.name.startswith("state.sqlite") and p.name not in _TIMED}
    return files(a) == files(b)


def cluster_section(bench: Any) -> dict[str, Any]:
    """Run the section for a ``bench.Bench``; returns its results."""
    try:
        from distributed import LocalCluster
    except ImportError:
        return {"skipped": "dask.distributed is not installed (pip install '.[dask]')"}
    from .bench_runs import SEEDS, corpus_facts, ensure_corpus, link_tree, run_pipeline
    n = bench.scale.cluster
    corpus = ensure_corpus(bench.scratch / "corpora" / f"small_{n}", n, SEEDS["small"], "small")
    facts = corpus_facts(corpus)
    bench.log(f"[cluster] {facts['files']} files, mean {facts['mean_bytes']} B")
    runs = bench.scratch / "runs" / "cluster"
    # the reruns add 1% new files: to an input tree linked under runs/, never to corpora/
    folder = runs / "input"
    shutil.rmtree(folder, ignore_errors=True)
    link_tree(corpus, folder / "base")
    new = ensure_corpus(bench.scratch / "corpora" / f"cluster_new_{max(1, n // 100)}",
                        max(1, n // 100), SEEDS["rerun_new"], "small")
    workers = 2
    local = run_pipeline(bench.config, folder, runs / "local", str(workers),
                         timeout=bench.scale.run_timeout_s)
    bench.log(f"[cluster] local pool, {workers} workers: {local['wall_s']} s")
    t = time.perf_counter()
    # daemonic worker processes under nannies, as `dask worker` starts them
    cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                           host="127.0.0.1", dashboard_address=None, silence_logs=40)
    try:
        start_s = time.perf_counter() - t
        address = cluster.scheduler_address
        probe = _ClusterCpu(cluster)
        net0 = _loopback_bytes()
        remote = _run_remote(bench, folder, runs / "dask", address)
        net1 = _loopback_bytes()
        cluster_cpu = probe.seconds()
        bench.log(f"[cluster] LocalCluster, {workers} workers: {remote['wall_s']} s")
        same = same_outputs(runs / "local", runs / "dask")
        demo_same = _demo_same(bench, runs, address)
        reruns = _reruns(bench, folder, new, runs, address, local, remote)
    finally:
        cluster.close()
    ledger_b = (runs / "dask" / "state.sqlite").stat().st_size
    files = local["files"]
    ratio = remote["wall_s"] / local["wall_s"] if local.get("wall_s") and remote.get("wall_s") else None
    # CPU of everything that worked, which the neighbours on a shared machine move less than
    # the wall time: the local run's process tree; the client's tree, the Dask workers with
    # the processes they forked, and this process (scheduler and nannies)
    local_cpu = local["cpu_user_s"] + local["cpu_sys_s"]
    remote_cpu = remote["cpu_user_s"] + remote["cpu_sys_s"] + sum(cluster_cpu.values())
    return {"cpu_ms_per_file": {"local": round(1000 * local_cpu / files, 3),
                                "dask_total": round(1000 * remote_cpu / files, 3),
                                **{f"dask_{k}": round(1000 * v / files, 3) for k, v in cluster_cpu.items()},
                                "dask_client": round(1000 * (remote["cpu_user_s"] + remote["cpu_sys_s"]) / files, 3)},
            "cpu_overhead_x": round(remote_cpu / local_cpu, 3) if local_cpu else None,
            "files": files, "workers": workers, "cluster_start_s": round(start_s, 2),
            "local": local, "dask": remote,
            "overhead_x": round(ratio, 3) if ratio else None,
            "same_bytes": same, "reruns": reruns,
            "demo_same_bytes": demo_same,
            "loopback_bytes_per_file": (round((net1 - net0) / files) if net0 is not None
                                        and net1 is not None and files else None),
            "ledger_bytes_per_file": round(ledger_b / files) if files else None}


def _reruns(bench: Any, folder: Path, new: Path, runs: Path, address: str,
            local: dict[str, Any], remote: dict[str, Any]) -> dict[str, Any]:
    """1% new files, then nothing changed, locally and through the cluster: seconds, their
    fraction of the full run, and whether the outputs still hold the same bytes."""
    from .bench_runs import link_tree, run_pipeline
    link_tree(new, folder / "new")
    out: dict[str, Any] = {}
    for case in ("new_1pct", "unchanged"):
        lo = run_pipeline(bench.config, folder, runs / "local", "2", fresh_output=False)
        da = _run_remote(bench, folder, runs / "dask", address, fresh_output=False)
        out[case] = {"local_s": lo["wall_s"], "dask_s": da["wall_s"],
                     "local_fraction": round(lo["wall_s"] / local["wall_s"], 4),
                     "dask_fraction": round(da["wall_s"] / remote["wall_s"], 4),
                     "computed": [lo["counts"].get("computed"), da["counts"].get("computed")],
                     "same_bytes": same_outputs(runs / "local", runs / "dask")}
        bench.log(f"[cluster] rerun {case}: local {lo['wall_s']} s, cluster {da['wall_s']} s")
    return out


class _ClusterCpu:
    """CPU seconds used by a LocalCluster's worker processes (with the children they forked
    and waited for) and by this process (its scheduler and nannies) from now on."""

    def __init__(self, cluster: Any):
        import psutil  # a dependency of distributed
        self.me = psutil.Process()
        self.workers = [psutil.Process(w.process.pid) for w in cluster.workers.values()
                        if getattr(getattr(w, "process", None), "pid", None)]
        self.start = self._now()

    def _now(self) -> dict[str, float]:
        def total(p: Any, children: bool) -> float:
            t = p.cpu_times()
            return t.user + t.system + ((t.children_user + t.children_system) if children else 0.0)
        return {"workers": sum(total(p, True) for p in self.workers),
                "scheduler_nannies": total(self.me, False)}

    def seconds(self) -> dict[str, float]:
        end = self._now()
        return {k: end[k] - self.start[k] for k in end}


def _run_remote(bench: Any, folder: Path, out: Path, address: str,
                fresh_output: bool = True) -> dict[str, Any]:
    """``run_pipeline`` through the scheduler (the ``--executor`` option added to its command)."""
    from . import bench_runs as b
    if fresh_output:
        shutil.rmtree(out, ignore_errors=True)
    cmd = [sys.executable, "-m", "pipeline.cli", "run", str(bench.config), "--input", str(folder),
           "--output", str(out), "--quiet", "--executor", address]
    wall, mem, _ = b._timed_process(cmd, timeout=bench.scale.run_timeout_s)
    summary = json.loads((out / "summary.json").read_text())
    files = summary["counts"]["files"]
    return {"files": files, "wall_s": round(wall, 3), "files_per_s": round(files / wall, 1),
            "timings_s": summary["timings_s"], "counts": summary["counts"], **mem}


def _demo_same(bench: Any, runs: Path, address: str) -> bool | None:
    """The default config on the demo corpus, locally and through the cluster: same bytes?"""
    from ..config import load_config
    from ..engine.runner import Runner
    from ..errors import MidisiftError
    root = Path(__file__).resolve().parents[2]  # the repository (the demo is not installed)
    config, demo = root / "configs" / "default.yaml", root / "sample_corpus"
    if not (config.is_file() and demo.is_dir()):
        return None
    outs = {}
    for name, executor in (("demo_local", "local"), ("demo_dask", address)):
        outs[name] = runs / name
        shutil.rmtree(outs[name], ignore_errors=True)
        try:
            cfg = load_config(config, input=str(demo), output=str(outs[name]), workers="2",
                              executor=executor)
            Runner(cfg, quiet=True).run()
        except MidisiftError:
            return False
    return same_outputs(outs["demo_local"], outs["demo_dask"])


def table_rows(r: dict[str, Any]) -> list[tuple[str, Any]]:
    """The section's rows of the bench table (label, value)."""
    if r.get("skipped"):
        return [(f"cluster: skipped ({r['skipped']})", None)]
    return [
        (f"Dask executor, LocalCluster {r['workers']} workers vs local pool, {r['files']} small files", None),
        ("  local pool (s)", r["local"].get("wall_s")),
        ("  LocalCluster (s)", r["dask"].get("wall_s")),
        ("  overhead: LocalCluster / local pool (x)", r["overhead_x"]),
        ("  CPU per file, local run / all of the cluster run (ms)",
         f"{r['cpu_ms_per_file']['local']} / {r['cpu_ms_per_file']['dask_total']}"),
        ("  ... the cluster run's client / workers / scheduler and nannies (ms)",
         f"{r['cpu_ms_per_file']['dask_client']} / {r['cpu_ms_per_file']['dask_workers']} / "
         f"{r['cpu_ms_per_file']['dask_scheduler_nannies']}"),
        ("  CPU overhead: cluster run / local run (x)", r["cpu_overhead_x"]),
        ("  same bytes (this corpus / demo corpus)", f"{r['same_bytes']} / {r['demo_same_bytes']}"),
        ("  loopback bytes per file (upper bound)", r["loopback_bytes_per_file"]),
        *[(f"  rerun {case.replace('_', ' ')}: local / cluster (s)",
           f"{v['local_s']} ({100 * v['local_fraction']:.1f}%) / {v['dask_s']} "
           f"({100 * v['dask_fraction']:.1f}%), same bytes {v['same_bytes']}")
          for case, v in r.get("reruns", {}).items()],
        ("  ledger bytes per file", r["ledger_bytes_per_file"]),
        ("  cluster start (s)", r["cluster_start_s"]),
    ]
