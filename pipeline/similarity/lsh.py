"""Locality-sensitive hashing of MinHash signatures: candidate pairs.

``LSHIndex`` bands a signature into ``bands`` bands of ``num_perm // bands`` rows; two
signatures are candidates when any band is identical, with probability ``1 - (1 - s**r)**b``
for Jaccard ``s`` (Leskovec, Rajaraman, Ullman, Mining of Massive Datasets, ch. 3).
``banded_pair_codes`` finds the pairs sharing a band in one pass over the bands (the split's
grouping), ``plausible_pairs`` drops candidates whose signatures cannot reach a threshold.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, Iterator, Protocol

import numpy as np

from ..analysis.shingles import ShingleSpec, fmix64
from ..midi.accel import kernel as compiled_kernel
from .minhash import EMPTY_VALUE, _fmix32, fold32, is_empty, permutations
from .sets import MIN_SIZE_RATIO

if TYPE_CHECKING:
    from .spilled import SpilledColumns


_ROLL = np.uint64(0x9E3779B97F4A7C15)


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
        live = ~np.all(sig == EMPTY_VALUE, axis=1)
        self.ids.extend(k for k, ok in zip(keys, live.tolist()) if ok)
        self._sigs.append(sig if live.all() else sig[live])  # memory: no copy when all are live

    def candidate_codes(self, new: set[str] | None = None,
                        skip: "np.ndarray | BandMarks | None" = None) -> np.ndarray:
        """The pairs of ids sharing a band (with ``new``, only pairs with at least one new id)
        as sorted unique codes ``i * n + j`` (``i < j`` index the ids in insertion order): 8
        bytes a pair instead of a tuple of two strings. ``skip`` (``(len(ids), bands)``
        booleans, e.g. ``generic_bands``) marks bands that pair no row: each gets a key of its
        own row. Given as ``BandMarks``, the marks are made when asked: with few new ids (a
        rerun) only for the rows sharing a band's key in the pairs found without them
        (``unskipped_codes``), else for every row at once."""
        n = len(self.ids)
        if n < 2:
            return np.zeros(0, dtype=np.int64)
        is_new = (np.ones(n, dtype=bool) if new is None
                  else np.array([k in new for k in self.ids]))
        if not is_new.any():  # every pair would be old-old: nothing to band (cheap reruns)
            return np.zeros(0, dtype=np.int64)
        sig = self.matrix()
        if skip is not None and not isinstance(skip, np.ndarray):
            if few_new(is_new):
                # speed: a rerun marks the generic bands of the rows it pairs, not of every row
                return unskipped_codes(sig, self.bands, banded_pair_codes(sig, self.bands, is_new), skip.band)
            skip = skip.every()
        if skip is None or not skip.any():
            return banded_pair_codes(sig, self.bands, is_new)
        if not sig.flags.writeable:  # e.g. one signature as read from the ledger
            sig = sig.copy()
        rows, bands = np.nonzero(skip)
        r = self.num_perm // self.bands
        cols = (bands[:, None] * r + np.arange(r)).ravel()
        cells = (np.repeat(rows, r), cols)
        saved = sig[cells]
        # the band's first value becomes the row number, the others one constant: a key no
        # other row has (a real band equal to it only adds a candidate, which is verified);
        # memory: changed in place and put back, not on a copy of the whole matrix
        fill = np.full((len(rows), r), EMPTY_VALUE - np.uint32(1), dtype=np.uint32)
        fill[:, 0] = rows.astype(np.uint32)
        try:
            sig[cells] = fill.ravel()
            return banded_pair_codes(sig, self.bands, is_new)
        finally:
            sig[cells] = saved

    def matrix(self) -> np.ndarray:
        """The signatures as one ``(len(ids), num_perm)`` uint32 array, in insertion order."""
        m = getattr(self, "_matrix", None)
        if m is None or len(m) != len(self.ids):
            if len(self._sigs) == 1 and self._sigs[0].ndim == 2:
                m = self._sigs[0]  # memory: one ``extend`` needs no second copy
            else:
                m = (np.vstack(self._sigs) if self._sigs
                     else np.zeros((0, self.num_perm), dtype=np.uint32))
                self._sigs = [m]  # memory: the rows are held once
            self._matrix = m
        return m

    def drop_signatures(self) -> None:
        """Lets the signatures go (the ids stay): for a caller that searches them from a copy
        of its own (dedup's full search, from a file: ``similarity.spilled``)."""
        self._sigs = []
        self._matrix = None

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
        if not len(codes):
            return codes
        return plausible_pair_codes(self.matrix(), codes, set_sizes, threshold, min_size_ratio=min_size_ratio,
                                    cap=cap, margin_sigmas=margin_sigmas)


def plausible_pair_codes(sig: "np.ndarray | SpilledColumns", codes: np.ndarray, set_sizes: Any,
                         threshold: float, **bounds: Any) -> np.ndarray:
    """The codes ``i * n + j`` of ``codes`` that ``plausible_pairs`` keeps (its keyword
    ``bounds``; ``sig``: the ``(n, num_perm)`` signature matrix, or the same matrix spilled,
    ``spilled.SpilledColumns``), a chunk of pairs at a time."""
    n = sig.shape[0]
    chunk = PAIR_CHUNK if isinstance(sig, np.ndarray) else sig.PAIRS_AT_ONCE
    sizes = np.asarray(set_sizes, dtype=np.float64)  # speed: converted once, not per chunk
    keep = np.empty(len(codes), dtype=bool)
    for lo in range(0, len(codes), chunk):  # memory: per-pair arrays a chunk at a time
        i, j = np.divmod(codes[lo:lo + chunk], n)
        keep[lo:lo + len(i)] = plausible_pairs(sig, i, j, sizes, threshold, **bounds)
    return codes[keep]


def plausible_pairs(sig: "np.ndarray | SpilledColumns", i: np.ndarray, j: np.ndarray, set_sizes: Any,
                    threshold: float, **bounds: Any) -> np.ndarray:
    """Mask of the pairs (rows ``i``, ``j`` of the signatures ``sig``, as
    ``plausible_pair_codes`` takes them) whose MinHash estimates (``half_estimates``) leave
    ``set_similarity`` a chance to reach ``threshold`` (``plausible_estimates``, its keyword
    ``bounds``; see ``LSHIndex.plausible_codes``, which dedup uses; the split's grouping uses it
    with a wider margin). ``set_sizes`` holds each row's shingle-set size."""
    sizes = np.asarray(set_sizes, dtype=np.float64)
    est_lead, est = half_estimates(sig, i, j)
    return plausible_estimates(est_lead, est, sizes[i], sizes[j], threshold, sig.shape[1] // 2, **bounds)


def half_estimates(sig: "np.ndarray | SpilledColumns", i: np.ndarray, j: np.ndarray
                   ) -> tuple[np.ndarray, np.ndarray]:
    """The MinHash Jaccard estimates of the row pairs ``(i[k], j[k])`` on each half of the
    signatures (``signature_of``: the leads', the whole sets'); the spilled store counts them
    a column at a time."""
    if not isinstance(sig, np.ndarray):
        return sig.half_estimates(i, j)
    half = sig.shape[1] // 2
    return pair_estimates(sig[:, :half], i, j), pair_estimates(sig[:, half:], i, j)


def plausible_estimates(est_lead: np.ndarray, est: np.ndarray, si: np.ndarray, sj: np.ndarray,
                        threshold: float, half: int, *, min_size_ratio: float = MIN_SIZE_RATIO,
                        cap: int = ShingleSpec().max_shingles, margin_sigmas: float = 3.0) -> np.ndarray:
    """``plausible_pairs``'s mask from the pairs' MinHash estimates (``est_lead`` on the
    signatures' first ``half`` values, ``est`` on the rest) and set sizes ``si``, ``sj``
    (``half_estimates``)."""
    t = float(threshold)
    lead_bound = t / (2.0 - t)
    lead_floor = lead_bound - margin_sigmas * np.sqrt(max(lead_bound * (1 - lead_bound), 1e-4) / half)
    small, large = np.minimum(si, sj), np.maximum(si, sj)
    rho = small / np.maximum(large, 1.0)
    bound = np.full(len(est), t)
    if min_size_ratio < 1.0:
        cont = small >= min_size_ratio * large
        bound[cont] = np.minimum(t, t * rho[cont] / (rho[cont] + 1.0 - t * rho[cont]))
    sd = np.sqrt(np.maximum(bound * (1.0 - bound), 1e-4) / half)
    return (est >= bound - margin_sigmas * sd) | (est_lead >= lead_floor) | (large >= cap)


#: Candidate pairs handled at once where a step makes per-pair arrays: the two (pairs x
#: num_perm) gathers of ``pair_estimates`` then take about 4 MB at 128 permutations and stay
#: in cache (DEVELOPERS.md, Bench notes).
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
                      compiled: bool = True, shifted: bool = False) -> np.ndarray:
    """Sorted unique codes ``i * n + j`` (``i < j``) of the rows of ``sig`` sharing a band,
    keeping pairs with at least one ``is_new`` row. One band's keys at a time, merged every
    ``_MERGE_BANDS`` bands, so a pair found in many bands is held about once (the whole
    (rows x bands) key table and its temporaries were several hundred MB at 100,000 files).
    With few new rows (a rerun) and the extension built, ``_smf_accel.band_pair_codes`` does
    each block of bands in one call (the same codes: integer hashing and key equality);
    ``compiled=False`` runs the numpy formulation, the specification. Speed: a rerun's dedup
    and split each band every stored signature, where the kernel is faster; with many new
    rows numpy's sort is (DEVELOPERS.md, Bench notes). With ``shifted``, every band is taken a
    second time one row over (rows ``1..r``, ``r+1..2r``, ..., the last wrapping round to row
    0): as many bands again over the same values, read from the matrix itself (the compiled
    path bands a rolled copy)."""
    kernel = compiled_kernel("band_pair_codes") if compiled and few_new(is_new) else None
    if kernel is not None:
        sig = np.ascontiguousarray(sig, dtype=np.uint32)
        new_bytes = np.ascontiguousarray(is_new, dtype=bool).view(np.uint8)
    codes = np.zeros(0, dtype=np.int64)
    rows = sig.shape[1] // bands
    rolled = None  # the compiled path's copy one row over, made once for the shifted bands
    blocks = [(shift, lo) for shift in ((0, 1) if shifted else (0,)) for lo in range(0, bands, _MERGE_BANDS)]
    for shift, lo in blocks:
        hi = min(bands, lo + _MERGE_BANDS)
        if kernel is not None:
            if shift and rolled is None:
                rolled = np.ascontiguousarray(np.roll(sig, -1, axis=1))
            found = [np.frombuffer(kernel(rolled if shift else sig, bands, lo, hi, new_bytes), dtype=np.int64)]
        elif not shift:
            found = [_band_pairs(band_key(sig, bands, band), is_new) for band in range(lo, hi)]
        else:  # the band's rows one over: a copy of r columns, not of the matrix
            found = [_band_pairs(band_key(sig[:, (band * rows + 1 + np.arange(rows)) % sig.shape[1]], 1, 0), is_new)
                     for band in range(lo, hi)]
        merged = np.concatenate([codes, *found])
        del codes, found  # memory: the split's candidates grow with the square of the corpus
        merged.sort()  # in place: no sorted copy beside the merged codes
        codes = sorted_unique(merged, is_sorted=True)
        del merged
    return codes


def unskipped_codes(sig: np.ndarray, bands: int, codes: np.ndarray,
                    skip: Callable[[np.ndarray, int], np.ndarray]) -> np.ndarray:
    """The codes ``i * n + j`` (rows of ``sig``, e.g. from ``banded_pair_codes``) of the pairs
    sharing a band key (``band_key``) in a band that neither row skips: ``skip(rows, band)``
    gives the ``(len(rows),)`` skip marks of band ``band`` of the sorted rows asked for. The
    pairs ``LSHIndex.candidate_codes`` finds with those marks given to every row (a skipped
    band gets a key of its own row: the row number, then ``EMPTY_VALUE - 1``, the top of the
    32-bit range, which the minimum of a compared set's hashes all but never reaches), found
    from the marks of the rows sharing a band's key in a pair not yet kept only (speed: most
    pairs share one band, so a rerun marks about two cells a pair, not every band of a row)."""
    n = len(sig)
    if not len(codes):
        return codes
    i, j = np.divmod(codes, n)
    rows = sorted_unique(np.concatenate([i, j]))
    li, lj = np.searchsorted(rows, i), np.searchsorted(rows, j)
    sub = sig[rows]
    keep = np.zeros(len(codes), dtype=bool)
    marked = np.zeros(len(rows), dtype=bool)
    for band in range(bands):
        key = band_key(sub, bands, band)
        at = np.flatnonzero((key[li] == key[lj]) & ~keep)
        if not len(at):
            continue
        asked = sorted_unique(np.concatenate([li[at], lj[at]]))
        marked[asked] = np.asarray(skip(rows[asked], band), dtype=bool)
        keep[at] = ~(marked[li[at]] | marked[lj[at]])
        marked[asked] = False
    return codes[keep]


#: Bands whose pair codes are merged at once (a pair shares many bands: memory).
_MERGE_BANDS = 8


def sorted_unique(a: np.ndarray, is_sorted: bool = False) -> np.ndarray:
    """``np.unique(a)`` of a 1-d array, by one sort (none when ``is_sorted``). Speed: numpy
    2.3+ answers ``np.unique`` of integers through a hash table first, much slower here
    (DEVELOPERS.md, Bench notes)."""
    s = a if is_sorted else np.sort(a)
    if len(s) < 2:
        return s
    keep = np.empty(len(s), dtype=bool)
    keep[0] = True
    np.not_equal(s[1:], s[:-1], out=keep[1:])
    return s[keep]


#: Buckets up to this size are paired by vectorized offsets; bigger ones one by one.
_SMALL_BUCKET = 32


def _band_pairs(col: np.ndarray, is_new: np.ndarray) -> np.ndarray:
    """Pair codes ``i * n + j`` (``i < j``) of rows with equal keys in one band, at least one
    of them new."""
    n = len(col)
    rows = None
    if not is_new.any():
        return np.zeros(0, dtype=np.int64)  # no pair holds a new row
    if not is_new.all():
        # incremental: only the rows whose key a new row has can pair with one, found by binary
        # search in the new keys instead of pairing the whole band (a rerun with 1% new files)
        new_keys = sorted_unique(col[is_new])
        pos = np.minimum(np.searchsorted(new_keys, col), len(new_keys) - 1)
        rows = np.flatnonzero(new_keys[pos] == col)
        if len(rows) < 2:
            return np.zeros(0, dtype=np.int64)
        col, is_new = col[rows], is_new[rows]
    codes = [(i if rows is None else rows[i]) * n + (j if rows is None else rows[j])
             for i, j in equal_key_pairs(col, is_new)]  # rows ascend: i < j stays
    return np.concatenate(codes) if codes else np.zeros(0, dtype=np.int64)


#: At or below one new row in this many, a search takes the rerun's path (``few_new``).
_FEW_NEW = 16


def few_new(is_new: np.ndarray) -> bool:
    """Whether the rows marked new are few (a rerun: one row in ``_FEW_NEW`` or fewer): then
    the compiled banding runs, dedup marks the
    generic bands of the paired rows only, and the candidates are few enough to need no
    streaming (``candidates.streamed_pair_codes`` serves the other searches)."""
    return int(np.count_nonzero(is_new)) * _FEW_NEW <= len(is_new)


#: Pairs of one band handled at once (memory: a band's few large buckets held hundreds of
#: thousands of pairs each at 100,000 files, and their count grows with the square of a bucket).
STREAM_PAIRS = 1 << 16


def equal_key_pairs(key: np.ndarray, is_new: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """The pairs ``(i, j)``, ``i < j``, of rows with equal ``key``, at least one ``is_new``, by
    sorting the key (offsets below ``_SMALL_BUCKET`` within the sorted key, then the rest of
    each larger bucket), at most ``STREAM_PAIRS`` at a time: the one pairing of a band, for
    the whole-corpus banding (``_band_pairs``) and the streamed one (``candidates``)."""
    n = len(key)
    order = np.argsort(key, kind="stable")
    sc = key[order]
    starts = np.flatnonzero(np.concatenate(([True], sc[1:] != sc[:-1])))
    sizes = np.diff(np.append(starts, n))
    if not len(sizes) or sizes.max() < 2:
        return
    pieces: list[tuple[np.ndarray, np.ndarray]] = []
    for d in range(1, min(int(sizes.max()), _SMALL_BUCKET)):
        at = np.flatnonzero(sc[:-d] == sc[d:])
        if not len(at):
            break
        for lo in range(0, len(at), STREAM_PAIRS):
            pieces.append((order[at[lo:lo + STREAM_PAIRS]], order[at[lo:lo + STREAM_PAIRS] + d]))
        yield from _ordered_new(pieces, is_new)
    for st, sz in zip(starts[sizes > _SMALL_BUCKET].tolist(), sizes[sizes > _SMALL_BUCKET].tolist()):
        members = order[st:st + sz]
        count = sz - _SMALL_BUCKET - np.arange(sz - _SMALL_BUCKET)  # partners of each row a
        ends = np.cumsum(count)
        a0 = 0
        while a0 < len(count):  # rows a0..a1-1 with all their partners b >= a + _SMALL_BUCKET
            a1 = max(a0 + 1, int(np.searchsorted(ends, (ends[a0 - 1] if a0 else 0) + STREAM_PAIRS, "right")))
            a = np.repeat(np.arange(a0, a1), count[a0:a1])
            first = np.repeat(ends[a0:a1] - count[a0:a1], count[a0:a1])
            b = np.arange(len(a)) + (ends[a0 - 1] if a0 else 0) - first + a + _SMALL_BUCKET
            pieces.append((members[a], members[b]))
            yield from _ordered_new(pieces, is_new)
            a0 = a1


def _ordered_new(pieces: list[tuple[np.ndarray, np.ndarray]], is_new: np.ndarray
                 ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Empties ``pieces``: each as ``(min, max)`` rows, only pairs with a new row."""
    while pieces:
        x, y = pieces.pop()
        i, j = np.minimum(x, y), np.maximum(x, y)
        if not is_new.all():
            new = is_new[i] | is_new[j]
            i, j = i[new], j[new]
        if len(i):
            yield i.astype(np.int64), j.astype(np.int64)


class BandMarks(Protocol):
    """Marks of the bands that pair no row (``LSHIndex.candidate_codes``), made when asked."""

    def every(self) -> np.ndarray:
        """``(rows, bands)`` booleans: every band of every row."""
        ...

    def band(self, rows: np.ndarray, band: int) -> np.ndarray:
        """``(len(rows),)`` booleans: band ``band`` of the rows ``rows``."""
        ...


def generic_bands(sig: np.ndarray, generic: np.ndarray, bands: int, seed: int) -> np.ndarray:
    """``(rows, bands)`` booleans: the LSH bands of ``signature_of`` signatures whose every value
    is the MinHash value of a ``generic`` shingle under that column's permutation. Such a band
    key is made of generic material only: two unrelated files sharing it are what makes the
    candidates of a large corpus grow with its square, and ``set_similarity`` leaves those
    shingles out anyway. A column of the first half may come from the lead's permutations or
    (lead too short) the whole set's: a value matching either counts."""
    n, num_perm = np.shape(sig)
    return _generic_values(sig, generic, range(num_perm), seed).reshape(n, bands, num_perm // bands).all(axis=2)


class GenericBands:
    """``BandMarks`` of the bands ``generic_bands`` marks, for the signatures ``matrix()``
    gives (e.g. an index's rows): all at once, or one band of some rows (only its columns
    compared)."""

    def __init__(self, matrix: Callable[[], np.ndarray], generic: np.ndarray, bands: int, seed: int):
        self._matrix, self._generic, self._bands, self._seed = matrix, generic, bands, seed

    def every(self) -> np.ndarray:
        return generic_bands(self._matrix(), self._generic, self._bands, self._seed)

    def band(self, rows: np.ndarray, band: int) -> np.ndarray:
        sig = self._matrix()
        r = sig.shape[1] // self._bands
        return _generic_values(sig[rows], self._generic, range(band * r, (band + 1) * r), self._seed).all(axis=1)


def _generic_values(sig: np.ndarray, generic: np.ndarray, columns: range, seed: int) -> np.ndarray:
    """``(rows, len(columns))`` booleans: the signature values of ``columns`` that are the
    MinHash value of a ``generic`` shingle (``generic_bands``)."""
    sig = np.asarray(sig, dtype=np.uint32)
    n, num_perm = sig.shape
    hit = np.zeros((n, len(columns)), dtype=bool)
    if not n or not len(generic):
        return hit
    half = num_perm // 2
    h = _fmix32(fold32(generic))
    a, b = permutations(num_perm, seed)
    la, lb = permutations(half, seed)
    with np.errstate(over="ignore"):
        for at, c in enumerate(columns):
            vals = h * a[c] + b[c]
            if c < half:
                vals = np.concatenate([vals, h * la[c] + lb[c]])
            vals.sort()
            pos = np.minimum(np.searchsorted(vals, sig[:, c]), len(vals) - 1)
            hit[:, at] = vals[pos] == sig[:, c]
    return hit
