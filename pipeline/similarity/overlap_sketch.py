"""Exact upper bounds on the overlap of two shingle sets, from one bitmap per set.

The split's grouping searches at a low threshold (0.2), where LSH bands of 2 rows make most
pairs of a large corpus that share some material candidates, and MinHash estimates on 64 values
cannot tell a pair at 0.05 from one at the bound of a containment (0.07 and below) with a small
error. This filter is exact instead: every set is hashed once into a bitmap of ``bits`` bits
(lead-voice shingles in the first half, the others in the second), and a common shingle sets a
common bit, so the intersection of two sets is at most the common bits plus the fewer of the
shingles lost to collisions within either set (``lost``: set size minus set bits; in a bucket
holding ``x`` and ``y`` shingles of the two sets, at most ``min(x, y) <= 1 + min(x - 1, y - 1)``
are common). ``set_similarity`` grows with the intersection for fixed set sizes
(``sets.measure_of_counts``), so a pair whose bound stays below the threshold cannot reach it and
needs no exact comparison; no pair at or above it is ever dropped. Dedup (threshold 0.3) uses it
too, on its sets without the generic shingles: there most plausible pairs by MinHash estimate
lie below the threshold too, and reading their sets for the exact comparison was most of its step.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from ..analysis.shingles import LEAD_LIMIT, ShingleSpec
from .sets import LEAD_CONTAINED, MIN_LEAD, MIN_SIZE_RATIO, drop_generic, measure_of_counts


#: Bits of each set's bitmap: 512 bytes a file in some pair while the pairs are bounded.
SKETCH_BITS = 4096


#: Sets read and hashed at once (memory: the sets of one chunk only).
_READ_CHUNK = 256


@dataclass
class Sketches:
    """Bitmaps (``(n, bits // 64)`` uint64, lead half first) and, per set, its size, its lead's
    size and the shingles each half lost to collisions."""

    bits: np.ndarray
    size: np.ndarray
    lead: np.ndarray
    lost_lead: np.ndarray
    lost_rest: np.ndarray


def sketch_sets(sets: list[np.ndarray], bits: int = SKETCH_BITS) -> Sketches:
    """The sketches of sorted unique uint64 shingle sets (``bits``: a power of two, >= 128), as
    given (leave generic shingles out first: ``sets.drop_generic``)."""
    if bits < 128 or bits & (bits - 1):
        raise ValueError(f"bits ({bits}) must be a power of two of at least 128")
    n, words, half = len(sets), bits // 64, bits // 2
    size = np.array([len(x) for x in sets], dtype=np.int64)
    out = np.zeros((n, words), dtype=np.uint64)
    lead = np.zeros(n, dtype=np.int64)
    if n and size.sum():
        flat = np.concatenate([np.asarray(x, dtype=np.uint64) for x in sets])
        row = np.repeat(np.arange(n), size)
        is_lead = flat < LEAD_LIMIT
        pos = (flat & np.uint64(half - 1)).astype(np.int64) + np.where(is_lead, 0, half)
        np.bitwise_or.at(out, (row, pos >> 6), np.left_shift(np.uint64(1), (pos & 63).astype(np.uint64)))
        lead = np.bincount(row[is_lead], minlength=n).astype(np.int64)
    set_lead = np.bitwise_count(out[:, :words // 2]).sum(axis=1, dtype=np.int64)
    set_rest = np.bitwise_count(out[:, words // 2:]).sum(axis=1, dtype=np.int64)
    return Sketches(out, size, lead, lead - set_lead, size - lead - set_rest)


def may_reach(sk: Sketches, i: np.ndarray, j: np.ndarray, threshold: float, *,
              min_size_ratio: float = MIN_SIZE_RATIO, cap: int = ShingleSpec().max_shingles) -> np.ndarray:
    """Mask of the pairs ``(i[k], j[k])`` whose ``pair_similarities`` value may reach
    ``threshold``: the value with each intersection at its bound (whole sets and, where both
    leads hold ``MIN_LEAD`` shingles, leads, as ``pair_similarities`` compares them). Pairs
    with a set of ``cap`` shingles or more are kept (they are compared on a cut range)."""
    half = sk.bits.shape[1] // 2
    both = sk.bits[i] & sk.bits[j]
    up_lead = (np.bitwise_count(both[:, :half]).sum(axis=1, dtype=np.int64)
               + np.minimum(sk.lost_lead[i], sk.lost_lead[j]))
    up_rest = (np.bitwise_count(both[:, half:]).sum(axis=1, dtype=np.int64)
               + np.minimum(sk.lost_rest[i], sk.lost_rest[j]))
    del both
    la, lb, lla, llb = sk.size[i], sk.size[j], sk.lead[i], sk.lead[j]
    best = measure_of_counts(np.minimum(up_lead + up_rest, np.minimum(la, lb)), la, lb, min_size_ratio)
    leads = np.flatnonzero((lla >= MIN_LEAD) & (llb >= MIN_LEAD))
    if len(leads):
        up = np.minimum(up_lead[leads], np.minimum(lla[leads], llb[leads]))
        best[leads] = np.maximum(best[leads], measure_of_counts(up, lla[leads], llb[leads], min_size_ratio,
                                                                LEAD_CONTAINED))
    return (best >= threshold) | (np.maximum(la, lb) >= cap)


def sketched_codes(keys: list[str], codes: np.ndarray, shingles: Any, threshold: float, *,
                   read: Callable[[list], list] | None = None, bits: int | None = None,
                   generic: np.ndarray | None = None, min_size_ratio: float = MIN_SIZE_RATIO) -> np.ndarray:
    """The sorted codes ``i * len(keys) + j`` (candidate pairs) that ``may_reach`` keeps: every
    set in some pair is read once (``shingles[key]``, through ``read`` a chunk at a time, as in
    ``links.verify_codes``), then the pairs are bounded a chunk at a time. ``bits``: default
    ``SKETCH_BITS``. ``generic`` and ``min_size_ratio`` as ``links.verify_codes`` is given them
    (the sets are sketched without the generic shingles, as they are compared)."""
    from .links import rows_in_codes

    n = len(keys)
    if not len(codes):
        return codes
    involved = rows_in_codes(codes, n)
    sk = sketch_rows(keys, involved, shingles, read=read, bits=bits, generic=generic)
    at = np.full(n, -1, dtype=np.int64)  # key index -> its row of the sketches
    at[involved] = np.arange(len(involved))
    return bounded_codes(sk, at, codes, threshold, min_size_ratio=min_size_ratio)


def sketch_rows(keys: list[str], rows: np.ndarray, shingles: Any, *,
                read: Callable[[list], list] | None = None, bits: int | None = None,
                generic: np.ndarray | None = None) -> Sketches:
    """The sketches of the sets ``shingles[keys[p]]`` for ``p`` in ``rows``, in that order,
    read and hashed ``_READ_CHUNK`` sets at a time (``sketched_codes``'s arguments)."""
    bits = SKETCH_BITS if bits is None else bits
    m = len(rows)
    sk = Sketches(np.zeros((m, bits // 64), dtype=np.uint64), *(np.zeros(m, dtype=np.int64) for _ in range(4)))
    for lo in range(0, m, _READ_CHUNK):  # memory: one chunk's sets at a time
        held = [shingles[keys[p]] for p in rows[lo:lo + _READ_CHUNK].tolist()]
        part = sketch_sets([drop_generic(np.asarray(x, dtype=np.uint64), generic)
                            for x in (held if read is None else read(held))], bits)
        del held
        for f in ("bits", "size", "lead", "lost_lead", "lost_rest"):
            getattr(sk, f)[lo:lo + _READ_CHUNK] = getattr(part, f)
    return sk


def bounded_codes(sk: Sketches, at: np.ndarray, codes: np.ndarray, threshold: float, *,
                  min_size_ratio: float = MIN_SIZE_RATIO) -> np.ndarray:
    """The codes ``i * len(at) + j`` that ``may_reach`` keeps, ``at[i]`` being key ``i``'s row
    of ``sk``; a chunk of pairs at a time."""
    from .lsh import PAIR_CHUNK

    n = len(at)
    keep = np.empty(len(codes), dtype=bool)
    for lo in range(0, len(codes), PAIR_CHUNK):  # memory: per-pair arrays a chunk at a time
        c = codes[lo:lo + PAIR_CHUNK]
        keep[lo:lo + len(c)] = may_reach(sk, at[c // n], at[c % n], threshold, min_size_ratio=min_size_ratio)
    return codes[keep]
