"""Dedup benchmark with ground truth: precision/recall per planted variant kind, and cost.

``--real DIR --labels FILE`` and ``--chorales CACHE`` run the real-collection and chorale
checks of ``pipeline.tools.bench_identity`` instead (``python -m pipeline.tools.idf_weight``
runs them, or the synthetic corpora, with the verification as it is and with idf-weighted
shingles).

Builds corpora with ``pipeline.tools.synth.generate`` (every planted variant kind, style families of
distinct pieces sharing key, meter and chord progression), decodes them with
``pipeline.midi.decode.decode`` and runs, side by side on the same decoded pieces:

* **ours**: the ``dedup`` stage (``prepare`` per file, then ``run_corpus``) at its defaults,
  plus the same stage at the other settings given in ``SETTINGS`` (how the defaults were chosen);
* **peer**: the obvious hand-written approach: datasketch ``MinHash`` over absolute-pitch
  4-grams of the note sequence, ``MinHashLSH`` at threshold 0.8, links at estimated Jaccard
  >= 0.8, connected components.

Pairs: a true pair is two files of one truth ``cluster``; a predicted pair is two files in one
predicted cluster. Recall per kind counts each planted copy's pair with its original piece's
other files; ``family_false_pairs`` counts predicted pairs of distinct pieces of one style
family. Times are per corpus, measured in this process one after another (ratios are what
transfers between machines).
"""
from __future__ import annotations

import argparse
import json
import tempfile
import time
from collections import Counter, defaultdict
from itertools import combinations
from pathlib import Path
from typing import Any

import numpy as np

from ..similarity.links import UnionFind
from ..stages.base import CorpusState, FileContext, Member
from ..stages.dedup import Dedup

#: Extra settings measured beside the defaults (name -> dedup options).
SETTINGS: dict[str, dict[str, Any]] = {
    "ours t=0.40": {"threshold": 0.4},
    "ours t=0.60": {"threshold": 0.6},
    "ours t=0.80": {"threshold": 0.8},
    "ours n=3": {"ngram": 3},
    "ours n=5": {"ngram": 5},
    "ours 128/32 (r=4)": {"bands": 32},
    "ours 64/32 (r=2)": {"num_perm": 64, "bands": 32},
}
#: Planted filter cases of synth (skipped: several are note-identical scales, so exact
#: duplicates of each other although the truth gives them no cluster).
FILTER_KINDS = ("no_notes", "drums_only", "too_short", "too_long", "too_few_notes")
KINDS = ("exact_copy", "same_content", "transposed", "tempo", "reorchestrated", "requantized",
         "edited", "excerpt")


def load_corpus(folder: Path) -> tuple[list[dict], float]:
    """Decode every file the truth marks as valid; returns records and the decode seconds."""
    from ..midi.decode import decode
    from ..errors import DecodeError
    truth = json.loads((folder / "truth.json").read_text())["files"]
    recs = []
    spent = 0.0
    import hashlib
    for rel, t in sorted(truth.items()):
        if t["stage"] == "validate" or t["variant"] in FILTER_KINDS:
            continue  # planted filter cases are not music (synth repeats one scale for them)
        data = (folder / rel).read_bytes()
        t0 = time.perf_counter()
        try:
            piece = decode(data, source=rel)
        except DecodeError:
            continue
        spent += time.perf_counter() - t0
        if not len(piece.notes):
            continue
        sha = hashlib.sha256(data).hexdigest()
        recs.append({"rel": rel, "sha256": sha, "piece": piece, "truth": t})
    # byte-identical files share an id prefix; disambiguate like a runner keyed by path would
    seen: Counter = Counter()
    for r in recs:
        base = r["sha256"][:16]
        r["id"] = base if not seen[base] else f"{base}.{seen[base]}"
        seen[base] += 1
    return recs, spent


def run_ours(recs: list[dict], opts: dict[str, Any]) -> tuple[dict[str, str], dict[str, float]]:
    stage = Dedup(opts)
    t0 = time.perf_counter()
    members = []
    for r in recs:
        art = stage.prepare(r["piece"], FileContext(r["piece"], r["rel"], r["sha256"]))
        members.append(Member(r["id"], r["sha256"], r["rel"], {}, {"dedup": art}))
    t1 = time.perf_counter()
    res = stage.run_corpus(members, CorpusState())
    t2 = time.perf_counter()
    return {k: v.values["cluster"] for k, v in res.items()}, {"prepare_s": t1 - t0, "corpus_s": t2 - t1}


def run_peer(recs: list[dict], threshold: float = 0.8, num_perm: int = 128
             ) -> tuple[dict[str, str], dict[str, float]]:
    """Absolute-pitch 4-grams of the note sequence, datasketch MinHash + MinHashLSH at 0.8."""
    from datasketch import MinHash, MinHashLSH
    t0 = time.perf_counter()
    sigs = {}
    for r in recs:
        p = r["piece"].notes["pitch"].astype(np.int64)
        grams = [bytes(p[i:i + 4].astype(np.uint8)) for i in range(max(1, len(p) - 3))]
        m = MinHash(num_perm=num_perm)
        m.update_batch(grams)
        sigs[r["id"]] = m
    t1 = time.perf_counter()
    lsh = MinHashLSH(threshold=threshold, num_perm=num_perm)
    for k, m in sigs.items():
        lsh.insert(k, m)
    uf = UnionFind(sigs)
    for k, m in sigs.items():
        for other in lsh.query(m):
            if other != k and m.jaccard(sigs[other]) >= threshold:
                uf.union(k, other)
    t2 = time.perf_counter()
    return {k: uf.find(k) for k in sigs}, {"prepare_s": t1 - t0, "corpus_s": t2 - t1}


def score(recs: list[dict], cluster: dict[str, str]) -> dict[str, Any]:
    """Pair precision/recall overall and per planted kind, plus family false pairs."""
    by_truth: dict[str, list[dict]] = defaultdict(list)
    for r in recs:
        if r["truth"].get("cluster"):
            by_truth[r["truth"]["cluster"]].append(r)
    true_pairs = set()
    kind_hits: Counter = Counter()
    kind_total: Counter = Counter()
    for members in by_truth.values():
        for a, b in combinations(members, 2):
            true_pairs.add(frozenset((a["id"], b["id"])))
        for r in members:
            kind = r["truth"]["variant"]
            if kind == "original":
                continue
            for o in members:
                if o is r or o["truth"]["variant"] not in ("original", "exact_copy", "same_content"):
                    continue
                kind_total[kind] += 1
                kind_hits[kind] += cluster[r["id"]] == cluster[o["id"]]
    groups: dict[str, list[str]] = defaultdict(list)
    for r in recs:
        groups[cluster[r["id"]]].append(r["id"])
    pred_pairs = set()
    for g in groups.values():
        if len(g) > 1:
            pred_pairs.update(frozenset(p) for p in combinations(g, 2))
    info = {r["id"]: r["truth"] for r in recs}
    fam_false = sum(1 for p in pred_pairs if p not in true_pairs
                    and len({info[i].get("family") for i in p} - {None}) == 1
                    and len({info[i].get("piece") for i in p}) == 2)
    tp = len(pred_pairs & true_pairs)
    return {"precision": tp / len(pred_pairs) if pred_pairs else 1.0,
            "recall": tp / len(true_pairs) if true_pairs else 1.0,
            "true_pairs": len(true_pairs), "predicted_pairs": len(pred_pairs),
            "family_false_pairs": fam_false,
            "recall_by_kind": {k: kind_hits[k] / kind_total[k] for k in KINDS if kind_total[k]}}


def _same_corpus(folder: Path, n: int, seed: int) -> bool:
    """True when ``folder`` already holds the synth corpus of this size and seed (reuse it)."""
    from .synth import VERSION
    try:
        gen = json.loads((folder / "truth.json").read_text())["generator"]
    except (OSError, ValueError, KeyError):
        return False
    return gen.get("seed") == seed and gen.get("version") == VERSION and gen.get("profile") == "small" \
        and gen.get("count") == n and "mix" not in gen


def bench_size(n: int, work: Path, seed: int = 0, settings: dict[str, dict] | None = None) -> dict:
    from .synth import generate
    folder = work / f"corpus_{n}_seed{seed}"
    t0 = time.perf_counter()
    if not _same_corpus(folder, n, seed):
        generate(folder, n, seed=seed)
    gen_s = time.perf_counter() - t0
    recs, decode_s = load_corpus(folder)
    rows = {}
    for name, opts in {"ours (defaults)": {}, **(settings or {})}.items():
        clusters, times = run_ours(recs, opts)
        rows[name] = {**score(recs, clusters), **times}
    clusters, times = run_peer(recs)
    rows["peer: abs-pitch 4-grams @0.8"] = {**score(recs, clusters), **times}
    for row in rows.values():
        total = row["prepare_s"] + row["corpus_s"]
        row["files_per_s"] = len(recs) / total if total else float("inf")
        row["cost_vs_decode"] = total / decode_s if decode_s else float("nan")
        row["prepare_ms_per_file"] = 1000 * row["prepare_s"] / len(recs)
    notes = np.array([len(r["piece"].notes) for r in recs])
    return {"files": n, "decoded": len(recs), "generate_s": gen_s, "decode_s": decode_s,
            "decode_ms_per_file": 1000 * decode_s / len(recs), "median_notes": float(np.median(notes)),
            "rows": rows}


def run(sizes: tuple[int, ...] = (1000, 20000), out: str | Path | None = None, seed: int = 0,
        settings: dict[str, dict] | None = None, work: str | Path | None = None) -> dict:
    """Benchmark every size; write JSON to ``out`` (a file path) when given; return the dict.

    ``work``: a folder to keep the generated corpora in (reused by later runs); default a
    temporary folder removed afterwards."""
    settings = SETTINGS if settings is None else settings
    if work is not None:
        Path(work).mkdir(parents=True, exist_ok=True)
        result = {"sizes": [bench_size(n, Path(work), seed, settings) for n in sizes]}
    else:
        with tempfile.TemporaryDirectory(prefix="midisift-bench-dedup-") as tmp:
            result = {"sizes": [bench_size(n, Path(tmp), seed, settings) for n in sizes]}
    if out:
        Path(out).write_text(json.dumps(result, indent=1) + "\n")
    return result


def format_table(result: dict) -> str:
    lines = []
    for s in result["sizes"]:
        lines.append(f"\n{s['files']} files ({s['decoded']} decoded, median {s['median_notes']:.0f} notes; "
                     f"decode {s['decode_ms_per_file']:.3f} ms/file)")
        head = f"{'method':30} {'prec':>6} {'recall':>6} " + " ".join(f"{k[:8]:>8}" for k in KINDS) \
            + f" {'famFP':>5} {'ms/file':>7} {'files/s':>8} {'vs dec':>6}"
        lines.append(head)
        for name, r in s["rows"].items():
            kinds = " ".join(f"{r['recall_by_kind'].get(k, float('nan')):8.3f}" for k in KINDS)
            lines.append(f"{name:30} {r['precision']:6.3f} {r['recall']:6.3f} {kinds} "
                         f"{r['family_false_pairs']:5d} {r['prepare_ms_per_file']:7.3f} "
                         f"{r['files_per_s']:8.0f} {r['cost_vs_decode']:6.2f}")
    return "\n".join(lines)


def _options(pairs: list[str]) -> dict:
    """NAME=VALUE pairs as an option dict (values read as YAML: 1, true, [a, b])."""
    import yaml
    out = {}
    for pair in pairs:
        name, sep, value = pair.partition("=")
        if not sep:
            raise SystemExit(f"--split-option {pair!r}: expected NAME=VALUE, e.g. group_by_folder=1")
        out[name.strip()] = yaml.safe_load(value)
    return out


def _print_weak(what: str, counts: dict[str, int], below: float, weak: list[dict]) -> None:
    """The ``--lead-order`` report: how many pairs rest on the leads, and each weak one with
    its ordered-evidence measures."""
    from .lead_order import MEASURES
    print(f"{what} {counts.get('pairs', 0)}, resting on the leads {counts.get('on_leads', 0)}, "
          f"of those below {below}: {len(weak)}")
    for p in weak:
        print(f"  {p['a']} ~ {p['b']} at {p['similarity']:.3f}: "
              + ", ".join(f"{m} {p[m]:.2f}" for m in MEASURES))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="1000,20000", help="comma-separated corpus sizes")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--out", default=None, help="write the JSON result here")
    ap.add_argument("--work", default=None, help="keep (and reuse) the generated corpora here")
    ap.add_argument("--defaults-only", action="store_true", help="skip the extra settings")
    ap.add_argument("--real", default=None, help="a real collection folder (with --labels): "
                    "songs across parts, kept same-melody files, cross-song links, files/s")
    ap.add_argument("--labels", default=None, help="labels.json of --real ({files: {path: {song}}})")
    ap.add_argument("--split-option", action="append", default=[], metavar="NAME=VALUE",
                    help="a split option for --real (VALUE read as YAML), e.g. group_by_folder=1")
    ap.add_argument("--chorales", default=None, metavar="CACHE",
                    help="music21's Bach chorales (rendered once, cached as JSON in CACHE): same "
                    "tune linked, different tunes never")
    ap.add_argument("--lead-order", action="store_true",
                    help="with --chorales, --real or --sizes: ordered evidence (chain, run, local "
                    "alignment) of the weak links resting on the leads (pipeline.tools.lead_order)")
    ap.add_argument("--split-recall", action="store_true",
                    help="with --chorales or --real: the split's LSH search against every pair "
                    "verified (recall, missed links, groups left apart; pipeline.tools.split_recall)")
    ap.add_argument("--weak-below", type=float, default=None,
                    help="with --lead-order: links below this count as weak (chorales 0.3, real 0.4)")
    a = ap.parse_args(argv)
    if a.chorales:
        from .bench_identity import chorale_check, format_chorales, render_chorales
        if a.lead_order:
            from .lead_order import chorale_lead_order, format_separation
            res = chorale_lead_order(render_chorales(Path(a.chorales)), below=a.weak_below or 0.3)
            print(format_separation(f"chorales: the split's {res['links']} links; those on the "
                                    f"leads below {res['below']}: {len(res['good'])} of one tune, "
                                    f"{len(res['bad'])} of different tunes", res["separation"], res["bad"],
                                    res["near_misses"]))
            return 0
        if a.split_recall:
            from .split_recall import format_recall, split_recall_of
            works = render_chorales(Path(a.chorales))
            print(format_recall("chorales", split_recall_of({w["name"]: w["midi"] for w in works})))
            return 0
        print(format_chorales(chorale_check(render_chorales(Path(a.chorales)))))
        return 0
    if a.real:
        from .bench_identity import evaluate, format_real, load_collection
        recs = load_collection(Path(a.real), Path(a.labels or Path(a.real) / "labels.json"))
        if a.split_recall:
            from .split_recall import format_recall, split_recall_of
            song = {r["rel"]: r["song"] for r in recs}
            res = split_recall_of({r["rel"]: (Path(a.real) / r["rel"]).read_bytes() for r in recs},
                                  _options(a.split_option) or None, label_of=song.__getitem__)
            print(format_recall(Path(a.real).name, res))
            return 0
        if a.lead_order:
            from .lead_order import real_lead_order
            counts: dict[str, int] = {}
            weak = real_lead_order(recs, below=a.weak_below or 0.4, counts=counts)
            _print_weak("same-melody pairs of one song:", counts, a.weak_below or 0.4, weak)
            return 0
        res = evaluate(recs, split_opts=_options(a.split_option) or None)
        if a.out:
            Path(a.out).write_text(json.dumps(res, indent=1, default=str) + "\n")
        print(format_real(res))
        return 0
    if a.lead_order:
        from .lead_order import weak_lead_pairs
        from .synth import generate
        below = a.weak_below or 0.4
        with tempfile.TemporaryDirectory(prefix="midisift-bench-dedup-") as tmp:
            for n in (int(x) for x in a.sizes.split(",")):
                folder = Path(a.work or tmp) / f"corpus_{n}_seed{a.seed}"
                if not _same_corpus(folder, n, a.seed):
                    generate(folder, n, seed=a.seed)
                counts: dict[str, int] = {}
                weak = weak_lead_pairs(load_corpus(folder)[0], lambda r: r["truth"].get("cluster"),
                                       below, counts=counts)
                _print_weak(f"{n} files: planted pairs", counts, below, weak)
        return 0
    res = run(tuple(int(x) for x in a.sizes.split(",")), a.out, a.seed,
              {} if a.defaults_only else None, a.work)
    print(format_table(res))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
