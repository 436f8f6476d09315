"""Ordered evidence of two lead lines: does their similarity rest on one melody in order?

A diagnostic for weak links (a pair whose similarity rests on the lead voices and lies near a
threshold), measured to decide whether the verification should check the leads by order as
well as by their bags of shingles (issue 20). For two leads (their tokens in time order, as
``pipeline.analysis.shingles.line_tokens`` makes them) it gives:

* ``shared``: distinct non-generic 4-token windows held by both (the lead shingles shared);
* ``chain``: the longest chain of shared windows in the same order in both leads (longest
  increasing subsequence over the matches, the "diagonal" matching of sequence comparison);
* ``run``: the longest run of identical tokens (longest common substring);
* ``local``: the Smith-Waterman local alignment score of the two token sequences (Smith and
  Waterman 1981; match +1, mismatch -1, linear gap -1);
* ``span``: the extent of that chain on the lead with fewer windows, a share of its windows;
  ``span_runs2`` the same with chain matches that stand alone on their diagonal left out;
* each relative to the shorter lead (tokens or windows).

``python -m pipeline.tools.bench_dedup --chorales CACHE --lead-order`` prints these figures for
the split's lead-based links of music21's chorales below ``WEAK_BELOW``; ``--real DIR --labels
FILE --lead-order`` for the lead-based same-melody pairs of a labelled collection.
"""
from __future__ import annotations

import bisect
from typing import Any

import numpy as np

from ..analysis.shingles import ShingleSpec, _grid, _pitched, for_piece, lead_voice, line_tokens, voice_stats

#: Links whose value is below this (and rests on the leads) count as weak: near the split's
#: 0.2 and dedup's 0.3 thresholds.
WEAK_BELOW = 0.3


def lead_tokens(piece: Any, spec: ShingleSpec = ShingleSpec()) -> np.ndarray:
    """The tokens of the piece's lead line in time order (``lead_voice`` chooses the voice the
    shingles mark as the lead; empty when there is none)."""
    spec = for_piece(piece, spec)
    start, pitch, track, channel = _pitched(piece, "start", "pitch", "track", "channel")
    q = _grid(start, int(piece.ticks_per_beat), 2 * spec.grid)
    voice = track.astype(np.int64) * 16 + channel
    lead = lead_voice(voice_stats(voice, q, pitch), spec, tuple(piece.track_names))
    if lead is None:
        return np.zeros(0, dtype=np.int64)
    mine = voice == lead
    return line_tokens(q[mine], pitch[mine], voice[mine], spec)[0]


def windows(tokens: np.ndarray, spec: ShingleSpec = ShingleSpec()) -> list[tuple[int, ...] | None]:
    """The ``ngram``-token windows in order; None for a generic one (fewer than
    ``min_distinct + 1`` distinct tokens, which makes no shingle)."""
    n = spec.ngram
    t = [int(x) for x in tokens]
    out: list[tuple[int, ...] | None] = []
    for k in range(len(t) - n + 1):
        w = tuple(t[k:k + n])
        out.append(w if len(set(w)) > min(spec.min_distinct, n - 2) else None)
    return out


def smith_waterman(a: list[int], b: list[int], match: int = 1, mismatch: int = -1,
                   gap: int = -1) -> int:
    """Best local alignment score of two sequences, linear gap penalty (Smith and Waterman
    1981)."""
    best = 0
    prev = [0] * (len(b) + 1)
    for x in a:
        cur = [0] * (len(b) + 1)
        for j, y in enumerate(b):
            v = max(0, prev[j] + (match if x == y else mismatch), prev[j + 1] + gap, cur[j] + gap)
            cur[j + 1] = v
            best = max(best, v)
        prev = cur
    return best


def longest_common_run(a: list[int], b: list[int]) -> int:
    """Length of the longest common substring of two sequences."""
    best = 0
    prev = [0] * (len(b) + 1)
    for x in a:
        cur = [0] * (len(b) + 1)
        for j, y in enumerate(b):
            if x == y:
                cur[j + 1] = prev[j] + 1
                best = max(best, cur[j + 1])
        prev = cur
    return best


def ordered_chain(wa: list, wb: list) -> list[tuple[int, int]]:
    """The longest chain of window matches ``(i, j)`` (``wa[i] == wb[j]``, neither generic)
    increasing in both ``i`` and ``j`` (longest increasing subsequence, patience sorting)."""
    at: dict[tuple, list[int]] = {}
    for j, w in enumerate(wb):
        if w is not None:
            at.setdefault(w, []).append(j)
    # within one i, larger j first, so one i is used at most once in the chain
    pairs = [(i, j) for i, w in enumerate(wa) if w is not None for j in reversed(at.get(w, ()))]
    tails: list[int] = []
    tail_at: list[int] = []
    back = [-1] * len(pairs)
    for k, (_, j) in enumerate(pairs):
        p = bisect.bisect_left(tails, j)
        back[k] = tail_at[p - 1] if p else -1
        if p == len(tails):
            tails.append(j)
            tail_at.append(k)
        else:
            tails[p] = j
            tail_at[p] = k
    chain = []
    k = tail_at[-1] if tail_at else -1
    while k >= 0:
        chain.append(pairs[k])
        k = back[k]
    return chain[::-1]


def order_figures(ta: np.ndarray, tb: np.ndarray, spec: ShingleSpec = ShingleSpec()
                  ) -> dict[str, float]:
    """The ordered evidence of two leads (module docstring), raw and relative to the shorter
    lead."""
    wa, wb = windows(ta, spec), windows(tb, spec)
    if len(wa) > len(wb):
        wa, wb, ta, tb = wb, wa, tb, ta
    a, b = [int(x) for x in ta], [int(x) for x in tb]
    shared = len({w for w in wa if w is not None} & {w for w in wb if w is not None})
    chain = ordered_chain(wa, wb)
    on = set(chain)
    # a lone match: no chain neighbour on its diagonal (one shared window, not a run)
    kept = [(i, j) for i, j in chain if (i - 1, j - 1) in on or (i + 1, j + 1) in on]
    short_tokens, short_windows = max(1, min(len(a), len(b))), max(1, len(wa))
    run, local = longest_common_run(a, b), smith_waterman(a, b)
    return {"shared": shared, "chain": len(chain), "run": run, "local": local,
            "windows": len(wa), "tokens": min(len(a), len(b)),
            "chain_share": len(chain) / short_windows, "run_share": run / short_tokens,
            "local_share": local / short_tokens,
            "span": (chain[-1][0] - chain[0][0] + 1) / short_windows if chain else 0.0,
            "span_runs2": (kept[-1][0] - kept[0][0] + 1) / short_windows if kept else 0.0}


#: The figures compared between pairs of one tune and pairs of different tunes.
MEASURES = ("chain", "chain_share", "run_share", "local_share", "span", "span_runs2")


def separation(good: list[dict[str, float]], bad: list[dict[str, float]]) -> dict[str, dict]:
    """Per measure: the highest value among ``bad`` pairs (which a rule must cut), and how many
    ``good`` pairs lie at or below it (lost by any cut that removes every bad pair)."""
    out = {}
    for m in MEASURES:
        top = max((p[m] for p in bad), default=float("-inf"))
        vals = sorted(p[m] for p in good)
        out[m] = {"bad_max": top, "good_lowest": vals[:5],
                  "good_lost": sum(1 for v in vals if v <= top), "good": len(vals)}
    return out


def format_separation(title: str, sep: dict[str, dict], bad: list[dict[str, Any]],
                      misses: list[dict[str, Any]] = ()) -> str:
    lines = [title]
    lines += [f"  {kind}: {p['a']} ~ {p['b']} at {p['similarity']:.3f}: "
              + ", ".join(f"{m} {p[m]:.2f}" for m in MEASURES)
              for kind, group in (("different", bad), ("different, below the threshold", misses))
              for p in group]
    for m, s in sep.items():
        lines.append(f"  {m}: different tunes up to {s['bad_max']:.2f}; one tune lowest "
                     f"{', '.join(f'{v:.2f}' for v in s['good_lowest'])}; a cut removing every "
                     f"different pair loses {s['good_lost']} of {s['good']}")
    return "\n".join(lines)


def _lead_based(a: np.ndarray, b: np.ndarray) -> tuple[float, bool]:
    """The pair's similarity and whether it rests on the leads (``set_similarity``)."""
    from ..similarity.sets import set_similarity
    value, measure = set_similarity(a, b)
    return value, measure.startswith("lead")


def chorale_lead_order(works: list[dict[str, Any]], group_threshold: float = 0.2,
                       below: float = WEAK_BELOW, near: float = 0.05) -> dict[str, Any]:
    """The split's links at ``group_threshold`` among music21's chorales (``render_chorales``)
    that rest on the leads and lie below ``below``: figures of the pairs of one tune and of
    different tunes (soprano similarity as in ``bench_identity.chorale_check``); pairs of
    different tunes up to ``near`` below the threshold are listed too (``near_misses``: what a
    rule must also hold off, one note away)."""
    from ..midi.decode import decode
    from ..similarity.grouping import near_links
    from ..similarity.minhash import signature_of
    from .bench_identity import OTHER_TUNE, SAME_TUNE, melody_similarity, soprano_beats
    recs = {}
    for w in works:
        piece = decode(w["midi"])
        sig, sh, _ = signature_of(piece)
        recs[w["name"]] = {"piece": piece, "sig": sig, "sh": sh, "soprano": soprano_beats(piece)}
    links = near_links({k: r["sig"] for k, r in recs.items()}, group_threshold - near,
                       {k: r["sh"] for k, r in recs.items()})
    good, bad, misses = [], [], []
    for a, b, _ in links:
        ra, rb = recs[a], recs[b]
        if not ra["soprano"] or not rb["soprano"]:
            continue
        value, lead = _lead_based(ra["sh"], rb["sh"])
        if not lead or value >= below:
            continue
        ms = melody_similarity(ra["soprano"], rb["soprano"])
        if OTHER_TUNE <= ms < SAME_TUNE or (ms >= SAME_TUNE and value < group_threshold):
            continue
        fig = {"a": a, "b": b, "similarity": value,
               **order_figures(lead_tokens(ra["piece"]), lead_tokens(rb["piece"]))}
        (good if ms >= SAME_TUNE else bad if value >= group_threshold else misses).append(fig)
    return {"good": good, "bad": bad, "near_misses": misses, "separation": separation(good, bad),
            "below": below, "links": sum(1 for x in links if x[2] >= group_threshold)}


def real_lead_order(recs: list[dict], below: float = 0.4, counts: dict[str, int] | None = None
                    ) -> list[dict[str, Any]]:
    """Figures of the same-melody pairs of one song (``bench_identity.load_collection``
    records) whose similarity rests on the leads and lies below ``below`` (``counts`` as in
    ``weak_lead_pairs``)."""
    from .bench_identity import SAME_MELODY, melody_intervals, melody_similarity
    for r in recs:
        r.setdefault("_melody", melody_intervals(r["piece"]))
    return weak_lead_pairs(recs, lambda r: r["song"], below, lambda x, y: melody_similarity(
        x["_melody"], y["_melody"]) >= SAME_MELODY, counts)


def weak_lead_pairs(recs: list[dict], group_of: Any, below: float, keep: Any = None,
                    counts: dict[str, int] | None = None) -> list[dict[str, Any]]:
    """Figures of the pairs of records of one group (``group_of(rec)``, None for none) that
    ``keep(x, y)`` accepts (default all) and whose similarity rests on the leads and lies below
    ``below``. ``counts``, when given, receives the pairs compared (``pairs``) and those
    resting on the leads (``on_leads``)."""
    from collections import defaultdict
    from itertools import combinations
    from ..similarity.minhash import signature_of
    by_group: dict[Any, list[dict]] = defaultdict(list)
    for r in recs:
        if group_of(r) is not None:
            by_group[group_of(r)].append(r)
    out = []
    for rs in by_group.values():
        for x, y in combinations(rs, 2):
            if keep is not None and not keep(x, y):
                continue
            for r in (x, y):
                if "_shingles" not in r:
                    r["_shingles"] = signature_of(r["piece"])[1]
            value, lead = _lead_based(x["_shingles"], y["_shingles"])
            if counts is not None:
                counts["pairs"] = counts.get("pairs", 0) + 1
                counts["on_leads"] = counts.get("on_leads", 0) + lead
            if lead and value < below:
                out.append({"a": x["rel"], "b": y["rel"], "similarity": value,
                            **order_figures(lead_tokens(x["piece"]), lead_tokens(y["piece"]))})
    return out
