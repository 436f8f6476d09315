"""Candidate pairs verified into links, and the union-find that joins them.

The one verification of candidate pairs (dedup's, the split's grouping's, and through
``grouping.near_links`` the ``leakage`` audit's): ``verify_codes`` keeps the pairs of sorted
LSH codes that reach a threshold, ``code_similarities`` gives every pair's value; both read the
shingle sets a block at a time, through the caller's ``read`` (a stage passes
``ledger.load_arrays`` for sets still in its store: the core itself knows no store).
``UnionFind`` is the one union-find (dedup's clusters, the split's groups).
"""
from __future__ import annotations

from operator import itemgetter
from typing import Any, Callable, Iterable, Iterator

import numpy as np

from .lsh import sorted_unique
from .sets import MIN_SIZE_RATIO, drop_generic, lead_part, pair_similarities


class UnionFind:
    """Disjoint sets over hashable keys, with path halving and union by size."""

    def __init__(self, keys: Iterable[Any] = ()):
        self.parent: dict[Any, Any] = {k: k for k in keys}
        self.size: dict[Any, int] = dict.fromkeys(self.parent, 1)

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
        return self._sets(None)

    def groups_of(self, keys: Iterable[Any]) -> list[list[Any]]:
        """The sets holding any of ``keys``, as ``groups`` gives them. Speed: no list is made
        for the other sets."""
        roots = {self.find(k) for k in keys}
        return self._sets(roots) if roots else []

    def _sets(self, roots: set[Any] | None) -> list[list[Any]]:
        """The sets whose root is in ``roots`` (None: all), each sorted, ordered by their
        smallest member."""
        out: dict[Any, list[Any]] = {}
        alone: list[list[Any]] = []
        size, find = self.size, self.find
        for k, p in self.parent.items():
            if p == k and size[k] == 1:  # speed: a set of one (most keys of a corpus)
                if roots is None or k in roots:
                    alone.append([k])
            else:
                r = find(k)
                if roots is None or r in roots:
                    out.setdefault(r, []).append(k)
        alone.extend(sorted(g) for g in out.values())
        alone.sort(key=itemgetter(0))
        return alone

def verify_codes(keys: list[str], codes: np.ndarray, shingles: Any, threshold: float, *,
                 generic: np.ndarray | None = None, min_size_ratio: float = MIN_SIZE_RATIO,
                 budget: int | None = None, read: "Read | None" = None) -> list[tuple[str, str, float]]:
    """The pairs of sorted codes ``i * len(keys) + j`` (``i < j``: LSH candidates) whose
    similarity reaches ``threshold``: ``(keys[i], keys[j], similarity)`` in code order. The
    one exact verification of candidate pairs (dedup's and the split's grouping's)."""
    n = len(keys)
    at_parts, val_parts = [], []
    for at, val in code_similarities(keys, codes, shingles, generic=generic,
                                     min_size_ratio=min_size_ratio, budget=budget, read=read):
        hit = val >= threshold
        at_parts.append(at[hit])
        val_parts.append(val[hit])
    if not at_parts:
        return []
    at = np.concatenate(at_parts)
    val = np.concatenate(val_parts)
    order = np.argsort(at, kind="stable")
    c = codes[at[order]]
    # memory: only the linked pairs become Python objects
    return [(keys[x], keys[y], v) for x, y, v in
            zip((c // n).tolist(), (c % n).tolist(), val[order].tolist())]


def code_similarities(keys: list[str], codes: np.ndarray, shingles: Any, *,
                      generic: np.ndarray | None = None, min_size_ratio: float = MIN_SIZE_RATIO,
                      budget: int | None = None, read: "Read | None" = None
                      ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """``(positions, similarities)`` for every pair of the sorted codes ``i * len(keys) + j``
    (``i <= j``), block pair by block pair: ``codes[positions]`` are those pairs and
    ``similarities`` their ``set_similarity`` values (float64), ``generic`` shingles left out.

    Only the sets of keys in some pair are read (``shingles[key]``: arrays, or handles that
    ``read`` turns into arrays, a list of them in one call), and about ``budget`` shingles
    (``VERIFY_SHINGLES``) at most at once: the keys in pairs are cut, in key order, into blocks
    of half of it, and the pairs are compared block pair by block pair, the later block of a
    pair read when its pairs come (a block nested loop join). Memory: on a large corpus nearly
    every file is in some candidate pair, and all their sets at once were the peak of a run; a
    set is read again for each earlier block it pairs with. The values do not depend on the
    blocks; per-pair arrays exist for one block's pairs at a time (codes are sorted by ``i``)."""
    codes = np.asarray(codes, dtype=np.int64)
    n = len(keys)
    if not len(codes):
        return
    involved = rows_in_codes(codes, n)
    sizes = np.array([len(shingles[keys[p]]) for p in involved.tolist()], dtype=np.int64)
    half = max(1, int(VERIFY_SHINGLES if budget is None else budget) // 2)
    start = (np.cumsum(sizes) - sizes) // half  # a block: the keys whose first shingle falls in one half budget
    first = np.flatnonzero(np.concatenate(([True], start[1:] != start[:-1])))
    block_of = np.full(n, -1, dtype=np.int32)
    block_of[involved] = np.repeat(np.arange(len(first), dtype=np.int32), np.diff(np.append(first, len(start))))
    # codes are sorted by i, and blocks follow key order: block a's pairs as the lower end
    # (i in block a) form one range of codes
    bounds = np.searchsorted(codes, np.append(involved[first], n) * n)
    pos = np.full(n, -1, dtype=np.int64)  # key index -> its place among the held sets
    for a in range(len(first)):
        s0, s1 = int(bounds[a]), int(bounds[a + 1])
        if s0 == s1:
            continue
        c = codes[s0:s1]
        i, j = c // n, c % n
        del c
        hi = block_of[j]
        outer_keys = sorted_unique(np.concatenate((i, j[hi == a])))
        outer = _read_sets(keys, outer_keys, shingles, generic, read)
        for b in sorted_unique(hi).tolist():
            rows = np.flatnonzero(hi == b)
            if b == a:
                held, held_keys = outer, outer_keys
            else:
                inner_keys = sorted_unique(j[rows])
                held = outer + _read_sets(keys, inner_keys, shingles, generic, read)
                held_keys = np.concatenate((outer_keys, inner_keys))
            pos[held_keys] = np.arange(len(held_keys))
            leads = [lead_part(x) for x in held]
            for lo in range(0, len(rows), VERIFY_CHUNK):  # memory: 24 bytes of counts per pair
                r = rows[lo:lo + VERIFY_CHUNK]
                yield s0 + r, pair_similarities(held, pos[i[r]], pos[j[r]], leads=leads,
                                                min_size_ratio=min_size_ratio)
            del held, leads  # memory: an inner block is let go before the next is read
        del outer, i, j, hi


def rows_in_codes(codes: np.ndarray, n: int) -> np.ndarray:
    """The sorted rows ``i`` and ``j`` of the codes ``i * n + j`` (the keys in some pair)."""
    used = np.zeros(n, dtype=bool)
    for lo in range(0, len(codes), _CODE_CHUNK):  # memory: no index arrays over all pairs
        c = codes[lo:lo + _CODE_CHUNK]
        used[c // n] = True
        used[c % n] = True
    return np.flatnonzero(used)


def _read_sets(keys: list[str], which: np.ndarray, shingles: Any, generic: np.ndarray | None,
               read: "Read | None") -> list[np.ndarray]:
    """The uint64 sets ``shingles[keys[p]]`` for ``p`` in ``which`` (through ``read``, in
    bulk), without the ``generic`` shingles."""
    held = [shingles[keys[p]] for p in which.tolist()]
    sets = held if read is None else read(held)
    for p, x in enumerate(sets):  # memory: each read set is let go as it is replaced
        sets[p] = drop_generic(np.asarray(x, dtype=np.uint64), generic)
    return sets


#: Turns a list of held shingle sets (arrays, or a store's handles) into arrays, in one call.
Read = Callable[[list], list]


#: Codes handled at once where a pass over all candidate pairs needs index arrays.
_CODE_CHUNK = 1 << 20


#: Candidate pairs compared per ``pair_similarities`` call in ``code_similarities``.
VERIFY_CHUNK = 1 << 14


#: Shingles held at once while candidate pairs are verified (``code_similarities``): 8 bytes each,
#: so about 32 MB of sets whatever the corpus size.
VERIFY_SHINGLES = 1 << 22
