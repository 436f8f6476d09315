"""``midisift bench``: one side-by-side throughput table (printed) and ``bench.json``.

Every corpus is built with ``pipeline.tools.synth`` (``midisift synth``) into the scratch folder and
reused by later bench runs with the same sizes. Every pipeline run is a separate
``python -m pipeline.cli run`` process with the default config, timed from the outside (start-up
and imports included, as a user pays them) while a sampler thread follows the memory of the
process tree; its CPU seconds (process and workers) are recorded too, since on a shared machine
the wall time also measures the neighbours. A run past ``Scale.run_timeout_s`` is stopped and a
run is capped at ``Scale.run_memory_mb`` of address space; either is reported as unfinished
(with the memory seen until then) instead of ending the bench. The class sections also time
each step of the per-file path in one process (``component_times``): where the time goes.
Sections (``--only NAME``, repeatable):

``small``   the full default pipeline on ~5 KB files (about 500 notes, a few tracks) with one
            worker and with all workers, beside decode-only with our decoder (the floor a
            pipeline cannot beat) in one and in all processes; the pipeline as a multiple of it
``large``   the same on ~60 KB multi-track files (about 8,000 notes)
``peer``    the hand-written peer a practitioner writes with general libraries (mido parse,
            pretty_midi notes, music21 ``analyze('key')``, datasketch MinHash of pitch-interval
            4-grams into ``MinHashLSH``, random split) on a subset of each class, and our
            pipeline on exactly the same files, side by side
``rerun``   a full run, a rerun with 1 % new files, a rerun with nothing changed, a rerun
            with the new files removed again
``memory``  peak memory (RSS) of the full run at two corpus sizes (or those of ``--mem-sizes``),
            growth per file, and the reruns at the second size
``dedup``   ``pipeline.tools.bench_dedup`` (precision/recall and cost of near-duplicate removal)
``cluster`` ``pipeline.tools.bench_cluster``: the Dask executor on a LocalCluster of 2 workers
            against the local pool (overhead ratio, same bytes); needs the dask extra

Targets (the issue's, for the 2-core machine) are data in ``TARGETS``; the table says for each
whether it is met and by how much it is missed. Timings on a shared machine are noisy: the
ratios measured side by side in one run are what transfers.
"""
from __future__ import annotations

import hashlib
import json
import os
import platform
import random
import shutil
import subprocess
import sys
import time
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import Any, Callable

from ..errors import UsageError
from .bench_runs import (SEEDS, _timed_process, corpus_facts, ensure_chunked, ensure_corpus,
                         link_tree, midi_files, run_pipeline)
from .defaults import write_default_config
from ..cpus import usable_cpus

SECTIONS = ("small", "large", "peer", "rerun", "memory", "dedup", "cluster")


@dataclass(frozen=True)
class Scale:
    """Corpus sizes of one bench flavour (files per corpus)."""

    small: int          # ~5 KB class, full pipeline and decode-only
    large: int          # ~60 KB class
    peer_small: int     # subset of the small class run through the peer (music21 is slow)
    peer_large: int     # subset of the large class run through the peer
    mem: tuple[int, ...]  # full runs measured for peak memory (mem[0]: one chunk, also the
    #                       rerun section's base; mem[1]: the memory section's reruns)
    dedup_sizes: tuple[int, ...]
    dedup_settings: bool  # also the dedup benchmark's extra settings (how defaults were chosen)
    run_timeout_s: float = 3600.0  # a pipeline run still going after this is stopped and reported
    run_memory_mb: int = 8192  # address-space limit of a measured run: a runaway run fails with
    #                            MemoryError instead of waking the OOM killer on a shared machine
    cluster: int = 10_000  # small-class files of the cluster section (Dask vs the local pool)


SCALES: dict[str, Scale] = {
    "full": Scale(small=2000, large=300, peer_small=60, peer_large=4, mem=(10_000, 100_000),
                  dedup_sizes=(1000, 5000), dedup_settings=True, run_timeout_s=600.0),
    "quick": Scale(small=300, large=30, peer_small=6, peer_large=1, mem=(500, 2000),
                   dedup_sizes=(300,), dedup_settings=False, cluster=500),
}

#: (key in the results, label, comparison, target): the issue's targets on a 2-core machine.
TARGETS: tuple[tuple[str, str, str, float], ...] = (
    ("small.files_per_s_all", "small class end to end, all workers (files/s)", ">=", 1000.0),
    ("large.files_per_s_all", "large class end to end, all workers (files/s)", ">=", 150.0),
    ("peer.speedup_small", "speed-up over the peer, small class (x)", ">=", 100.0),
    ("peer.speedup_large", "speed-up over the peer, large class (x)", ">=", 100.0),
    ("small.x_decode_all", "small: pipeline time / decode-only time, all workers (x)", "<=", 4.0),
    ("large.x_decode_all", "large: pipeline time / decode-only time, all workers (x)", "<=", 4.0),
    ("rerun.new_1pct_fraction", "rerun with 1% new files / full run", "<=", 0.05),
    ("rerun.unchanged_fraction", "rerun with nothing changed / full run", "<=", 0.02),
    ("memory.rerun_large.new_1pct_fraction", "rerun with 1% new files / full run, larger memory size",
     "<=", 0.05),
    ("memory.rerun_large.unchanged_fraction", "rerun with nothing changed / full run, larger memory size",
     "<=", 0.02),
    ("memory.peak_mb_large", "peak memory of the full run at the larger size (MB)", "<=", 1024.0),
)

# ---------------------------------------------------------------------------------------------
# decode-only floor

def decode_paths(paths: list[str], accelerated: bool | None = None) -> tuple[int, int]:
    """Read and decode each file with our decoder; (decoded files, notes). The floor.
    ``accelerated=False``: the pure-Python decoder (the floor without the C fast path)."""
    from ..errors import DecodeError
    from ..midi.decode import decode
    ok = notes = 0
    for p in paths:
        with open(p, "rb") as fh:
            data = fh.read()
        try:
            piece = decode(data, source=p, accelerated=accelerated)
        except DecodeError:
            continue
        ok += 1
        notes += len(piece.notes)
    return ok, notes


def decode_only(paths: list[Path], workers: int, accelerated: bool | None = None) -> dict[str, Any]:
    """Decode-only wall time in one process, or spread over ``workers`` forked processes."""
    names = [str(p) for p in paths]
    import resource
    decode_paths(names[:2], accelerated)  # imports and first-call costs out of the measurement
    t0 = time.perf_counter()
    if workers <= 1:
        c0 = time.process_time()
        ok, notes = decode_paths(names, accelerated)
        cpu = time.process_time() - c0
    else:
        import multiprocessing as mp
        ru0 = resource.getrusage(resource.RUSAGE_CHILDREN)
        chunks = [names[i::workers * 4] for i in range(workers * 4)]
        pool = mp.get_context("fork" if sys.platform.startswith("linux") else "spawn").Pool(workers)
        parts = pool.map(decode_paths, chunks)
        pool.close()
        pool.join()
        ru1 = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpu = (ru1.ru_utime + ru1.ru_stime) - (ru0.ru_utime + ru0.ru_stime)
        ok, notes = sum(p[0] for p in parts), sum(p[1] for p in parts)
    wall = time.perf_counter() - t0
    return {"workers": workers, "files": len(names), "decoded": ok, "notes": notes,
            "wall_s": round(wall, 3), "files_per_s": round(len(names) / wall, 1) if wall > 0 else None,
            "cpu_ms_per_file": round(1000 * cpu / len(names), 3) if names else None}


def component_times(config: Path, paths: list[Path], scratch: Path) -> dict[str, float]:
    """CPU milliseconds per file of each step of the per-file path, in this process, with the
    default config's stage objects: where a worker's time goes (the worker's own pass,
    ``engine.worker.file_pass``: decode once, analyses shared through one ``FileContext`` per
    file, then the normalized output encoded and written). Files that do not decode count only
    in ``read+decode``."""
    from ..config import load_config
    from ..engine.worker import file_pass, output_variants
    from ..outputs.render import render
    from ..stages.base import bind_stages
    cfg = load_config(config, input=str(scratch), output=str(scratch / "out"), workers=1)
    stages = bind_stages([sc.build() for sc in cfg.stages])
    spent: dict[str, float] = {"read+decode": 0.0}
    staging = scratch / "component_staging"
    shutil.rmtree(staging, ignore_errors=True)
    staging.mkdir(parents=True)
    clock = time.process_time
    reader = stages[0].name

    def step(label: str, t0: float) -> None:
        label = "read+decode" if label == reader else label
        spent[label] = spent.get(label, 0.0) + clock() - t0

    for path in paths:
        t = clock()
        data = path.read_bytes()
        spent["read+decode"] += clock() - t
        done = file_pass(stages, data, path.name, step=step)
        if not done.survived:
            continue
        t = clock()
        # a content-like id: staged files spread over subfolders by its first hex digits
        render(output_variants(stages, done.piece, done.results), str(staging),
               hashlib.sha256(path.name.encode()).hexdigest(), "bench000")
        spent["encode+write output"] = spent.get("encode+write output", 0.0) + clock() - t
    shutil.rmtree(staging, ignore_errors=True)
    return {k: round(1000 * v / max(1, len(paths)), 3) for k, v in spent.items()}


# ---------------------------------------------------------------------------------------------
# the hand-written peer

def peer_run(paths: list[str], seed: int = 0) -> dict[str, Any]:
    """What a practitioner writes with general libraries, timed per step (imports excluded).

    Per file: ``mido.MidiFile`` (validity), ``pretty_midi.PrettyMIDI`` (the note list),
    ``music21.converter.parse(..., forceSource=True).analyze('key')``, a datasketch
    ``MinHash`` of the pitch-interval 4-grams of the pitched notes in onset order queried
    against and inserted into a ``MinHashLSH`` (threshold 0.8; a file with a match is a
    duplicate); then a seeded random 80/10/10 split of the survivors. It does less than our
    pipeline (no meter, no length and density measures, no normalized files), so the speed-up
    quoted against it is conservative.
    """
    import warnings
    t_imp = time.perf_counter()
    import mido
    import music21
    import pretty_midi
    from datasketch import MinHash, MinHashLSH
    imports_s = time.perf_counter() - t_imp
    warnings.filterwarnings("ignore")
    spent = dict.fromkeys(("mido", "pretty_midi", "music21_key", "minhash_lsh", "split"), 0.0)
    lsh = MinHashLSH(threshold=0.8, num_perm=128)
    kept: list[str] = []
    invalid = duplicates = key_failures = 0
    t_all = time.perf_counter()
    for path in paths:
        t = time.perf_counter()
        try:
            mido.MidiFile(path)
        except Exception:  # noqa: BLE001 - the peer's validation: anything mido cannot read
            invalid += 1
            spent["mido"] += time.perf_counter() - t
            continue
        t1 = time.perf_counter()
        spent["mido"] += t1 - t
        try:
            pm = pretty_midi.PrettyMIDI(path)
            notes = sorted((n.start, n.pitch) for inst in pm.instruments if not inst.is_drum
                           for n in inst.notes)
        except Exception:  # noqa: BLE001
            notes = []
        t2 = time.perf_counter()
        spent["pretty_midi"] += t2 - t1
        if not notes:
            invalid += 1
            continue
        try:
            # forceSource: parse the file itself, as on a first pass over a corpus. By default
            # music21 also writes a pickle of each parsed file to its scratch folder and reads
            # it on the next parse: two bench runs minutes apart measured the peer at 4.5 and
            # 14.0 files/s on the same 60 files, the second reading the first's pickles.
            music21.converter.parse(path, forceSource=True).analyze("key")
        except Exception:  # noqa: BLE001
            key_failures += 1
        t3 = time.perf_counter()
        spent["music21_key"] += t3 - t2
        pitches = [p for _, p in notes]
        iv = [b - a for a, b in zip(pitches, pitches[1:])]
        grams = {",".join(map(str, iv[i:i + 4])).encode() for i in range(max(1, len(iv) - 3))}
        m = MinHash(num_perm=128)
        m.update_batch(list(grams))
        if lsh.query(m):
            duplicates += 1
        else:
            lsh.insert(path, m)
            kept.append(path)
        spent["minhash_lsh"] += time.perf_counter() - t3
    t4 = time.perf_counter()
    rng = random.Random(seed)
    rng.shuffle(kept)
    n_train, n_valid = int(0.8 * len(kept)), int(0.1 * len(kept))
    parts = {"train": kept[:n_train], "valid": kept[n_train:n_train + n_valid],
             "test": kept[n_train + n_valid:]}
    spent["split"] = time.perf_counter() - t4
    wall = time.perf_counter() - t_all
    return {"files": len(paths), "wall_s": round(wall, 3),
            "files_per_s": round(len(paths) / wall, 3) if wall > 0 else None,
            "imports_s": round(imports_s, 3), "step_s": {k: round(v, 3) for k, v in spent.items()},
            "invalid": invalid, "duplicates": duplicates, "key_failures": key_failures,
            "parts": {k: len(v) for k, v in parts.items()}}


def peer_process(paths: list[Path], scratch: Path) -> dict[str, Any]:
    """The peer in its own process (so music21 is imported there, not here)."""
    lst = scratch / "peer_files.txt"
    lst.write_text("".join(f"{p}\n" for p in paths))
    res = scratch / "peer_result.json"
    cmd = [sys.executable, "-m", "pipeline.tools.bench", "--peer", str(lst), str(res)]
    wall, mem, _ = _timed_process(cmd)
    out = json.loads(res.read_text())
    out["process_wall_s"] = round(wall, 3)
    out.update(mem)
    return out


# ---------------------------------------------------------------------------------------------
# sections

class Bench:
    """One bench run: scratch folder, scale, and the results collected so far."""

    def __init__(self, scratch: Path, scale: Scale, log: Callable[[str], None] = print):
        self.scratch = Path(scratch).resolve()
        self.scale = scale
        self.log = log
        self.results: dict[str, Any] = {}
        self.scratch.mkdir(parents=True, exist_ok=True)
        self.config = write_default_config(self.scratch)
        self.workers_all = usable_cpus()  # what ``workers: auto`` starts

    def corpus(self, cls: str) -> Path:
        count = self.scale.small if cls == "small" else self.scale.large
        return ensure_corpus(self.scratch / "corpora" / f"{cls}_{count}", count, SEEDS[cls], cls)

    def _class(self, cls: str) -> dict[str, Any]:
        folder = self.corpus(cls)
        facts = corpus_facts(folder)
        self.log(f"[{cls}] {facts['files']} files, mean {facts['mean_bytes']} B, median "
                 f"{facts['median_notes']} notes")
        out = self.scratch / "runs" / cls
        one = run_pipeline(self.config, folder, out / "w1", "1",
                           timeout=self.scale.run_timeout_s, memory_mb=self.scale.run_memory_mb)
        self.log(f"[{cls}] pipeline, 1 worker: {one['files_per_s']} files/s")
        allw = run_pipeline(self.config, folder, out / "wall", "auto",
                           timeout=self.scale.run_timeout_s, memory_mb=self.scale.run_memory_mb)
        self.log(f"[{cls}] pipeline, {self.workers_all} workers: {allw['files_per_s']} files/s")
        paths = midi_files(folder)
        d1 = decode_only(paths, 1)
        dn = decode_only(paths, self.workers_all)
        from ..midi.accel import HAVE_ACCEL
        d1_pure = decode_only(paths, 1, accelerated=False) if HAVE_ACCEL else d1
        self.log(f"[{cls}] decode-only: {d1['files_per_s']} files/s (1), {dn['files_per_s']} ({self.workers_all})")
        sample = paths[:: max(1, len(paths) // 300)]
        parts = component_times(self.config, sample, self.scratch / "runs" / cls)
        res = {"corpus": facts, "pipeline_1": one, "pipeline_all": allw, "decode_1": d1,
               "decode_all": dn, "decode_1_pure": d1_pure, "accelerated": HAVE_ACCEL,
               "x_decode_pure_1": _times(one, d1_pure),
               "workers_all": self.workers_all, "component_ms": parts,
               "component_files": len(sample),
               "files_per_s_1": one["files_per_s"], "files_per_s_all": allw["files_per_s"],
               "x_decode_1": _times(one, d1), "x_decode_all": _times(allw, dn),
               "x_decode_cpu": (round(one["cpu_ms_per_file"] / d1["cpu_ms_per_file"], 2)
                                if one.get("cpu_ms_per_file") and d1.get("cpu_ms_per_file") else None)}
        return res

    def small(self) -> dict[str, Any]:
        res = self._class("small")
        res["run_imports_music21"] = self._imports_music21(self.corpus("small"))
        self.log(f"[small] music21 imported by a default run: {res['run_imports_music21']}")
        return res

    def _imports_music21(self, folder: Path) -> bool:
        """Whether ``midisift run`` with the default config imports music21 (it should not pay
        for it): a run over a few files in a process that reports its modules afterwards."""
        few = self.scratch / "runs" / "imports" / "input"
        shutil.rmtree(few.parent, ignore_errors=True)
        for p in midi_files(folder)[:5]:
            (few / p.name).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(p, few / p.name)
        code = ("import sys; from pipeline.cli import main; "
                f"main(['run', {str(self.config)!r}, '--input', {str(few)!r}, '--output', "
                f"{str(few.parent / 'out')!r}, '--workers', '1', '--quiet']); "
                "print('music21' in sys.modules)")
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
        return out.stdout.strip().splitlines()[-1] == "True"

    def large(self) -> dict[str, Any]:
        return self._class("large")

    def peer(self) -> dict[str, Any]:
        res: dict[str, Any] = {}
        for cls, n in (("small", self.scale.peer_small), ("large", self.scale.peer_large)):
            if n <= 0:
                continue
            folder = self.corpus(cls)
            paths = midi_files(folder)
            subset = [paths[i] for i in sorted(random.Random(5).sample(range(len(paths)), min(n, len(paths))))]
            sub_dir = self.scratch / "runs" / f"peer_{cls}" / "input"
            shutil.rmtree(sub_dir.parent, ignore_errors=True)
            for p in subset:
                dst = sub_dir / p.relative_to(folder)
                dst.parent.mkdir(parents=True, exist_ok=True)
                shutil.copy2(p, dst)
            sub_paths = midi_files(sub_dir)
            peer = peer_process(sub_paths, sub_dir.parent)
            ours_sub = run_pipeline(self.config, sub_dir, sub_dir.parent / "out", "auto",
                           timeout=self.scale.run_timeout_s, memory_mb=self.scale.run_memory_mb)
            ours_sub1 = run_pipeline(self.config, sub_dir, sub_dir.parent / "out1", "1",
                           timeout=self.scale.run_timeout_s, memory_mb=self.scale.run_memory_mb)
            self.log(f"[peer/{cls}] {len(sub_paths)} files: peer {peer['files_per_s']} files/s, ours "
                     f"{ours_sub['files_per_s']} (same files, all workers)")
            full = self.results.get(cls, {}).get("files_per_s_all")
            res[cls] = {"files": len(sub_paths), "peer": peer, "ours_same_files_all": ours_sub,
                        "ours_same_files_1": ours_sub1,
                        "speedup_same_files_all": _ratio(ours_sub["files_per_s"], peer["files_per_s"]),
                        "speedup_same_files_1": _ratio(ours_sub1["files_per_s"], peer["files_per_s"]),
                        "speedup_vs_class_run": _ratio(full, peer["files_per_s"]) if full else None}
            # the target: ours at its class throughput (fixed start-up costs amortised) when the
            # class section ran, else ours on the same few files
            res[f"speedup_{cls}"] = res[cls]["speedup_vs_class_run"] or res[cls]["speedup_same_files_all"]
        return res

    def rerun(self) -> dict[str, Any]:
        base_n = self.scale.mem[0]
        base = ensure_chunked(self.scratch / "corpora" / "mem", base_n, base_n, SEEDS["mem"])[0]
        root = self.scratch / "runs" / "rerun"
        shutil.rmtree(root, ignore_errors=True)
        inp, out = root / "input", root / "output"
        link_tree(base, inp / "base")
        full = run_pipeline(self.config, inp, out, "auto",
                           timeout=self.scale.run_timeout_s, memory_mb=self.scale.run_memory_mb)
        self.log(f"[rerun] full run of {full['files']} files: {full['wall_s']} s")
        return self._reruns(full, inp, out, base_n)

    def _reruns(self, full: dict[str, Any], inp: Path, out: Path, base_n: int) -> dict[str, Any]:
        """After a full run of ``base_n`` files from ``inp`` into ``out``: a rerun with 1% new
        files added to ``inp``, then one with nothing changed, then one with those files removed
        again (``inp`` as it was), as fractions of the full run."""
        n_new = max(1, base_n // 100)
        new = ensure_corpus(self.scratch / "corpora" / f"rerun_new_{n_new}", n_new, SEEDS["rerun_new"])
        if full.get("timed_out"):
            return {"full": full, "new_files": n_new, "new_1pct_fraction": None,
                    "unchanged_fraction": None}
        link_tree(new, inp / "new")
        added = run_pipeline(self.config, inp, out, "auto", fresh_output=False,
                           timeout=self.scale.run_timeout_s, memory_mb=self.scale.run_memory_mb)
        self.log(f"[rerun] {full['files']} files +{n_new} new: {added['wall_s']} s")
        same = run_pipeline(self.config, inp, out, "auto", fresh_output=False,
                           timeout=self.scale.run_timeout_s, memory_mb=self.scale.run_memory_mb)
        self.log(f"[rerun] {full['files'] + n_new} files, nothing changed: {same['wall_s']} s")
        shutil.rmtree(inp / "new")  # links to the new corpus's files
        removed = run_pipeline(self.config, inp, out, "auto", fresh_output=False,
                               timeout=self.scale.run_timeout_s, memory_mb=self.scale.run_memory_mb)
        self.log(f"[rerun] {full['files']} files, the {n_new} new ones removed again: {removed['wall_s']} s")
        done = not any(r.get("timed_out") for r in (full, added, same, removed))
        return {"full": full, "new_1pct": added, "unchanged": same, "removed_1pct": removed, "new_files": n_new,
                "new_1pct_fraction": round(added["wall_s"] / full["wall_s"], 4) if done else None,
                "unchanged_fraction": round(same["wall_s"] / full["wall_s"], 4) if done else None,
                "removed_1pct_fraction": round(removed["wall_s"] / full["wall_s"], 4) if done else None}

    def memory(self) -> dict[str, Any]:
        """Peak memory of full runs at each size of ``scale.mem`` (the first size is one chunk
        of the memory corpus, each larger one the first chunks of it), growth per file between
        sizes, and the reruns at the second size."""
        sizes = self.scale.mem
        chunk = sizes[0]
        chunks = ensure_chunked(self.scratch / "corpora" / "mem", max(sizes), chunk, SEEDS["mem"])
        runs, reruns = {}, {}
        for i, n in enumerate(sizes):
            inp = chunks[0]
            if i > 0:
                inp = self.scratch / "runs" / f"mem_{n}_input"
                shutil.rmtree(inp, ignore_errors=True)
                for c in chunks[:n // chunk]:  # under base/: the reruns below add files beside it
                    link_tree(c, inp / "base" / c.name)
            # larger runs take longer: the time limit grows with the size past the second one
            timeout = self.scale.run_timeout_s * max(1.0, n / sizes[min(1, len(sizes) - 1)])
            r = run_pipeline(self.config, inp, self.scratch / "runs" / f"mem_{n}", "auto",
                             timeout=timeout, memory_mb=self.scale.run_memory_mb)
            r["peak_mb"] = max(r["peak_pss_tree_mb"], r["peak_rss_main_mb"])
            runs[str(n)] = r
            how = _unfinished(r) if r.get("timed_out") else f"{r['files_per_s']} files/s"
            self.log(f"[memory] {r['files']} files: peak {r['peak_mb']} MB (tree PSS "
                     f"{r['peak_pss_tree_mb']}, main RSS {r['peak_rss_main_mb']}), {how}")
            if i == 1:  # the reruns of the issue's users' corpus size, after its full run
                reruns = self._reruns(r, inp, self.scratch / "runs" / f"mem_{n}", n)
                reruns.pop("full")
        growth = [{"from": a, "to": b, "kb_per_file": _growth_kb(runs[str(a)], runs[str(b)])}
                  for a, b in zip(sizes, sizes[1:])]
        if len(sizes) > 2:
            growth.append({"from": sizes[0], "to": sizes[-1],
                           "kb_per_file": _growth_kb(runs[str(sizes[0])], runs[str(sizes[-1])])})
        # a run stopped at the time limit had not reached its peak: its figure is a lower bound
        large = runs[str(sizes[min(1, len(sizes) - 1)])]
        return {"runs": runs, "peak_mb_small": runs[str(sizes[0])]["peak_mb"],
                "peak_mb_large": large["peak_mb"], "large_timed_out": bool(large.get("timed_out")),
                "sizes": list(sizes), "kb_per_file": growth[0]["kb_per_file"] if growth else None,
                "growth": growth, "rerun_large": reruns}

    def cluster(self) -> dict[str, Any]:
        from .bench_cluster import cluster_section
        return cluster_section(self)

    def dedup(self) -> dict[str, Any]:
        try:
            from . import bench_dedup
        except ImportError:
            return {"skipped": "pipeline/tools/bench_dedup.py is not there"}
        settings = None if self.scale.dedup_settings else {}
        res = bench_dedup.run(sizes=self.scale.dedup_sizes, settings=settings)
        res["table"] = bench_dedup.format_table(res)
        return res


def _growth_kb(a: dict, b: dict) -> float | None:
    """Peak memory growth per file from run ``a`` to the larger run ``b`` (KB), or None."""
    if b["files"] <= a["files"]:
        return None
    return round((b["peak_mb"] - a["peak_mb"]) * 1024 / (b["files"] - a["files"]), 2)


def _unfinished(run: dict) -> str:
    """How a run that did not complete ended, in a phrase."""
    if run.get("failed"):
        return f"failed after {run['wall_s']:.0f} s: {run['failed']}"
    return f"stopped at the {run['wall_s']:.0f} s time limit before it finished"


def _times(run: dict, floor: dict) -> float | None:
    """The pipeline's wall time as a multiple of the decode-only floor (None if it timed out)."""
    if run.get("timed_out") or not floor["wall_s"]:
        return None
    return round(run["wall_s"] / floor["wall_s"], 2)


def _removed_rows(add: Callable[[str, Any], None], r: dict[str, Any]) -> None:
    """The table's rows of the rerun with the new files removed again (benches before it had none)."""
    if r.get("removed_1pct_fraction") is not None:
        add(f"  rerun with the {r['new_files']:,} new files removed again (s)", r["removed_1pct"]["wall_s"])
        add("  ... as a fraction of the full run", f"{100 * r['removed_1pct_fraction']:.1f}%")


def _num(v: Any) -> str:
    """A figure with sensible digits: 1,234.5 / 12.3 / 0.047."""
    if not isinstance(v, (int, float)) or isinstance(v, bool):
        return str(v)
    if abs(v) >= 10 or v == 0:
        return f"{v:,.1f}"
    return f"{v:.3g}"


def _ratio(a: float | None, b: float | None) -> float | None:
    return round(a / b, 1) if a and b else None


def _get(results: dict, dotted: str) -> Any:
    cur: Any = results
    for part in dotted.split("."):
        if not isinstance(cur, dict) or part not in cur:
            return None
        cur = cur[part]
    return cur


def check_targets(results: dict) -> list[dict[str, Any]]:
    """Each target: the measured value, met or not, and by how much it is missed."""
    rows = []
    for key, label, op, target in TARGETS:
        value = _get(results, key)
        if value is None:
            continue
        if key == "memory.peak_mb_large" and _get(results, "memory.large_timed_out"):
            over = value > target
            rows.append({"key": key, "label": label, "value": value, "target": f"{op} {target:g}",
                         "met": False if over else None,
                         "gap": (f"missed: at least {value / target:.1f}x over" if over else "unknown")
                         + " (the run did not finish; the figure is a lower bound)"})
            continue
        met = value >= target if op == ">=" else value <= target
        if met:
            gap = ""
        elif op == ">=":
            gap = f"missed: {target / value:.1f}x short" if value else "missed"
        else:
            gap = f"missed: {value / target:.1f}x over"
        rows.append({"key": key, "label": label, "value": value, "target": f"{op} {target:g}",
                     "met": met, "gap": gap})
    return rows


def machine() -> dict[str, Any]:
    """What the bench ran on."""
    cpu = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem_gb = None
    try:
        mem_gb = round(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30, 1)
    except (ValueError, OSError, AttributeError):
        pass
    import numpy
    return {"cpu": cpu, "cores": os.cpu_count(), "usable_cpus": usable_cpus(),
            "memory_gb": mem_gb, "os": platform.platform(),
            "python": platform.python_version(), "numpy": numpy.__version__,
            "load_average": list(os.getloadavg()) if hasattr(os, "getloadavg") else None}


# ---------------------------------------------------------------------------------------------
# the table

def format_table(results: dict, targets: list[dict], info: dict) -> str:
    """The one table (plus the dedup benchmark's own table when that section ran)."""
    rows: list[tuple[str, str]] = []

    def add(label: str, value: Any, unit: str = "") -> None:
        if value is not None:
            rows.append((label, _num(value) + unit))

    for cls, desc in (("small", "~5 KB class"), ("large", "~60 KB class")):
        r = results.get(cls)
        if not r:
            continue
        c = r["corpus"]
        rows.append((f"{desc}: {c['files']} files, mean {c['mean_bytes']:,} B, median {c['median_notes']} notes", ""))
        add("  pipeline, 1 worker (files/s)", r["files_per_s_1"])
        add(f"  pipeline, {r['workers_all']} workers (files/s)", r["files_per_s_all"])
        add("  decode-only, 1 process (files/s)", r["decode_1"]["files_per_s"])
        add(f"  decode-only, {r['workers_all']} processes (files/s)", r["decode_all"]["files_per_s"])
        if r.get("accelerated"):
            add("  decode-only, pure Python, 1 process (files/s)", r["decode_1_pure"]["files_per_s"])
        add("  pipeline / decode-only, 1 worker (x)", r["x_decode_1"])
        if r.get("accelerated"):
            add("  pipeline / pure-Python decode-only, 1 worker (x)", r.get("x_decode_pure_1"))
        add(f"  pipeline / decode-only, {r['workers_all']} workers (x)", r["x_decode_all"])
        if "run_imports_music21" in r:
            add("  music21 imported by a default run", "yes" if r["run_imports_music21"] else "no")
        add("  CPU per file: pipeline 1 worker / decode-only (ms)",
            f"{_num(r['pipeline_1'].get('cpu_ms_per_file'))} / {_num(r['decode_1'].get('cpu_ms_per_file'))}"
            f" = {_num(r['x_decode_cpu'])}x (CPU time is what a busy shared machine inflates least)")
        comp = r.get("component_ms") or {}
        if comp:
            rows.append((f"  per-file CPU by step, in one process ({r['component_files']} files, ms)",
                         ", ".join(f"{k} {v:.2f}" for k, v in comp.items())
                         + f"; sum {sum(comp.values()):.2f}"))
    p = results.get("peer")
    if p:
        for cls in ("small", "large"):
            if cls not in p:
                continue
            q = p[cls]
            rows.append((f"peer (mido + pretty_midi + music21 key + datasketch LSH), {cls} class, "
                         f"{q['files']} files", ""))
            add("  peer (files/s)", q["peer"]["files_per_s"])
            steps = q["peer"]["step_s"]
            tot = sum(steps.values()) or 1.0
            rows.append(("  peer time by step", ", ".join(f"{k} {100 * v / tot:.0f}%" for k, v in steps.items())))
            add("  ours on the same files, all workers (files/s)", q["ours_same_files_all"]["files_per_s"])
            add("  ours on the same files, 1 worker (files/s)", q["ours_same_files_1"]["files_per_s"])
            add("  speed-up, same files, all workers (x)", q["speedup_same_files_all"])
            add("  speed-up, same files, 1 worker (x)", q["speedup_same_files_1"])
            add("  speed-up, ours at class throughput (x)", q["speedup_vs_class_run"])
    r = results.get("rerun")
    if r:
        rows.append((f"reruns on {r['full']['files']} files (all workers)", ""))
        add("  full run (s)", r["full"]["wall_s"])
        add(f"  rerun with {r['new_files']} new files (s)", r["new_1pct"]["wall_s"])
        add("  ... as a fraction of the full run", f"{100 * r['new_1pct_fraction']:.1f}%")
        add("  rerun with nothing changed (s)", r["unchanged"]["wall_s"])
        add("  ... as a fraction of the full run", f"{100 * r['unchanged_fraction']:.1f}%")
        _removed_rows(add, r)
    m = results.get("memory")
    if m:
        rows.append(("peak memory of the full run (all workers; max of tree PSS and main RSS)", ""))
        for n, run in m["runs"].items():
            if run.get("timed_out"):
                add(f"  {int(n):,} files (MB)", f">= {_num(run['peak_mb'])} ({_unfinished(run)})")
                continue
            add(f"  {int(n):,} files (MB)", run["peak_mb"])
            add("    main process RSS / largest worker RSS (MB)",
                f"{run['peak_rss_main_mb']:,.0f} / {run['peak_rss_worker_mb']:,.0f}")
            add("    throughput (files/s)", run["files_per_s"])
        for g in m.get("growth") or [{"from": m["sizes"][0], "to": m["sizes"][-1],
                                       "kb_per_file": m["kb_per_file"]}]:
            add(f"  growth per file, {g['from']:,} -> {g['to']:,} files (KB)", g["kb_per_file"])
        rl = m.get("rerun_large") or {}
        if rl.get("new_1pct_fraction") is not None:
            full = m["runs"][str(m["sizes"][1])]
            rows.append((f"reruns on {full['files']:,} files (after the full run above, "
                         f"{full['wall_s']:,.1f} s)", ""))
            add(f"  rerun with {rl['new_files']:,} new files (s)", rl["new_1pct"]["wall_s"])
            add("  ... as a fraction of the full run", f"{100 * rl['new_1pct_fraction']:.1f}%")
            add("  rerun with nothing changed (s)", rl["unchanged"]["wall_s"])
            add("  ... as a fraction of the full run", f"{100 * rl['unchanged_fraction']:.1f}%")
            _removed_rows(add, rl)
    if results.get("cluster"):
        from .bench_cluster import table_rows
        rows.extend((a, "" if b is None else b if isinstance(b, str) else _num(b))
                    for a, b in table_rows(results["cluster"]))
    d = results.get("dedup")
    width = max([len(a) for a, _ in rows] + [40]) + 2
    lines = [f"midisift bench  {info['date']}  {info['machine']['cpu']} ({info['machine']['cores']} cores, "
             f"{info['machine']['memory_gb']} GB), Python {info['machine']['python']}"]
    lines += [f"{a:<{width}}{b}" if b else a for a, b in rows]
    if targets:
        lines.append("")
        lines.append("targets")
        for t in targets:
            vs = _num(t["value"])
            lines.append(f"  {t['label']:<62}{vs:>10}  {t['target']:<9} {'met' if t['met'] else t['gap']}")
    if d and d.get("table"):
        lines.append("")
        lines.append("dedup benchmark (pipeline/tools/bench_dedup.py)")
        lines.append(d["table"].strip("\n"))
    elif d and d.get("skipped"):
        lines.append(f"dedup: skipped ({d['skipped']})")
    return "\n".join(lines)


# ---------------------------------------------------------------------------------------------
# entry points

def byte_compile_package() -> str:
    """Write the package's bytecode (``__pycache__``) before anything is timed, as installing
    a package does, so every measured run starts as a user's run does. Without it, under
    ``PYTHONDONTWRITEBYTECODE=1`` (set on some machines) each measured process compiled every
    pipeline module again: about 55 ms of start-up on the 2-core bench machine."""
    import compileall
    package = Path(__file__).resolve().parents[1]  # pipeline/
    try:
        ok = compileall.compile_dir(str(package), quiet=1)
    except OSError:
        ok = False
    return "compiled" if ok else "not writable (runs compile the modules they import)"


def run_bench(sections: list[str] | tuple[str, ...], scale: Scale, scratch: Path,
              json_out: Path | None, log: Callable[[str], None] = print) -> dict[str, Any]:
    """Run the named sections in the canonical order; write ``json_out``; return everything."""
    unknown = [s for s in sections if s not in SECTIONS]
    if unknown:
        raise UsageError(f"unknown bench section(s) {', '.join(unknown)}; sections are {', '.join(SECTIONS)}")
    bytecode = byte_compile_package()
    bench = Bench(scratch, scale, log)
    info = {"date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()), "machine": machine(),
            "scale": asdict(scale), "sections": list(sections), "bytecode": bytecode}
    t0 = time.perf_counter()
    for name in SECTIONS:
        if name in sections:
            t = time.perf_counter()
            bench.results[name] = getattr(bench, name)()
            bench.results[name]["section_s"] = round(time.perf_counter() - t, 1)
    info["bench_s"] = round(time.perf_counter() - t0, 1)
    info["load_average_end"] = list(os.getloadavg()) if hasattr(os, "getloadavg") else None
    targets = check_targets(bench.results)
    table = format_table(bench.results, targets, info)
    doc = {"info": info, "results": bench.results, "targets": targets, "table": table}
    if json_out is not None:
        Path(json_out).write_text(json.dumps(doc, indent=1, default=str) + "\n")
    return doc


#: What the hand-written peer imports beyond midisift's own dependencies.
PEER_LIBRARIES = ("pretty_midi", "music21", "datasketch", "mido")


def _require_peer_libraries() -> None:
    """Fail before any work, with the install command, when the peer cannot be imported."""
    import importlib.util
    missing = [m for m in PEER_LIBRARIES if importlib.util.find_spec(m) is None]
    if missing:
        raise UsageError(f"the bench's 'peer' section needs {', '.join(missing)}, which is not "
                         "installed; install the test extra (pip install '.[test]' from the "
                         "source folder) or leave the section out with --only")


def parse_mem_sizes(text: str) -> tuple[int, ...]:
    """``--mem-sizes`` "10000,100000,300000" -> sizes, each a multiple of the first."""
    try:
        sizes = tuple(int(t.replace("_", "")) for t in text.split(","))
    except ValueError:
        raise UsageError(f"--mem-sizes {text!r}: expected comma-separated file counts, "
                         f"e.g. 10000,100000,300000") from None
    if len(sizes) < 2 or any(n <= 0 or n % sizes[0] for n in sizes) or list(sizes) != sorted(set(sizes)):
        raise UsageError(f"--mem-sizes {text!r}: give two or more increasing file counts, each a "
                         f"multiple of the first (the corpus is built in chunks of the first), "
                         f"e.g. 10000,100000,300000")
    return sizes


def scale_for(args: Any) -> Scale:
    """The bench's scale from its command line: ``--quick``, ``--mem-sizes``, ``--run-timeout``."""
    scale = SCALES["quick" if args.quick else "full"]
    if getattr(args, "mem_sizes", None):
        scale = replace(scale, mem=parse_mem_sizes(args.mem_sizes))
    if getattr(args, "run_timeout", None) is not None:
        if args.run_timeout <= 0:
            raise UsageError(f"--run-timeout {args.run_timeout}: give a positive number of seconds")
        scale = replace(scale, run_timeout_s=args.run_timeout)
    return scale


def main_bench(args: Any) -> int:
    """CLI entry (``midisift bench [--quick] [--out DIR] [--json FILE] [--only SECTION]``)."""
    scale = scale_for(args)
    sections = list(args.only) or list(SECTIONS)
    if "peer" in sections:
        _require_peer_libraries()
    doc = run_bench(sections, scale, Path(args.out), Path(args.json_out),
                    log=lambda s: print(s, file=sys.stderr, flush=True))
    print(doc["table"])
    return 0


def _peer_main(argv: list[str]) -> int:
    paths = [line for line in Path(argv[0]).read_text().splitlines() if line]
    Path(argv[1]).write_text(json.dumps(peer_run(paths)) + "\n")
    return 0


if __name__ == "__main__":  # internal: the peer runs in its own process
    if len(sys.argv) == 4 and sys.argv[1] == "--peer":
        raise SystemExit(_peer_main(sys.argv[2:]))
    raise SystemExit("usage: midisift bench ... (python -m pipeline.tools.bench is internal)")
