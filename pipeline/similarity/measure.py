"""Piece identity: signatures, LSH banding, verification and union-find (dedup, split, leakage).

* ``minhash`` is a numpy implementation of datasketch's ``MinHash`` (scheme ``affine32``,
  datasketch >= 2.0): each 32-bit input hash is pre-mixed with the MurmurHash3 finalizer, then
  permuted by ``a*h + b mod 2**32`` with ``(a, b)`` drawn from ``numpy.random.RandomState(seed)``
  exactly as datasketch draws them, and the column minimum is the signature. The tests check
  that it equals ``datasketch.MinHash(...).digest()`` for the same seed and tokens.
* ``LSHIndex`` bands a signature into ``bands`` bands of ``num_perm // bands`` rows; two
  signatures are candidates when any band is identical, with probability
  ``1 - (1 - s**r)**b`` for Jaccard ``s`` (Leskovec, Rajaraman, Ullman, Mining of Massive
  Datasets, ch. 3).
* ``signature_of`` is the one entry point for a file's identity artifacts (shingle set,
  signature, content hash): dedup's ``prepare``, the split and ``leakage`` use it. The
  signature's first half signs the lead voice's shingles, the second half the whole set.
* Candidates are verified on the stored shingle sets (``set_similarity``, ``pair_similarities``:
  Jaccard, or containment of the smaller set from ``MIN_SIZE_RATIO`` of the larger's size, of
  the whole sets and of the lead voices, the higher counting), generic shingles (held by many
  files of the corpus, ``generic_shingles``) left out, before they are linked.
* ``near_pairs`` (all against all) and ``near_pairs_between`` (new against old plus new among
  themselves, for cheap reruns) return verified ``(id_a, id_b, similarity)`` triples.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Iterable

import numpy as np

from ..analysis.shingles import LEAD_LIMIT, ShingleSpec, content_hash, fmix64, shingle_hashes
from ..store.ledger import load_arrays
from ..midi.accel import kernel as compiled_kernel
from ..midi.piece import Piece

_U32_MAX = np.uint32(0xFFFFFFFF)
#: Containment (intersection over the smaller set) counts when the smaller set has at least
#: this share of the larger one's size: low enough that a melody-only or chords-only file is
#: found inside its full arrangement (a subset of the voices), not so low that a short figure
#: is "contained" in every long piece (files below ``min_shingles`` are never compared).
MIN_SIZE_RATIO = 0.1
_ROLL = np.uint64(0x9E3779B97F4A7C15)
# MurmurHash3 fmix32 constants, as in datasketch.minhash._FMIX_CONSTANTS[32].
_F32 = (np.uint32(16), np.uint32(0x85EBCA6B), np.uint32(13), np.uint32(0xC2B2AE35), np.uint32(16))

_PERMUTATIONS: dict[tuple[int, int], tuple[np.ndarray, np.ndarray]] = {}


def permutations(num_perm: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """The ``(a, b)`` uint32 arrays datasketch's affine32 ``MinHash`` draws for this seed."""
    key = (num_perm, seed)
    if key not in _PERMUTATIONS:
        gen = np.random.RandomState(seed)
        a = gen.randint(0, 1 << 31, num_perm, dtype=np.uint32) * np.uint32(2) + np.uint32(1)
        b = gen.randint(0, 1 << 32, num_perm, dtype=np.uint32)
        _PERMUTATIONS[key] = (a, b)
    return _PERMUTATIONS[key]


def fold32(shingles: np.ndarray) -> np.ndarray:
    """The 32-bit MinHash input for each 64-bit shingle hash (xor of its halves)."""
    s = np.asarray(shingles, dtype=np.uint64)
    # the low 32 bits of s ^ (s >> 32): the cast to uint32 keeps exactly those (the mask
    # & 0xFFFFFFFF is implied)
    return (s ^ (s >> np.uint64(32))).astype(np.uint32)


def _fmix32(h: np.ndarray) -> np.ndarray:
    """MurmurHash3's 32-bit finalizer of uint32 ``h`` (a new array; ``h`` is not changed)."""
    s1, m1, s2, m2, s3 = _F32
    out = h >> s1
    with np.errstate(over="ignore"):
        out ^= h
        out *= m1
        out ^= out >> s2
        out *= m2
        out ^= out >> s3
    return out


def minhash(shingles: np.ndarray, num_perm: int = 128, seed: int = 1, *,
            compiled: bool = True) -> np.ndarray:
    """MinHash signature (uint32, ``num_perm``) of a set of 64-bit shingle hashes.

    Equals ``datasketch.MinHash(num_perm, seed, hashfunc=int).update_batch(fold32(shingles))``;
    an empty set gives all ``2**32 - 1`` (datasketch's empty value), which ``is_empty`` detects.
    With the compiled path on, the same integer arithmetic runs in C; ``compiled=False`` runs
    the numpy formulation below, the specification (tests/test_smf_accel.py holds them equal).
    """
    a, b = permutations(num_perm, seed)
    return _minhash_with(shingles, a, b, compiled)


def _minhash_with(shingles: np.ndarray, a: np.ndarray, b: np.ndarray, compiled: bool = True
                  ) -> np.ndarray:
    """``minhash`` under the permutations ``(a, b)`` (one value per permutation)."""
    num_perm = len(a)
    if len(shingles) == 0:
        return np.full(num_perm, _U32_MAX, dtype=np.uint32)
    compiled = compiled_kernel("minhash32") if compiled else None
    if compiled is not None:
        return np.frombuffer(compiled(np.ascontiguousarray(shingles, dtype=np.uint64), a, b),
                             dtype=np.uint32).copy()
    h = _fmix32(fold32(shingles))
    with np.errstate(over="ignore"):
        # the (shingle x permutation) table is filled in place (one buffer, no temporaries);
        # from a few hundred shingles on, permutation-major rows reduce faster
        if len(h) < _PERM_MAJOR_FROM:
            table = np.multiply.outer(h, a)
            table += b
            return table.min(axis=0)
        table = np.multiply.outer(a, h)
        table += b[:, None]
        return table.min(axis=1)


#: Shingle count from which ``minhash`` lays its table out one row per permutation.
_PERM_MAJOR_FROM = 256


def is_empty(signature: np.ndarray) -> bool:
    """True for the signature of an empty shingle set (never a candidate)."""
    return bool(np.all(signature == _U32_MAX))


def estimate_jaccard(sig_a: np.ndarray, sig_b: np.ndarray) -> float:
    """Fraction of equal MinHash values: an unbiased estimate of Jaccard (Broder 1997)."""
    if len(sig_a) != len(sig_b):
        raise ValueError(f"signatures of different lengths ({len(sig_a)} vs {len(sig_b)}) "
                         "cannot be compared: were they made with the same num_perm?")
    return float(np.mean(sig_a == sig_b))


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


#: Buckets (of the low bits of a shingle hash) in which ``generic_shingles`` counts first.
_GENERIC_BUCKETS = 1 << 20


def generic_bands(sig: np.ndarray, generic: np.ndarray, bands: int, seed: int) -> np.ndarray:
    """``(rows, bands)`` booleans: the LSH bands of ``signature_of`` signatures whose every value
    is the MinHash value of a ``generic`` shingle under that column's permutation. Such a band
    key is made of generic material only: two unrelated files sharing it are what makes the
    candidates of a large corpus grow with its square, and ``set_similarity`` leaves those
    shingles out anyway. A column of the first half may come from the lead's permutations or
    (lead too short) the whole set's: a value matching either counts."""
    sig = np.asarray(sig, dtype=np.uint32)
    n, num_perm = sig.shape
    out = np.zeros((n, bands), dtype=bool)
    if not n or not len(generic):
        return out
    half = num_perm // 2
    h = _fmix32(fold32(generic))
    a, b = permutations(num_perm, seed)
    la, lb = permutations(half, seed)
    hit = np.zeros(sig.shape, dtype=bool)
    with np.errstate(over="ignore"):
        for c in range(num_perm):
            vals = h * a[c] + b[c]
            if c < half:
                vals = np.concatenate([vals, h * la[c] + lb[c]])
            vals.sort()
            pos = np.minimum(np.searchsorted(vals, sig[:, c]), len(vals) - 1)
            hit[:, c] = vals[pos] == sig[:, c]
    return hit.reshape(n, bands, num_perm // bands).all(axis=2)


def drop_generic(shingles: np.ndarray, generic: np.ndarray | None) -> np.ndarray:
    """``shingles`` without the ``generic`` ones (both sorted unique uint64)."""
    if generic is None or not len(generic) or not len(shingles):
        return shingles
    pos = np.minimum(np.searchsorted(generic, shingles), len(generic) - 1)
    return shingles[generic[pos] != shingles]


def pair_similarities(sets: list[np.ndarray], i: np.ndarray, j: np.ndarray, *,
                      min_size_ratio: float = MIN_SIZE_RATIO, cap: int = ShingleSpec().max_shingles,
                      compiled: bool = True) -> np.ndarray:
    """``set_similarity`` values (float64) of the pairs ``(sets[i[k]], sets[j[k]])``, the same
    numbers to the last bit: the counts come from one compiled call when the extension is
    built (speed: 1.4 million pairs of a 100,000-file split took 12 s through
    ``np.intersect1d`` one pair at a time), and the divisions are the same float64 ones.
    ``compiled=False`` counts with ``overlap_counts``, the specification. ``sets`` is a list
    of uint64 arrays (the kernel refuses other types, naming the set)."""
    i = np.ascontiguousarray(i, dtype=np.int64)
    j = np.ascontiguousarray(j, dtype=np.int64)
    if not len(i):
        return np.zeros(0, dtype=np.float64)
    sim = _pair_measure(sets, i, j, min_size_ratio, cap, compiled)
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
    inter, la, lb = counts[:, 0], counts[:, 1], counts[:, 2]
    denom = la + lb - inter
    with np.errstate(divide="ignore", invalid="ignore"):
        sim = np.where(denom > 0, inter / np.maximum(denom, 1), 0.0)
        if min_size_ratio < 1.0:
            small, large = np.minimum(la, lb), np.maximum(la, lb)
            cont = np.where(small > 0, inter / np.maximum(small, 1), 0.0)
            sim = np.where((small >= min_size_ratio * large) & (small >= min_contained) & (cont > sim),
                           cont, sim)
    return sim


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


def check_banding(num_perm: int, bands: int) -> str | None:
    """An error sentence if ``bands`` cannot split ``num_perm`` rows evenly, else None."""
    if num_perm < 1 or bands < 1:
        return f"num_perm ({num_perm}) and bands ({bands}) must be positive"
    if num_perm % bands:
        divisors = [d for d in range(1, num_perm + 1) if num_perm % d == 0]
        return (f"bands ({bands}) must divide num_perm ({num_perm}) so every band has the same "
                f"number of rows; choose bands from {divisors}")
    return None


def candidate_probability(s: float | np.ndarray, bands: int, rows: int) -> float | np.ndarray:
    """Probability that a pair of Jaccard ``s`` shares a band: ``1 - (1 - s**r)**b``
    (Mining of Massive Datasets, ch. 3)."""
    return 1.0 - (1.0 - np.asarray(s, dtype=np.float64) ** rows) ** bands


def band_keys(signatures: np.ndarray, bands: int) -> np.ndarray:
    """``(N, bands)`` uint64 keys; equal keys mean equal bands (up to 64-bit collisions)."""
    n, num_perm = signatures.shape
    err = check_banding(num_perm, bands)
    if err:
        raise ValueError(err)
    out = np.empty((n, bands), dtype=np.uint64)
    for band in range(bands):
        out[:, band] = band_key(signatures, bands, band)
    return out


def band_key(signatures: np.ndarray, bands: int, band: int) -> np.ndarray:
    """The ``(N,)`` uint64 keys of one band (column ``band`` of ``band_keys``). Corpus stages
    key one band at a time: the whole ``(N, bands)`` table and its uint64 temporaries were
    several hundred MB at 100,000 files."""
    rows = signatures.shape[1] // bands
    cols = signatures[:, band * rows:(band + 1) * rows]
    h = np.full(len(signatures), np.uint64(rows), dtype=np.uint64)
    with np.errstate(over="ignore"):
        for j in range(rows):
            h = fmix64(h * _ROLL + cols[:, j].astype(np.uint64))
        h = h + np.uint64(band) * _ROLL  # keep bands apart
    return h


@dataclass
class LSHIndex:
    """Banded index over signatures; built from stored signatures (nothing persisted but them)."""

    num_perm: int = 128
    bands: int = 64

    def __post_init__(self):
        err = check_banding(self.num_perm, self.bands)
        if err:
            raise ValueError(err)
        self.ids: list[str] = []
        self._sigs: list[np.ndarray] = []

    def add(self, key: str, signature: np.ndarray) -> None:
        if len(signature) != self.num_perm:
            raise ValueError(f"signature of {key} has {len(signature)} values, index expects "
                             f"num_perm={self.num_perm}; rebuild the signatures with the same num_perm")
        if not is_empty(signature):
            self.ids.append(key)
            self._sigs.append(np.asarray(signature, dtype=np.uint32)[None, :])

    def extend(self, keys: list[str], signatures: np.ndarray) -> None:
        """``add`` for many keys at once: ``signatures`` is their ``(len(keys), num_perm)``
        array (one emptiness test for all rows instead of one per signature)."""
        sig = np.asarray(signatures, dtype=np.uint32)
        if sig.ndim != 2 or len(sig) != len(keys) or (len(sig) and sig.shape[1] != self.num_perm):
            raise ValueError(f"signatures of shape {sig.shape} do not fit {len(keys)} keys of "
                             f"num_perm={self.num_perm}; rebuild the signatures with the same num_perm")
        live = ~np.all(sig == _U32_MAX, axis=1)
        self.ids.extend(k for k, ok in zip(keys, live.tolist()) if ok)
        self._sigs.append(sig[live])

    def candidates(self, new: set[str] | None = None) -> list[tuple[str, str]]:
        """Pairs sharing a band, sorted; with ``new``, only pairs with at least one new id."""
        codes = self.candidate_codes(new)
        n, ids = len(self.ids), self.ids
        return sorted(tuple(sorted((ids[c // n], ids[c % n]))) for c in codes.tolist())

    def candidate_codes(self, new: set[str] | None = None, skip: np.ndarray | None = None
                        ) -> np.ndarray:
        """The candidate pairs of ``candidates`` as sorted unique codes ``i * n + j`` (``i < j``
        index the ids in insertion order): 8 bytes a pair instead of a tuple of two strings.
        ``skip`` (``(len(ids), bands)`` booleans, e.g. ``generic_bands``) marks bands that pair
        no row: each gets a key of its own row."""
        n = len(self.ids)
        if n < 2:
            return np.zeros(0, dtype=np.int64)
        is_new = (np.ones(n, dtype=bool) if new is None
                  else np.array([k in new for k in self.ids]))
        if not is_new.any():  # every pair would be old-old: nothing to band (cheap reruns)
            return np.zeros(0, dtype=np.int64)
        sig = self.matrix()
        if skip is not None and skip.any():
            rows, bands = np.nonzero(skip)
            r = self.num_perm // self.bands
            sig = sig.copy()
            # the band's first value becomes the row number, the others one constant: a key no
            # other row has (a real band equal to it only adds a candidate, which is verified)
            sig[rows, bands * r] = rows.astype(np.uint32)
            for k in range(1, r):
                sig[rows, bands * r + k] = _U32_MAX - np.uint32(1)
        return banded_pair_codes(sig, self.bands, is_new)

    def matrix(self) -> np.ndarray:
        """The signatures as one ``(len(ids), num_perm)`` uint32 array, in insertion order."""
        m = getattr(self, "_matrix", None)
        if m is None or len(m) != len(self.ids):
            m = self._matrix = (np.vstack(self._sigs) if self._sigs
                                else np.zeros((0, self.num_perm), dtype=np.uint32))
        return m

    def plausible_codes(self, codes: np.ndarray, set_sizes: np.ndarray, threshold: float, *,
                        min_size_ratio: float = MIN_SIZE_RATIO, cap: int = ShingleSpec().max_shingles,
                        margin_sigmas: float = 3.0) -> np.ndarray:
        """The candidate codes whose MinHash estimates leave ``set_similarity`` a chance to
        reach ``threshold``; the rest need no exact comparison.

        A pair can pass on the whole sets only if their Jaccard is at least ``threshold``, or,
        when containment applies (smaller set >= ``min_size_ratio`` of the larger, size ratio
        ``p``), at least ``t p / (p + 1 - t p)`` (containment ``t`` expressed as Jaccard); on
        the leads only if theirs is at least ``t / (2 - t)`` (containment ``t`` between leads
        of one size). Each half of a signature (``signature_of``: leads, whole sets) estimates
        its Jaccard with standard deviation ``sqrt(J (1 - J) / (num_perm / 2))`` (Broder
        1997); a pair is dropped only when both estimates lie more than ``margin_sigmas`` of
        them below their bounds. Pairs with a set cut at ``cap`` are always kept (their exact
        comparison uses a sub-range, not the signed sets). ``set_sizes`` holds the
        shingle-set size of each id, in insertion order.

        LSH banding makes a pair with 2 rows per band a candidate from 2 equal values on: most
        candidates of a large corpus are unrelated pieces sharing one band, and this removes
        most of them without touching their shingles."""
        n = len(self.ids)
        if not len(codes):
            return codes
        keep = np.empty(len(codes), dtype=bool)
        sig = self.matrix()
        for lo in range(0, len(codes), PAIR_CHUNK):  # memory: per-pair arrays a chunk at a time
            c = codes[lo:lo + PAIR_CHUNK]
            keep[lo:lo + len(c)] = plausible_pairs(sig, c // n, c % n, set_sizes, threshold,
                                                   min_size_ratio=min_size_ratio, cap=cap,
                                                   margin_sigmas=margin_sigmas)
        return codes[keep]


def plausible_pairs(sig: np.ndarray, i: np.ndarray, j: np.ndarray, set_sizes: Any, threshold: float, *,
                    min_size_ratio: float = MIN_SIZE_RATIO, cap: int = ShingleSpec().max_shingles,
                    margin_sigmas: float = 3.0) -> np.ndarray:
    """Mask of the pairs (rows ``i``, ``j`` of the signature matrix ``sig``) whose MinHash
    estimates leave ``set_similarity`` a chance to reach ``threshold`` (see
    ``LSHIndex.plausible_codes``, which dedup uses; the split's grouping uses it with a wider
    margin). ``set_sizes`` holds each row's shingle-set size."""
    half = sig.shape[1] // 2
    sizes = np.asarray(set_sizes, dtype=np.float64)
    t = float(threshold)
    lead_bound = t / (2.0 - t)
    lead_floor = lead_bound - margin_sigmas * np.sqrt(max(lead_bound * (1 - lead_bound), 1e-4) / half)
    est_lead = pair_estimates(sig[:, :half], i, j)
    est = pair_estimates(sig[:, half:], i, j)
    si, sj = sizes[i], sizes[j]
    small, large = np.minimum(si, sj), np.maximum(si, sj)
    rho = small / np.maximum(large, 1.0)
    bound = np.full(len(i), t)
    if min_size_ratio < 1.0:
        cont = small >= min_size_ratio * large
        bound[cont] = np.minimum(t, t * rho[cont] / (rho[cont] + 1.0 - t * rho[cont]))
    sd = np.sqrt(np.maximum(bound * (1.0 - bound), 1e-4) / half)
    return (est >= bound - margin_sigmas * sd) | (est_lead >= lead_floor) | (large >= cap)


#: Candidate pairs handled at once where a step makes per-pair arrays: the two (pairs x
#: num_perm) gathers of ``pair_estimates`` then take about 4 MB at 128 permutations. Measured
#: on 2,000,000 pairs of 100,000 signatures: 4,096 pairs per chunk ran pair_estimates in 0.98 s
#: and plausible_codes in 1.16 s, 65,536 pairs in 1.70 s and 1.55 s (the gathers stay in cache),
#: and the main process's traced peak (tracemalloc) on 10,000 files fell from 88 to 70 MB.
PAIR_CHUNK = 1 << 12


def pair_estimates(sig: np.ndarray, i: np.ndarray, j: np.ndarray) -> np.ndarray:
    """MinHash Jaccard estimates (share of equal values) of the row pairs ``(i[k], j[k])`` of
    a signature matrix, in chunks of ``PAIR_CHUNK`` (memory: two full gathers of millions of
    candidate pairs were the peak of a 100,000-file run)."""
    est = np.empty(len(i), dtype=np.float64)
    for lo in range(0, len(i), PAIR_CHUNK):
        hi = lo + PAIR_CHUNK
        est[lo:hi] = (sig[i[lo:hi]] == sig[j[lo:hi]]).mean(axis=1)
    return est


def banded_pair_codes(sig: np.ndarray, bands: int, is_new: np.ndarray, *,
                      compiled: bool = True) -> np.ndarray:
    """Sorted unique codes ``i * n + j`` (``i < j``) of the rows of ``sig`` sharing a band,
    keeping pairs with at least one ``is_new`` row. One band's keys at a time, merged every
    ``_MERGE_BANDS`` bands, so a pair found in many bands is held about once (the whole
    (rows x bands) key table and its temporaries were several hundred MB at 100,000 files).
    With few new rows (a rerun) and the extension built, ``_smf_accel.band_pair_codes`` does
    each block of bands in one call (the same codes: integer hashing and key equality);
    ``compiled=False`` runs the numpy formulation, the specification. Speed: a rerun's dedup
    and split each band every stored signature; 10,000 signatures with 100 new took 42 ms in
    numpy and 12 ms in the kernel. With many new rows numpy's sort is faster (57 vs 87 ms)."""
    few_new = int(np.count_nonzero(is_new)) * _FEW_NEW <= len(is_new)
    kernel = compiled_kernel("band_pair_codes") if compiled and few_new else None
    if kernel is not None:
        sig = np.ascontiguousarray(sig, dtype=np.uint32)
        new_bytes = np.ascontiguousarray(is_new, dtype=bool).view(np.uint8)
    codes = np.zeros(0, dtype=np.int64)
    for lo in range(0, bands, _MERGE_BANDS):
        hi = min(bands, lo + _MERGE_BANDS)
        if kernel is not None:
            found = [np.frombuffer(kernel(sig, bands, lo, hi, new_bytes), dtype=np.int64)]
        else:
            found = [_band_pairs(band_key(sig, bands, band), is_new) for band in range(lo, hi)]
        codes = sorted_unique(np.concatenate([codes, *found]))
    return codes


#: Bands whose pair codes are merged at once (a pair shares many bands: memory).
_MERGE_BANDS = 8


def sorted_unique(a: np.ndarray) -> np.ndarray:
    """``np.unique(a)`` of a 1-d array, by one sort. Speed: numpy 2.3+ answers ``np.unique``
    of integers through a hash table first; on this machine that took 13 s for 11 million
    pair codes (0.27 s this way) and 0.47 ms for 500 values (0.01 ms)."""
    s = np.sort(a)
    if len(s) < 2:
        return s
    keep = np.empty(len(s), dtype=bool)
    keep[0] = True
    np.not_equal(s[1:], s[:-1], out=keep[1:])
    return s[keep]


#: Buckets up to this size are paired by vectorized offsets; bigger ones one by one.
_SMALL_BUCKET = 32


def _band_pairs(col: np.ndarray, is_new: np.ndarray) -> np.ndarray:
    """Pair codes ``i * n + j`` (``i < j``) of rows with equal keys in one band."""
    n = len(col)
    n_new = int(np.count_nonzero(is_new))
    if n_new * _FEW_NEW <= n:
        # incremental: the rows whose key a new row has, found by binary search in the few new
        # keys instead of sorting the whole band (a rerun with 1% new files)
        new_keys = sorted_unique(col[is_new])
        pos = np.minimum(np.searchsorted(new_keys, col), len(new_keys) - 1)
        rows = np.flatnonzero(new_keys[pos] == col)
        if len(rows) < 2:
            return np.zeros(0, dtype=np.int64)
        sub = rows[_band_pairs_sorted(col[rows], is_new[rows])]
        sub.sort(axis=1)
        return sub[:, 0] * n + sub[:, 1]
    pairs = _band_pairs_sorted(col, is_new)
    return pairs[:, 0] * n + pairs[:, 1]


#: Below one new row in this many, a band pairs only the buckets a new row is in.
_FEW_NEW = 16


def _band_pairs_sorted(col: np.ndarray, is_new: np.ndarray) -> np.ndarray:
    """Row pairs ``(i, j)``, ``i < j``, of rows with equal keys ``col``, at least one of them
    ``is_new``: an ``(M, 2)`` int64 array (by sorting the band)."""
    n = len(col)
    order = np.argsort(col, kind="stable")
    sc = col[order]
    starts = np.flatnonzero(np.concatenate(([True], sc[1:] != sc[:-1])))
    sizes = np.diff(np.append(starts, n))
    if not is_new.all():
        # incremental: only buckets holding a new row can give a wanted pair; drop the others
        # before pairing (a rerun with 1% new files then pairs ~1% of the buckets)
        wanted = np.maximum.reduceat(is_new[order].astype(np.int8), starts).astype(bool) & (sizes > 1)
        if not wanted.any():
            return np.zeros((0, 2), dtype=np.int64)
        rows = np.repeat(wanted, sizes)
        order, sc = order[rows], sc[rows]
        sizes = sizes[wanted]
        starts = np.concatenate(([0], np.cumsum(sizes)[:-1]))
    out: list[np.ndarray] = []
    for d in range(1, min(int(sizes.max()), _SMALL_BUCKET)):
        same = sc[:-d] == sc[d:]
        if not same.any():
            break
        out.append(np.stack([order[:-d][same], order[d:][same]], axis=1))
    for st, sz in zip(starts[sizes > _SMALL_BUCKET], sizes[sizes > _SMALL_BUCKET]):
        members = order[st:st + sz]
        i, j = np.triu_indices(sz, _SMALL_BUCKET)  # offsets below _SMALL_BUCKET are done above
        out.append(np.stack([members[i], members[j]], axis=1))
    if not out:
        return np.zeros((0, 2), dtype=np.int64)
    pairs = np.concatenate(out).astype(np.int64)
    pairs.sort(axis=1)
    return pairs[is_new[pairs[:, 0]] | is_new[pairs[:, 1]]]


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


def signature_of(piece: Piece, opts: dict[str, Any] | None = None
                 ) -> tuple[np.ndarray, np.ndarray, str]:
    """``(signature uint32[num_perm], shingles uint64[], content_hash)`` of a piece: the one
    entry point for a file's identity artifacts (dedup's ``prepare``, the split, ``leakage``).

    The signature's second half is the MinHash of the whole set; its first half the MinHash
    (``num_perm // 2`` permutations) of the lead voice's part (``lead_part``) when that holds
    ``MIN_LEAD`` shingles, else of the whole set too. LSH bands over the first half so find
    files sharing a lead under different accompaniments; ``LSHIndex.plausible_codes`` reads
    each half on its own. ``opts`` may set ``ngram``, ``grid``, ``num_perm``, ``seed`` and
    ``max_shingles``.
    """
    o = opts or {}
    spec = ShingleSpec(ngram=int(o.get("ngram", ShingleSpec.ngram)),
                       grid=int(o.get("grid", ShingleSpec.grid)),
                       max_shingles=int(o.get("max_shingles", ShingleSpec.max_shingles)))
    sh = shingle_hashes(piece, spec)
    num_perm, seed = int(o.get("num_perm", 128)), int(o.get("seed", 1))
    lead = lead_part(sh)
    half = num_perm // 2
    if len(lead) < MIN_LEAD:
        return minhash(sh, num_perm, seed), sh, content_hash(piece)
    # speed: the whole set is hashed only under the permutations of the second half, the
    # values it keeps (the same values ``minhash(sh, num_perm, seed)[half:]`` gives)
    a, b = permutations(num_perm, seed)
    sig = np.empty(num_perm, dtype=np.uint32)
    sig[:half] = minhash(lead, half, seed)
    sig[half:] = _minhash_with(sh, a[half:], b[half:])
    return sig, sh, content_hash(piece)
