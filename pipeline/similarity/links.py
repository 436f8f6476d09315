"""Candidate pairs verified into links, and the union-find that joins them.

``near_pairs`` (all against all) and ``near_pairs_between`` (new against old plus new among
themselves, for cheap reruns) return verified ``(id_a, id_b, similarity)`` triples; the
verification reads the stored shingle sets in bulk (``involved_sets``).
"""
from __future__ import annotations

from typing import Any, Iterable

import numpy as np

from ..store.ledger import load_arrays
from .lsh import LSHIndex
from .minhash import estimate_jaccard
from .sets import MIN_SIZE_RATIO, drop_generic, pair_similarities


class UnionFind:
    """Disjoint sets over hashable keys, with path halving and union by size."""

    def __init__(self, keys: Iterable[Any] = ()):
        self.parent: dict[Any, Any] = {}
        self.size: dict[Any, int] = {}
        for k in keys:
            self.add(k)

    def add(self, key: Any) -> None:
        if key not in self.parent:
            self.parent[key] = key
            self.size[key] = 1

    def find(self, key: Any) -> Any:
        parent = self.parent
        while parent[key] != key:
            parent[key] = parent[parent[key]]
            key = parent[key]
        return key

    def union(self, a: Any, b: Any) -> bool:
        """Join the sets of ``a`` and ``b``; False if they were already one set."""
        ra, rb = self.find(a), self.find(b)
        if ra == rb:
            return False
        if self.size[ra] < self.size[rb]:
            ra, rb = rb, ra
        self.parent[rb] = ra
        self.size[ra] += self.size[rb]
        return True

    def groups(self) -> list[list[Any]]:
        """All sets, each sorted, ordered by their smallest member."""
        out: dict[Any, list[Any]] = {}
        for k in self.parent:
            out.setdefault(self.find(k), []).append(k)
        return sorted((sorted(g) for g in out.values()), key=lambda g: g[0])


def verify_pairs(pairs: Iterable[tuple[str, str]], shingles: Any, threshold: float, *,
                 signatures: dict[str, np.ndarray] | None = None,
                 min_size_ratio: float = MIN_SIZE_RATIO, skip: UnionFind | None = None,
                 generic: np.ndarray | None = None) -> list[tuple[str, str, float]]:
    """Keep the candidate pairs whose similarity reaches ``threshold``: ``(a, b, sim)``.

    Similarity is ``set_similarity`` on the shingle sets when given (``shingles[key]``, compared
    by ``verify_index_pairs``), else the MinHash estimate from ``signatures``. With ``skip`` (a
    UnionFind), pairs already in one set are not linked again and verified pairs are unioned
    (enough for clustering)."""
    if shingles is None and signatures is None:
        raise ValueError("verify_pairs needs shingles (exact) or signatures (estimate)")
    pairs = list(pairs)
    if shingles is None:
        return _link_in_order(((a, b, estimate_jaccard(signatures[a], signatures[b])) for a, b in pairs),
                              threshold, skip)
    pos: dict[str, int] = {}
    index = np.array([pos.setdefault(k, len(pos)) for pair in pairs for k in pair],
                     dtype=np.int64).reshape(-1, 2)
    return verify_index_pairs(list(pos), index[:, 0], index[:, 1], shingles, threshold,
                              min_size_ratio=min_size_ratio, skip=skip, generic=generic)


def verify_index_pairs(keys: list[str], i: np.ndarray, j: np.ndarray, shingles: Any,
                       threshold: float, *, min_size_ratio: float = MIN_SIZE_RATIO,
                       skip: UnionFind | None = None, generic: np.ndarray | None = None
                       ) -> list[tuple[str, str, float]]:
    """``verify_pairs`` of the pairs ``(keys[i[k]], keys[j[k]])`` given as index arrays (LSH
    candidate codes), without a Python tuple per candidate: ``VERIFY_CHUNK`` pairs per
    ``pair_similarities`` call, then the pairs that reach ``threshold`` taken in order, so the
    result is the one a pair-by-pair pass gives. Only the sets of keys in some pair are read
    (``shingles[key]``, e.g. lazily built facts on a rerun). ``generic`` shingles are left
    out of every set first (``drop_generic``)."""
    i = np.asarray(i, dtype=np.int64)
    j = np.asarray(j, dtype=np.int64)
    if not len(i):
        return []
    sets, pos = involved_sets(keys, i, j, shingles)
    if generic is not None and len(generic):
        for p, x in enumerate(sets):  # memory: each read set is let go as it is replaced
            sets[p] = drop_generic(np.asarray(x, dtype=np.uint64), generic)
    hits: list[tuple[str, str, float]] = []
    for lo in range(0, len(i), VERIFY_CHUNK):  # memory: 24 bytes of counts per pair in a chunk
        hi = lo + VERIFY_CHUNK
        sims = pair_similarities(sets, pos[i[lo:hi]], pos[j[lo:hi]], min_size_ratio=min_size_ratio)
        hit = np.flatnonzero(sims >= threshold)
        hits += [(keys[a], keys[b], sim) for a, b, sim in
                 zip(i[lo:hi][hit].tolist(), j[lo:hi][hit].tolist(), sims[hit].tolist())]
    return _link_in_order(hits, threshold, skip)


def involved_sets(keys: list[str], i: np.ndarray, j: np.ndarray, shingles: Any
                  ) -> tuple[list, np.ndarray]:
    """The sets ``shingles[keys[p]]`` of the keys in some pair ``(i[k], j[k])`` only, those
    still in the ledger (``ledger.StoredArray``) read in one go, and ``pos``: key index -> its
    position in that list (``pos[i]``, ``pos[j]`` are what ``pair_similarities`` takes). A
    mask over the keys rather than a sort of the pairs (memory: the pair arrays of millions of
    candidates are not copied)."""
    used = np.zeros(len(keys), dtype=bool)
    used[i] = True
    used[j] = True
    involved = np.flatnonzero(used)
    pos = np.cumsum(used, dtype=np.int64) - 1
    sets = load_arrays([shingles[keys[p]] for p in involved.tolist()])
    return sets, pos


#: Candidate pairs compared per ``pair_similarities`` call in ``verify_index_pairs``.
VERIFY_CHUNK = 1 << 14


def _link_in_order(scored: Iterable[tuple[str, str, float]], threshold: float,
                   skip: UnionFind | None) -> list[tuple[str, str, float]]:
    """The scored pairs at or above ``threshold``, in order; with ``skip``, a pair whose ends
    are already in one set is passed over and each kept pair joins its ends."""
    out: list[tuple[str, str, float]] = []
    for a, b, sim in scored:
        if sim < threshold:
            continue
        if skip is not None:
            if skip.find(a) == skip.find(b):
                continue
            skip.union(a, b)
        out.append((a, b, sim))
    return out


def near_pairs(signatures: dict[str, np.ndarray], threshold: float, *, num_perm: int = 128,
               bands: int = 64, shingles: dict[str, np.ndarray] | None = None,
               min_size_ratio: float = MIN_SIZE_RATIO, skip: UnionFind | None = None
               ) -> list[tuple[str, str, float]]:
    """Verified near pairs ``(a, b, similarity)`` with ``a < b``, sorted.

    Candidates come from LSH banding; each is verified on the exact shingle sets when
    ``shingles`` is given (Jaccard or excerpt containment, see ``set_similarity``), else on the
    MinHash estimate. With ``skip`` (a UnionFind), pairs already in one set are not verified
    and verified pairs are unioned: enough for clustering, fewer comparisons.
    """
    index = LSHIndex(num_perm, bands)
    for key in sorted(signatures):
        index.add(key, signatures[key])
    return verify_pairs(index.candidates(), shingles, threshold, signatures=signatures,
                        min_size_ratio=min_size_ratio, skip=skip)


def near_pairs_between(new: dict[str, np.ndarray], old: dict[str, np.ndarray], threshold: float, *,
                       num_perm: int = 128, bands: int = 64,
                       shingles: dict[str, np.ndarray] | None = None,
                       min_size_ratio: float = MIN_SIZE_RATIO, skip: UnionFind | None = None
                       ) -> list[tuple[str, str, float]]:
    """Incremental form: pairs new-vs-old and new-vs-new only (old-vs-old are not recomputed)."""
    index = LSHIndex(num_perm, bands)
    for key in sorted(old):
        index.add(key, old[key])
    for key in sorted(new):
        index.add(key, new[key])
    allsigs = {**old, **new}
    return verify_pairs(index.candidates(set(new)), shingles, threshold, signatures=allsigs,
                        min_size_ratio=min_size_ratio, skip=skip)
