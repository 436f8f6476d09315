"""Shingles weighted by their information: a variant of the verification, measured, not used.

Issue 20 asks that generic material not link distinct pieces, "by document frequency or by
information". Dedup drops the shingles held by ``generic_share`` of the files; this module
measures the other way: every shingle weighs its inverse document frequency over the corpus,
``idf(s) = log(N / df(s))`` (Sparck Jones 1972; ``N`` files counted, ``df(s)`` of them holding
``s``, at least 1), and the verification's measures become weighted:

* weighted Jaccard ``w(A & B) / w(A | B)`` and weighted containment ``w(A & B) / w(S)`` with
  ``S`` the smaller set (by count), ``w`` the sum of the weights;
* everything else as in ``similarity.sets.set_similarity``: containment from the same size
  ratio (counts), the leads compared on their own from ``MIN_LEAD`` shingles and by containment
  from ``LEAD_CONTAINED``, the higher value counting; sets cut at ``cap`` compared on their
  common hash range; dedup still drops its generic shingles first.

``python -m pipeline.tools.idf_weight`` (with ``--chorales``, ``--real`` or ``--sizes``, as
``pipeline.tools.bench_dedup`` takes them) runs the benchmarks once with the verification as it is and once with ``weighted``: inside it
``links.pair_similarities`` (the one place dedup, the split and ``leakage`` compute a candidate
pair's value) and ``sets.set_similarity`` (the benchmarks' own per-pair figures) are replaced
by the weighted forms, and the MinHash bounds that drop candidates before the exact comparison
(``lsh.plausible_pairs``) keep every candidate, since a weighted value can lie above the
unweighted one those bounds estimate. The LSH banding is unchanged (unweighted), so pairs it
never proposes stay unseen.
"""
from __future__ import annotations

import argparse
import contextlib
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from ..analysis.shingles import ShingleSpec
from ..similarity.sets import LEAD_CONTAINED, MIN_LEAD, MIN_SIZE_RATIO, drop_generic, lead_part


class IdfTable:
    """Document frequencies of the shingles of ``sets`` (one sorted unique uint64 array per
    file): ``weights(x)`` gives ``log(N / df)`` for each shingle of ``x`` (``df`` at least 1:
    a shingle no counted file holds weighs as one held once)."""

    def __init__(self, sets: list[np.ndarray]):
        self.files = len(sets)
        allh = np.concatenate([np.asarray(x, dtype=np.uint64) for x in sets]) if sets else \
            np.zeros(0, dtype=np.uint64)
        allh.sort()
        if len(allh):
            start = np.flatnonzero(np.concatenate(([True], allh[1:] != allh[:-1])))
            count = np.diff(np.append(start, len(allh)))
            many = count > 1  # memory: shingles held once need no entry (df 1 is the default)
            self.values, self.counts = allh[start[many]], count[many]
        else:
            self.values, self.counts = allh, np.zeros(0, dtype=np.int64)

    def df(self, x: np.ndarray) -> np.ndarray:
        """The document frequency of each shingle of ``x`` (1 for those not in the table)."""
        x = np.asarray(x, dtype=np.uint64)
        out = np.ones(len(x), dtype=np.int64)
        if len(self.values) and len(x):
            pos = np.minimum(np.searchsorted(self.values, x), len(self.values) - 1)
            hit = self.values[pos] == x
            out[hit] = self.counts[pos[hit]]
        return out

    def weights(self, x: np.ndarray) -> np.ndarray:
        """``log(N / df)`` of each shingle of ``x`` (float64; 0 for a shingle every file holds)."""
        return np.log(max(self.files, 1) / self.df(x).astype(np.float64))


def weighted_measure(a: np.ndarray, b: np.ndarray, table: IdfTable, *,
                     min_size_ratio: float = MIN_SIZE_RATIO, cap: int = ShingleSpec().max_shingles,
                     min_contained: int = 0) -> float:
    """Weighted Jaccard, or weighted containment of the smaller set where ``set_similarity``
    would allow containment (counts), of two sorted unique shingle arrays."""
    if len(a) == 0 or len(b) == 0:
        return 0.0
    if len(a) >= cap or len(b) >= cap:  # the common hash range, as ``overlap_counts``
        limit = min(a[-1], b[-1])
        a, b = a[a <= limit], b[b <= limit]
    wa, wb = table.weights(a), table.weights(b)
    _, ia, _ = np.intersect1d(a, b, assume_unique=True, return_indices=True)
    inter = float(wa[ia].sum())
    sa, sb = float(wa.sum()), float(wb.sum())
    union = sa + sb - inter
    jac = inter / union if union > 0 else 0.0
    small, large = min(len(a), len(b)), max(len(a), len(b))
    if min_size_ratio < 1.0 and small >= min_size_ratio * large and small >= min_contained:
        ws = sa if len(a) <= len(b) else sb
        cont = inter / ws if ws > 0 else 0.0
        if cont > jac:
            return cont
    return jac


def weighted_similarity(a: np.ndarray, b: np.ndarray, table: IdfTable, *,
                        min_size_ratio: float = MIN_SIZE_RATIO, cap: int = ShingleSpec().max_shingles,
                        generic: np.ndarray | None = None) -> tuple[float, str]:
    """``set_similarity`` with idf weights: ``(value, measure)``, the whole sets and the leads
    (from ``MIN_LEAD`` shingles each), the higher counting."""
    a, b = drop_generic(a, generic), drop_generic(b, generic)
    best = weighted_measure(a, b, table, min_size_ratio=min_size_ratio, cap=cap)
    la, lb = lead_part(a), lead_part(b)
    if len(la) >= MIN_LEAD and len(lb) >= MIN_LEAD:
        lead = weighted_measure(la, lb, table, min_size_ratio=min_size_ratio, cap=cap,
                                min_contained=LEAD_CONTAINED)
        if lead > best:
            return lead, "weighted lead"
    return best, "weighted"


def weighted_pair_similarities(table: IdfTable, sets: list[np.ndarray], i: np.ndarray, j: np.ndarray, *,
                               min_size_ratio: float = MIN_SIZE_RATIO,
                               cap: int = ShingleSpec().max_shingles, compiled: bool = True,
                               leads: list[np.ndarray] | None = None) -> np.ndarray:
    """``sets.pair_similarities`` (the same arguments after ``table``) with idf weights, pair
    by pair (a measurement: plain numpy, no compiled kernel)."""
    return np.array([weighted_similarity(sets[x], sets[y], table, min_size_ratio=min_size_ratio, cap=cap)[0]
                     for x, y in zip(np.asarray(i).tolist(), np.asarray(j).tolist())], dtype=np.float64)


@contextlib.contextmanager
def weighted_verification(table: IdfTable) -> Iterator[None]:
    """Inside, dedup, the split's grouping and ``leakage`` verify candidate pairs with idf
    weights (``links.pair_similarities``), every LSH candidate is verified
    (``lsh.plausible_pairs`` keeps all), and ``sets.set_similarity`` is the weighted form."""
    from ..similarity import links, lsh, sets

    saved = links.pair_similarities, lsh.plausible_pairs, sets.set_similarity

    def keep_all(sig: np.ndarray, i: np.ndarray, j: np.ndarray, *args: Any, **kwargs: Any) -> np.ndarray:
        return np.ones(len(i), dtype=bool)

    def pair_values(held: list[np.ndarray], i: np.ndarray, j: np.ndarray, **kwargs: Any) -> np.ndarray:
        return weighted_pair_similarities(table, held, i, j, **kwargs)

    def set_similarity(a: np.ndarray, b: np.ndarray, **kwargs: Any) -> tuple[float, str]:
        return weighted_similarity(a, b, table, **kwargs)

    links.pair_similarities, lsh.plausible_pairs, sets.set_similarity = pair_values, keep_all, set_similarity
    try:
        yield
    finally:
        links.pair_similarities, lsh.plausible_pairs, sets.set_similarity = saved


def corpus_table(shingle_sets: dict[str, np.ndarray], sample: int | None = None) -> IdfTable:
    """The ``IdfTable`` of a corpus's sets (keyed by file id), counted, as dedup counts its
    generic shingles, on the first ``sample`` ids in order (``GENERIC_SAMPLE`` by default)."""
    from ..similarity.sets import GENERIC_SAMPLE
    keys = sorted(shingle_sets)[:GENERIC_SAMPLE if sample is None else sample]
    return IdfTable([shingle_sets[k] for k in keys])


def table_of_pieces(pieces: dict[str, Any], dedup_opts: dict | None = None) -> IdfTable:
    """The ``IdfTable`` of decoded pieces keyed by file id, their shingles made as dedup's
    ``prepare`` makes them (the split signs with the same options)."""
    from ..stages.base import FileContext
    from ..stages.dedup import Dedup
    stage = Dedup(dedup_opts or {})
    return corpus_table({k: np.asarray(stage.prepare(p, FileContext(p, k))["shingles"])
                         for k, p in pieces.items()})


def _timed(fn: Any, *args: Any, **kwargs: Any) -> tuple[Any, float]:
    import time
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - t0


def chorales_side_by_side(works: list[dict[str, Any]]) -> str:
    """``bench_identity.chorale_check`` with the verification as it is and with idf weights."""
    import hashlib

    from ..midi.decode import decode
    from .bench_identity import chorale_check, format_chorales
    from ..stages.base import FileContext
    from ..stages.dedup import Dedup
    stage = Dedup()
    pieces = {w["name"]: decode(w["midi"]) for w in works}
    shingles = {k: np.asarray(stage.prepare(p, FileContext(p, k))["shingles"]) for k, p in pieces.items()}
    table = corpus_table({hashlib.sha256(w["midi"]).hexdigest()[:16]: shingles[w["name"]] for w in works})
    plain, t_plain = _timed(chorale_check, works)
    with weighted_verification(table):
        weighted, t_weighted = _timed(chorale_check, works)
    lines = [f"verification as it is ({t_plain:.1f} s):", format_chorales(plain), "",
             f"idf-weighted verification ({table.files} files counted; {t_weighted:.1f} s):",
             format_chorales(weighted), ""]

    def pair(a: str, b: str) -> tuple[float, float]:
        return (sets.set_similarity(shingles[a], shingles[b])[0],
                weighted_similarity(shingles[a], shingles[b], table)[0])

    def values(a: str, b: str) -> str:
        shared = np.intersect1d(sets.lead_part(shingles[a]), sets.lead_part(shingles[b]))
        df = table.df(shared)
        held = f", held by {df.min()}-{df.max()} chorales" if len(df) else ""
        return (f"{a} ~ {b}: {pair(a, b)[0]:.3f} as it is, {pair(a, b)[1]:.3f} weighted; "
                f"{len(shared)} lead shingles shared{held}")

    from ..similarity import sets
    false = [(w["a"], w["b"]) for w in plain["different_tunes_linked"]]
    lines.append("pairs of different tunes linked as it is:")
    lines += [f"  {values(a, b)}" for a, b in false]
    kept = [pair(a, b) for a, b in plain["same_tune_linked_pairs"]]
    ratio = np.array([w / p for p, w in kept if p >= 0.2])
    lines.append(f"pairs of one tune linked as it is with a value of 0.2 or more: {len(ratio)}; weighted "
                 f"over as it is, 10th / 25th / 50th percentile: "
                 + " / ".join(f"{v:.3f}" for v in np.percentile(ratio, [10, 25, 50])))
    lost = sorted(set(plain["same_tune_linked_pairs"]) - set(weighted["same_tune_linked_pairs"]))
    lines.append(f"pairs of one tune linked as it is and not weighted: {len(lost)}")
    lines += [f"  {values(a, b)}" for a, b in lost]
    return "\n".join(lines)


def real_side_by_side(recs: list[dict], split_opts: dict | None = None) -> str:
    """``bench_identity.evaluate`` with the verification as it is and with idf weights."""
    from .bench_identity import evaluate, format_real
    table = table_of_pieces({r["id"]: r["piece"] for r in recs})
    plain = evaluate(recs, split_opts=split_opts)
    with weighted_verification(table):
        weighted = evaluate(recs, split_opts=split_opts)
    return (f"verification as it is:\n{format_real(plain)}\n\n"
            f"idf-weighted verification ({table.files} files counted):\n{format_real(weighted)}")


def synthetic_side_by_side(sizes: tuple[int, ...], work: str | None, seed: int = 0) -> str:
    """``bench_dedup`` at its defaults with the verification as it is and with idf weights, on
    the same decoded corpus of each size."""
    import tempfile
    from pathlib import Path

    from .bench_dedup import _same_corpus, format_table, load_corpus, run_ours, score
    from .synth import generate
    out = []
    with tempfile.TemporaryDirectory(prefix="midisift-bench-idf-") as tmp:
        for n in sizes:
            folder = Path(work or tmp) / f"corpus_{n}_seed{seed}"
            if not _same_corpus(folder, n, seed):
                generate(folder, n, seed=seed)
            recs, decode_s = load_corpus(folder)
            table = table_of_pieces({r["id"]: r["piece"] for r in recs})
            rows = {}
            for name in ("as it is", "idf-weighted"):
                ctx = weighted_verification(table) if name == "idf-weighted" else contextlib.nullcontext()
                with ctx:
                    clusters, times = run_ours(recs, {})
                row = {**score(recs, clusters), **times}
                total = row["prepare_s"] + row["corpus_s"]
                row.update(files_per_s=len(recs) / total, cost_vs_decode=total / decode_s,
                           prepare_ms_per_file=1000 * row["prepare_s"] / len(recs))
                rows[name] = row
            notes = np.array([len(r["piece"].notes) for r in recs])
            out.append(format_table({"sizes": [{
                "files": n, "decoded": len(recs), "median_notes": float(np.median(notes)),
                "decode_ms_per_file": 1000 * decode_s / len(recs), "rows": rows}]}))
    return "\n".join(out)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--chorales", default=None, metavar="CACHE",
                    help="music21's Bach chorales (rendered once, cached as JSON in CACHE)")
    ap.add_argument("--real", default=None, help="a real collection folder (with --labels)")
    ap.add_argument("--labels", default=None, help="labels.json of --real")
    ap.add_argument("--split-option", action="append", default=[], metavar="NAME=VALUE",
                    help="a split option for --real (VALUE read as YAML)")
    ap.add_argument("--sizes", default="1000", help="synthetic corpus sizes, comma-separated")
    ap.add_argument("--work", default=None, help="keep (and reuse) the generated corpora here")
    ap.add_argument("--seed", type=int, default=0)
    a = ap.parse_args(argv)
    if a.chorales:
        from .bench_identity import render_chorales
        print(chorales_side_by_side(render_chorales(Path(a.chorales))))
    elif a.real:
        from .bench_dedup import _options
        from .bench_identity import load_collection
        recs = load_collection(Path(a.real), Path(a.labels or Path(a.real) / "labels.json"))
        print(real_side_by_side(recs, _options(a.split_option) or None))
    else:
        print(synthetic_side_by_side(tuple(int(x) for x in a.sizes.split(",")), a.work, a.seed))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
