"""Exact measures of two shingle sets, the verification of a candidate pair: Jaccard, or
containment of the smaller set from ``MIN_SIZE_RATIO`` of the larger's size, of the whole sets
and of the lead voices, the higher counting; generic shingles (held by many files of the corpus,
``generic_shingles``) left out.
"""
from __future__ import annotations

import numpy as np

from ..analysis.shingles import LEAD_LIMIT, ShingleSpec
from ..midi.accel import kernel as compiled_kernel


#: Containment (intersection over the smaller set) counts when the smaller set has at least
#: this share of the larger one's size: low enough that a melody-only or chords-only file is
#: found inside its full arrangement (a subset of the voices), not so low that a short figure
#: is "contained" in every long piece (files below ``min_shingles`` are never compared).
MIN_SIZE_RATIO = 0.1


def overlap_counts(a: np.ndarray, b: np.ndarray, cap: int = ShingleSpec().max_shingles
                   ) -> tuple[int, int, int]:
    """``(intersection, len a, len b)`` of two sorted unique shingle arrays, both first cut to
    their common hash range when either holds ``cap`` or more values (a set cut at ``cap``
    keeps its smallest hashes: the common range is a consistent sample of both). The numpy
    formulation is the specification; ``_smf_accel.overlap_counts`` does many pairs at once."""
    if len(a) and len(b) and (len(a) >= cap or len(b) >= cap):
        limit = min(a[-1], b[-1])
        a, b = a[a <= limit], b[b <= limit]
    return len(np.intersect1d(a, b, assume_unique=True)), len(a), len(b)


def set_similarity(a: np.ndarray, b: np.ndarray, *, min_size_ratio: float = MIN_SIZE_RATIO,
                   cap: int = ShingleSpec().max_shingles, generic: np.ndarray | None = None
                   ) -> tuple[float, str]:
    """Exact similarity of two sorted unique shingle arrays: ``(value, measure)``.

    ``measure`` is ``"jaccard"`` or ``"containment"`` (intersection over the smaller set, used
    when the smaller set has at least ``min_size_ratio`` of the larger one's size and scores
    higher: an excerpt, or a subset of the voices such as a melody-only file), of the whole
    sets or, prefixed ``"lead "``, of their lead-voice parts (``lead_part``; counted when both
    hold ``MIN_LEAD`` shingles), whichever is higher: a tune under a new accompaniment keeps
    its lead. Sets cut at ``cap`` (smallest hashes kept) are compared on their common hash
    range (``overlap_counts``). ``generic`` shingles (``generic_shingles``) are left out of
    both sets first.
    """
    a, b = drop_generic(a, generic), drop_generic(b, generic)
    best = _measure(a, b, min_size_ratio, cap)
    la, lb = lead_part(a), lead_part(b)
    if len(la) >= MIN_LEAD and len(lb) >= MIN_LEAD:
        lead = _measure(la, lb, min_size_ratio, cap, LEAD_CONTAINED)
        if lead[0] > best[0]:
            return lead[0], "lead " + lead[1]
    return best


def _measure(a: np.ndarray, b: np.ndarray, min_size_ratio: float, cap: int,
             min_contained: int = 0) -> tuple[float, str]:
    """Jaccard, or containment where ``set_similarity`` allows it (and the smaller set holds
    ``min_contained`` shingles or more), of two sorted sets."""
    if len(a) == 0 or len(b) == 0:
        return 0.0, "jaccard"
    inter, la, lb = overlap_counts(a, b, cap)
    jac = inter / (la + lb - inter)
    small, large = min(la, lb), max(la, lb)
    if min_size_ratio < 1.0 and small >= min_size_ratio * large and small >= min_contained:
        cont = inter / small
        if cont > jac:
            return float(cont), "containment"
    return float(jac), "jaccard"


#: Fewest lead-voice shingles in each set for the leads to be compared on their own, and in
#: the smaller lead for containment to count there (below it, Jaccard only): a short tune is
#: "contained" by chance in another of the same idiom (hymn tunes: steps, cadence formulas).
MIN_LEAD = 16


LEAD_CONTAINED = 64


def lead_part(shingles: np.ndarray) -> np.ndarray:
    """The lead voice's shingles of a sorted set: its prefix below ``LEAD_LIMIT`` (a view)."""
    return shingles[:int(np.searchsorted(shingles, LEAD_LIMIT))]


#: A shingle is generic when at least this share of the sampled files holds it, and at least
#: ``GENERIC_MIN_FILES`` of them (see ``generic_shingles``).
GENERIC_SHARE = 0.01


GENERIC_MIN_FILES = 10


#: Files whose shingle sets are counted for the document frequencies (a consistent sample:
#: generic material is common by definition, so a sample finds it; memory stays bounded).
GENERIC_SAMPLE = 2000


#: Buckets (of the low bits of a shingle hash) in which ``generic_shingles`` counts first.
_GENERIC_BUCKETS = 1 << 20


def generic_shingles(sets: list[np.ndarray], *, share: float = GENERIC_SHARE,
                     min_files: int = GENERIC_MIN_FILES) -> np.ndarray:
    """Sorted uint64 shingles held by at least ``max(min_files, share * len(sets))`` of the
    sets (document frequency): figures shared by many unrelated files (a walking bass over a
    common progression, a stock arpeggio), which must not link two pieces. Files of one
    piece share their shingles too, so the count must lie above the number of versions a
    piece may have in the corpus."""
    need = max(int(min_files), int(np.ceil(share * len(sets))))
    if len(sets) < need or not len(sets):
        return np.zeros(0, dtype=np.uint64)
    allh = np.concatenate([np.asarray(x, dtype=np.uint64) for x in sets])
    if not len(allh):
        return allh
    # speed: a shingle in ``need`` sets puts ``need`` or more values in its bucket of the low
    # bits, so only the values of such buckets are sorted and counted exactly (sorting every
    # value was most of the count)
    bucket = (allh & np.uint64(_GENERIC_BUCKETS - 1)).astype(np.intp)
    allh = np.sort(allh[np.bincount(bucket, minlength=_GENERIC_BUCKETS)[bucket] >= need])
    if not len(allh):
        return allh
    start = np.flatnonzero(np.concatenate(([True], allh[1:] != allh[:-1])))
    count = np.diff(np.append(start, len(allh)))
    return allh[start[count >= need]]


def drop_generic(shingles: np.ndarray, generic: np.ndarray | None) -> np.ndarray:
    """``shingles`` without the ``generic`` ones (both sorted unique uint64)."""
    if generic is None or not len(generic) or not len(shingles):
        return shingles
    pos = np.minimum(np.searchsorted(generic, shingles), len(generic) - 1)
    return shingles[generic[pos] != shingles]


def pair_similarities(sets: list[np.ndarray], i: np.ndarray, j: np.ndarray, *,
                      min_size_ratio: float = MIN_SIZE_RATIO, cap: int = ShingleSpec().max_shingles,
                      compiled: bool = True, leads: list[np.ndarray] | None = None) -> np.ndarray:
    """``set_similarity`` values (float64) of the pairs ``(sets[i[k]], sets[j[k]])``, the same
    numbers to the last bit: the counts come from one compiled call when the extension is
    built (speed: not ``np.intersect1d`` one pair at a time; DEVELOPERS.md, Bench notes), and
    the divisions are the same float64 ones.
    ``compiled=False`` counts with ``overlap_counts``, the specification. ``sets`` is a list
    of uint64 arrays (the kernel refuses other types, naming the set); ``leads``, their
    ``lead_part``s when the caller made them once for many calls."""
    i = np.ascontiguousarray(i, dtype=np.int64)
    j = np.ascontiguousarray(j, dtype=np.int64)
    if not len(i):
        return np.zeros(0, dtype=np.float64)
    sim = _pair_measure(sets, i, j, min_size_ratio, cap, compiled)
    if leads is None:
        leads = [lead_part(np.asarray(x)) for x in sets]
    sizes = np.array([len(x) for x in leads], dtype=np.int64)
    both = np.flatnonzero((sizes[i] >= MIN_LEAD) & (sizes[j] >= MIN_LEAD))
    if len(both):
        lead = _pair_measure(leads, i[both], j[both], min_size_ratio, cap, compiled, LEAD_CONTAINED)
        sim[both] = np.maximum(sim[both], lead)
    return sim


def _pair_measure(sets: list[np.ndarray], i: np.ndarray, j: np.ndarray, min_size_ratio: float,
                  cap: int, compiled: bool, min_contained: int = 0) -> np.ndarray:
    """``_measure`` of many pairs: counts in one compiled call (or ``overlap_counts``)."""
    kernel = compiled_kernel("overlap_counts") if compiled else None
    if kernel is not None:
        counts = np.frombuffer(kernel(sets, i, j, int(cap)), dtype=np.int64).reshape(-1, 3)
    else:
        counts = np.array([overlap_counts(sets[x], sets[y], cap) for x, y in zip(i.tolist(), j.tolist())],
                          dtype=np.int64).reshape(-1, 3)
    return measure_of_counts(counts[:, 0], counts[:, 1], counts[:, 2], min_size_ratio, min_contained)


def measure_of_counts(inter: np.ndarray, la: np.ndarray, lb: np.ndarray, min_size_ratio: float = MIN_SIZE_RATIO,
                      min_contained: int = 0) -> np.ndarray:
    """``_measure`` (float64) from the counts: intersections and the two set sizes (int64
    arrays). Non-decreasing in ``inter`` for fixed sizes, so a bound on the intersection bounds
    the value (``overlap_sketch``)."""
    denom = la + lb - inter
    with np.errstate(divide="ignore", invalid="ignore"):
        sim = np.where(denom > 0, inter / np.maximum(denom, 1), 0.0)
        if min_size_ratio < 1.0:
            small, large = np.minimum(la, lb), np.maximum(la, lb)
            cont = np.where(small > 0, inter / np.maximum(small, 1), 0.0)
            sim = np.where((small >= min_size_ratio * large) & (small >= min_contained) & (cont > sim),
                           cont, sim)
    return sim
