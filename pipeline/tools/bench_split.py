"""Split and removal benchmark with ground truth: leaks of planted near-duplicates, and drops.

Builds a corpus with ``pipeline.tools.synth.generate`` (planted copies and variants of pieces, with
``truth.json`` naming each planted file's ``cluster``) and runs the whole pipeline (``Runner``,
in this process) over it under several configs:

* ``dedup + split``: the default config;
* ``dedup t=0.95 + split``: dedup removing only the closest copies, so most planted variants
  reach the split (which reads dedup's signatures: same signature settings);
* ``dedup n=3 t=0.95 + split``: the same with dedup at other signature settings (the split
  signs the files itself);
* ``no dedup``: the default config without its dedup stage (the split signs files itself);
* ``no dedup, group_threshold null``: near-duplicate grouping turned off (what a random split
  of the same files does, for comparison).

For each it reports:

* ``planted pairs across parts``: pairs of kept files of one truth cluster (a piece and its
  planted copies and variants) sitting in different parts, out of all such kept pairs;
  ``groups across``: truth clusters (or labelled groups) with kept files in more than one part,
  out of those keeping two or more files;
* ``drops below threshold``: files dropped as ``near_duplicate`` whose own similarity to the
  kept file they name (``duplicate_of``), recomputed here from the two files (decoded again,
  signed with ``similarity.minhash.signature_of`` at the dedup stage's options, compared with
  ``similarity.sets.set_similarity``), is below the dedup threshold, or differs from the manifest's
  ``similarity``; the target is 0;
* ``clusters keeping several``: dedup clusters (connected components) that keep more than one
  file (single linkage would have dropped all but one, some only through other members);
* the run's seconds (one worker, an empty output folder, so nothing cached);
* ``prepare ms/file``: CPU milliseconds per file of ``Dedup.prepare`` and of ``Split.prepare``
  (what the split adds per file when it signs files itself), side by side on the same decoded
  files (the first 500 that decode, three rounds, the fastest kept).

``--corpus FOLDER`` measures a real collection instead: its ``labels.json`` gives each file's
group (``song``: the files of one song are the pairs that must share a part), e.g. the POP909
half in ../shared/data/pop909-dev (arrangements of one song by several arrangers).

Run: ``python -m pipeline.tools.bench_split --count 2000 --seed 0 --work /tmp/bench-split``.
"""
from __future__ import annotations

import argparse
import json
import shutil
import tempfile
import time
from collections import defaultdict
from itertools import combinations
from pathlib import Path
from typing import Any

import yaml

from .defaults import default_stages

def configs() -> dict[str, list[dict[str, Any]]]:
    """The configs measured, as stage lists: the default config's, changed as the name says."""
    default = default_stages()
    def with_dedup(opts: dict[str, Any]) -> list[dict[str, Any]]:
        return [({"dedup": opts} if "dedup" in s else s) for s in default]

    no_dedup = [s for s in default if "dedup" not in s]
    off = [({"split": {**s["split"], "group_threshold": None}} if "split" in s else s) for s in no_dedup]
    return {"dedup + split": default,
            "dedup t=0.95 + split": with_dedup({"threshold": 0.95}),
            "dedup n=3 t=0.95 + split": with_dedup({"ngram": 3, "threshold": 0.95}),
            "no dedup": no_dedup, "no dedup, group_threshold null": off}


def run_config(corpus: Path, out: Path, stages: list[dict[str, Any]], workers: int = 1) -> dict[str, Any]:
    """Run the pipeline over ``corpus`` into ``out`` (emptied first: a whole run, nothing
    cached); the manifest rows by source, the summary and the seconds."""
    from ..config import load_config
    from ..engine.runner import Runner
    shutil.rmtree(out, ignore_errors=True)  # a whole run: nothing cached from an earlier one
    out.mkdir(parents=True)
    cfg_path = out.parent / f"{out.name}.yaml"
    cfg_path.write_text(yaml.safe_dump({"input": str(corpus), "output": str(out), "workers": workers,
                                        "stages": stages}, sort_keys=False))
    t0 = time.perf_counter()
    report = Runner(load_config(cfg_path), fresh=True, quiet=True).run()
    seconds = time.perf_counter() - t0
    rows = {}
    for line in (out / "manifest.jsonl").read_text(encoding="utf-8").splitlines():
        r = json.loads(line)
        rows[r["source"]] = r
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    return {"rows": rows, "summary": summary, "seconds": seconds, "table": report.table()}


def load_groups(corpus: Path) -> dict[str, str | None]:
    """source -> group of a corpus: the truth ``cluster`` of a synth corpus (truth.json; None
    for a piece with no planted copy), else the ``song`` of a labelled collection
    (labels.json)."""
    if (corpus / "truth.json").is_file():
        files = json.loads((corpus / "truth.json").read_text())["files"]
        return {src: t.get("cluster") for src, t in files.items()}
    files = json.loads((corpus / "labels.json").read_text())["files"]
    return {src: str(t["song"]) for src, t in files.items()}


def planted_pairs(rows: dict[str, dict], groups: dict[str, str | None]) -> tuple[int, int, list]:
    """``(pairs across parts, kept pairs, examples)`` over pairs of kept files of one group.
    Byte-identical copies are one content (one id, always one part) and count once."""
    by_cluster = kept_parts(rows, groups)
    across, total, examples = 0, 0, []
    for cluster, parts in sorted(by_cluster.items()):
        for (a, pa), (b, pb) in combinations(sorted(parts.items()), 2):
            total += 1
            if pa != pb:
                across += 1
                if len(examples) < 10:
                    examples.append((cluster, a, pa, b, pb))
    return across, total, examples


def groups_across(rows: dict[str, dict], groups: dict[str, str | None]) -> tuple[int, int]:
    """``(groups with kept files in more than one part, groups keeping two or more files)``."""
    parts = kept_parts(rows, groups)
    several = [set(p.values()) for p in parts.values() if len(p) > 1]
    return sum(len(p) > 1 for p in several), len(several)


def kept_parts(rows: dict[str, dict], groups: dict[str, str | None]) -> dict[str, dict[str, str]]:
    """group -> {kept content id: its part}."""
    by_cluster: dict[str, dict[str, str]] = defaultdict(dict)
    for src, g in groups.items():
        r = rows.get(src)
        if g and r is not None and r.get("status") == "kept" and r.get("split"):
            by_cluster[g].setdefault(r["id"], r["split"])
    return by_cluster


def generic_of(out: Path) -> Any:
    """The generic shingles the run's dedup left out of its comparisons (its saved state)."""
    import numpy as np

    from ..store.ledger import Ledger
    with Ledger(out / "state.sqlite", read_only=True) as ledger:
        return np.array(ledger.state_for("dedup").get("generic", []), dtype=np.uint64)


def drops_below_threshold(corpus: Path, rows: dict[str, dict], dedup_opts: dict[str, Any],
                          generic: Any = None) -> tuple[int, int, list]:
    """``(bad drops, near_duplicate drops, examples)``: a drop is bad when its own similarity
    to the file it names, recomputed from the two files, is below the threshold or is not the
    manifest's ``similarity`` (to its 4 decimals)."""
    from ..similarity.sets import set_similarity
    from ..similarity.minhash import signature_of
    from ..midi.decode import decode
    from ..stages.dedup import Dedup
    opts = Dedup(dedup_opts).opts
    source_of = {r["id"]: src for src, r in rows.items()}
    signed: dict[str, Any] = {}

    def shingles(src: str) -> Any:
        if src not in signed:
            signed[src] = signature_of(decode((corpus / src).read_bytes(), source=src), opts)[1]
        return signed[src]

    bad, n, examples = 0, 0, []
    for src, r in sorted(rows.items()):
        if r.get("reason") != "near_duplicate":
            continue
        n += 1
        own, _ = set_similarity(shingles(src), shingles(source_of[r["duplicate_of"]]),
                                min_size_ratio=float(opts["min_size_ratio"]), generic=generic)
        if own < float(opts["threshold"]) or round(own, 4) != r["similarity"]:
            bad += 1
            if len(examples) < 10:
                examples.append((src, source_of[r["duplicate_of"]], own, r["similarity"]))
    return bad, n, examples


def clusters_keeping_several(rows: dict[str, dict]) -> tuple[int, int]:
    """``(clusters keeping two or more files, files dedup kept in them)`` by the manifest's
    ``cluster`` (set for every file that reached dedup; the kept ones are those not dropped
    there as duplicates)."""
    kept: dict[str, int] = defaultdict(int)
    for r in rows.values():
        if r.get("cluster") and r.get("reason") not in ("near_duplicate", "exact_duplicate"):
            kept[r["cluster"]] += 1
    several = [n for n in kept.values() if n > 1]
    return len(several), sum(several)


def prepare_costs(corpus: Path, limit: int = 500, rounds: int = 3) -> dict[str, float]:
    """CPU ms per file of dedup's and the split's ``prepare`` on the same decoded files."""
    from ..errors import DecodeError
    from ..midi.decode import decode
    from ..stages.base import FileContext
    from ..stages.dedup import Dedup
    from ..stages.split import Split
    pieces = []
    for path in sorted(corpus.rglob("*.mid")):
        if len(pieces) >= limit:
            break
        try:
            piece = decode(path.read_bytes(), source=str(path))
        except DecodeError:
            continue
        if len(piece.notes):
            pieces.append(piece)
    best: dict[str, float] = {}
    for _ in range(rounds):
        for name, stage in (("dedup.prepare", Dedup()), ("split.prepare", Split())):
            t = time.process_time()
            for piece in pieces:
                stage.prepare(piece, FileContext(piece))
            ms = 1000 * (time.process_time() - t) / max(1, len(pieces))
            best[name] = min(best.get(name, ms), ms)
    return {k: round(v, 4) for k, v in best.items()}


def run(count: int = 2000, seed: int = 0, work: str | Path | None = None, out: str | Path | None = None,
        planted: float | None = None, corpus: str | Path | None = None) -> dict[str, Any]:
    """Measure every config on one synth corpus (``planted``: the share of planted files,
    default the generator's mix), or on ``corpus`` (a labelled collection); write JSON to
    ``out`` when given."""
    from .synth import generate
    with tempfile.TemporaryDirectory(prefix="midisift-bench-split-") as tmp:
        base = Path(work) if work is not None else Path(tmp)
        labelled = corpus is not None
        if labelled:
            corpus = Path(corpus).resolve()
            tag = corpus.name
        else:
            tag = f"{count}_seed{seed}" + (f"_planted{planted}" if planted is not None else "")
            corpus = base / f"corpus_{tag}"
            if not (corpus / "truth.json").is_file():
                generate(corpus, count, seed=seed, planted=planted)
        truth = load_groups(corpus)
        result: dict[str, Any] = {"files": len(truth), "seed": seed, "planted": planted,
                                  "labelled": str(corpus) if labelled else None, "configs": {}}
        for name, stages in configs().items():
            slug = "".join(ch if ch.isalnum() else "_" for ch in name)
            res = run_config(corpus, base / f"out_{tag}_{slug}", stages)
            rows = res["rows"]
            across, total, examples = planted_pairs(rows, truth)
            g_across, g_several = groups_across(rows, truth)
            dedup_opts = next((s["dedup"] for s in stages if "dedup" in s), None)
            row: dict[str, Any] = {"planted_pairs_across": across, "planted_pairs_kept": total,
                                   "groups_across": g_across, "groups_keeping_several": g_several,
                                   "leak_examples": examples, "seconds": round(res["seconds"], 2),
                                   "kept": sum(r["status"] == "kept" for r in rows.values()),
                                   "grouping": res["summary"]["split"].get("stage", {}).get("near_duplicate_grouping"),
                                   "signatures": res["summary"]["split"].get("stage", {}).get("near_duplicate_signatures"),
                                   "table_says_off": "grouping OFF" in res["table"]}
            if dedup_opts is not None:
                bad, n, bad_examples = drops_below_threshold(corpus, rows, dedup_opts,
                                                             generic_of(base / f"out_{tag}_{slug}"))
                several, files = clusters_keeping_several(rows)
                row.update(near_drops=n, drops_below_threshold=bad, bad_drop_examples=bad_examples,
                           clusters_keeping_several=several, files_kept_in_them=files)
            result["configs"][name] = row
        result["prepare_ms_per_file"] = prepare_costs(corpus)
    if out:
        Path(out).write_text(json.dumps(result, indent=1) + "\n")
    return result


def format_table(result: dict[str, Any]) -> str:
    share = "the generator's mix" if result.get("planted") is None else f"{result['planted']:.0%}"
    head = (f"{result['files']} files of {result['labelled']} (pairs: files of one labelled group)"
            if result.get("labelled") else
            f"{result['files']} generated files (seed {result['seed']}, planted share: {share})")
    lines = [head,
             f"{'config':34} {'kept':>5} {'planted pairs across parts':>27} {'groups across':>13} {'near drops':>10} "
             f"{'below thr':>9} {'multi-kept clusters':>19} {'seconds':>7}  grouping"]
    for name, r in result["configs"].items():
        pairs = f"{r['planted_pairs_across']} of {r['planted_pairs_kept']}"
        drops = f"{r['near_drops']:>10} {r['drops_below_threshold']:>9}" if "near_drops" in r else f"{'-':>10} {'-':>9}"
        multi = f"{r['clusters_keeping_several']} ({r['files_kept_in_them']} files)" if "near_drops" in r else "-"
        grouping = (f"on ({r['signatures']} signatures)" if r["grouping"]
                    else "off" + (", the run's table says so" if r["table_says_off"] else ", NOT in the table"))
        groups = f"{r['groups_across']} of {r['groups_keeping_several']}"
        lines.append(f"{name:34} {r['kept']:>5} {pairs:>27} {groups:>13} {drops} {multi:>19} {r['seconds']:>7.1f}  {grouping}")
    costs = result.get("prepare_ms_per_file")
    if costs:
        lines.append("prepare, CPU ms per file: " + ", ".join(f"{k} {v:.3f}" for k, v in costs.items()))
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--count", type=int, default=2000, help="files in the generated corpus")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--work", default=None, help="keep (and reuse) the corpus and outputs here")
    ap.add_argument("--out", default=None, help="write the JSON result here")
    ap.add_argument("--planted", type=float, default=None,
                    help="share of planted files (default: the generator's mix, about a third)")
    ap.add_argument("--corpus", default=None,
                    help="a labelled collection (labels.json with a song per file) instead of a synth corpus")
    a = ap.parse_args(argv)
    print(format_table(run(a.count, a.seed, a.work, a.out, a.planted, a.corpus)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
