"""Candidate pairs streamed band by band, each piece filtered at once: the one banding loop of a
full search, over signatures in memory or spilled to a file (the full searches of dedup and the
split band from the file).

``lsh.banded_pair_codes`` returns every candidate pair of a corpus as one sorted array of
codes; the pairs that share a band grow with the square of the corpus (millions at 100,000
files), and holding them all, with the merges that make them unique, was the main process's
largest transient at 100,000 and 300,000 files (DEVELOPERS.md, Measurement history, Throughput,
reruns and memory). Here
each band is banded on its own, from its columns only (a matrix in memory, or
``spilled.SpilledColumns``, read back a band at a time), and its pairs made a bounded piece at
a time; the caller's ``keep`` filter (exact bounds, MinHash bounds) runs on each piece at once:
only its survivors are held. Over a matrix in memory, the pairs an earlier band already found
are dropped by comparing the pair's signature values there (no set of the codes seen so far is
kept), so ``keep`` meets each pair once (dedup counts them); the spilled store cannot read
rows cheaply (a row is spread over every column), so there a pair found in several bands is
filtered once per band and made unique at the end, or, asked for (``once``: dedup's full
search, which counts them), the pieces are gathered up to ``ONCE_PAIRS`` pairs and tested
against the earlier bands' columns, each read once per gathering. The result is the codes of
``banded_pair_codes`` that ``keep`` keeps, sorted and unique (tests/test_candidates.py and
tests/test_spilled.py check it against brute-force banding and against ``banded_pair_codes``
filtered afterwards).
"""
from __future__ import annotations

from typing import TYPE_CHECKING, Callable

import numpy as np

from .lsh import PAIR_CHUNK, band_key, check_banding, equal_key_pairs, sorted_unique
from .minhash import EMPTY_VALUE

if TYPE_CHECKING:
    from .spilled import SpilledColumns


def streamed_pair_codes(source: "np.ndarray | SpilledColumns", bands: int, is_new: np.ndarray,
                        keep: Callable[[np.ndarray], np.ndarray], *, shifted: bool = False,
                        skip: np.ndarray | None = None, once: bool = False) -> np.ndarray:
    """The sorted unique codes ``i * n + j`` (``i < j``, rows of the signatures ``source``: an
    ``(n, num_perm)`` matrix, or the same matrix spilled, ``spilled.SpilledColumns``) of
    ``banded_pair_codes(sig, bands, is_new, shifted=shifted)`` that ``keep`` keeps.

    The bands are taken one at a time (with ``shifted``, every band again one column over, the
    last wrapping round to column 0), and a band's pairs at most ``lsh.STREAM_PAIRS`` at a
    time; ``keep(codes)`` gets each such piece's pairs (sorted unique codes) and returns the
    ones to keep (a pure per-pair filter, so filtering each piece gives what filtering all
    candidates would). From a matrix it gets only the pairs not found in an earlier band (no
    band before holds equal values in both rows: each pair once over the whole call, but for a
    pair found only through equal 64-bit band keys of unequal values, which the final unique
    merge absorbs); from the spilled store, a pair once per band that finds it, or with
    ``once`` as from a matrix (its pieces gathered, at most ``ONCE_PAIRS`` pairs and one
    band's piece more, and handed over sorted, no longer one band's each). ``skip``
    (``(n, bands)`` booleans, as ``LSHIndex.candidate_codes`` takes them) marks bands that pair
    no row: such a band of row ``i`` is keyed on the values ``(i, EMPTY_VALUE - 1, ...)``, as
    there; not with ``shifted``."""
    in_memory = isinstance(source, np.ndarray)
    n, num_perm = source.shape
    err = check_banding(num_perm, bands)
    if err:
        raise ValueError(err)
    if skip is not None and shifted:
        raise ValueError("skip marks apply to the plain bands only; shifted bands take none")
    rows = num_perm // bands
    # every band's columns in band order: the plain bands, then (shifted) each one row over
    cols = [np.arange(b * rows, (b + 1) * rows) for b in range(bands)]
    if shifted:
        cols += [(c + 1) % num_perm for c in cols[:bands]]
    kept: list[np.ndarray] = []
    gathered = _Gathered(source, cols, skip, keep, kept) if once and not in_memory else None
    for b, c in enumerate(cols):
        block = source[:, c] if in_memory else source.columns(c)  # memory: this band's columns only
        if skip is not None:
            _fill_skipped(block, skip[:, b:b + 1], rows, np.arange(n))
        # keyed as band 0 of its own: the keys move by one constant, the pairs are the band's
        key = band_key(block, 1, 0)
        del block
        for i, j in equal_key_pairs(key, is_new):
            codes = np.sort(i * n + j)
            if in_memory:
                codes = codes[_first_found_in(source, codes, cols, b, skip)]
            if gathered is not None:
                gathered.add(codes, b)
            elif len(codes):
                kept.append(keep(codes))
            del codes
        del key
    if gathered is not None:
        gathered.flush()
    if not kept:
        return np.zeros(0, dtype=np.int64)
    return sorted_unique(np.concatenate(kept))


def _fill_skipped(block: np.ndarray, marks: np.ndarray, rows: int, row_ids: np.ndarray) -> None:
    """Writes into ``block`` (``(m, bands * rows)``, one row per ``row_ids``) the values of the
    skipped bands ``marks`` (``(m, bands)``): the row's number, then ``EMPTY_VALUE - 1``."""
    r, b = np.nonzero(marks)
    if not len(r):
        return
    view = block.reshape(len(block), -1, rows)
    view[r, b, :] = EMPTY_VALUE - np.uint32(1)
    view[r, b, 0] = row_ids[r].astype(np.uint32)


def _first_found_in(sig: np.ndarray, codes: np.ndarray, cols: list[np.ndarray], band: int,
                    skip: np.ndarray | None) -> np.ndarray:
    """Mask of the codes whose two rows hold different values in every band before ``band``
    (``cols``: each band's columns, in band order; ``skip``: the plain bands' marks, filled as
    ``streamed_pair_codes`` fills them), a chunk of pairs at a time."""
    fresh = np.ones(len(codes), dtype=bool)
    if not band or not len(codes):
        return fresh
    n = len(sig)
    rows = len(cols[0])
    earlier = np.concatenate(cols[:band])
    for lo in range(0, len(codes), PAIR_CHUNK):  # memory: per-pair arrays a chunk at a time
        i, j = np.divmod(codes[lo:lo + PAIR_CHUNK], n)
        a, b = sig[i], sig[j]
        if skip is not None:
            _fill_skipped(a, skip[i], rows, i)
            _fill_skipped(b, skip[j], rows, j)
        same = (a[:, earlier] == b[:, earlier]).reshape(len(i), band, rows).all(axis=2).any(axis=1)
        fresh[lo:lo + len(i)] = ~same
    return fresh


#: Pairs gathered at once by ``streamed_pair_codes(once=True)`` over a spilled store (memory:
#: about 40 bytes a pair while the earlier bands are read; each gathering reads every column
#: at most twice, here and in dedup's MinHash bounds).
ONCE_PAIRS = 1 << 18


class _Gathered:
    """The pieces of a spilled store's bands gathered for ``streamed_pair_codes(once=True)``:
    when they hold ``ONCE_PAIRS`` pairs, those found in an earlier band than their own are
    dropped (``_first_found_in_store``) and the rest, sorted, go to ``keep`` (its result to
    ``kept``). Memory: the codes of one gathering and a band number each (``ONCE_PAIRS``)."""

    def __init__(self, store: "SpilledColumns", cols: list[np.ndarray], skip: np.ndarray | None,
                 keep: Callable[[np.ndarray], np.ndarray], kept: list[np.ndarray]):
        self.store, self.cols, self.skip, self.keep, self.kept = store, cols, skip, keep, kept
        self.codes: list[np.ndarray] = []
        self.bands: list[np.ndarray] = []
        self.count = 0

    def add(self, codes: np.ndarray, band: int) -> None:
        self.codes.append(codes)
        self.bands.append(np.full(len(codes), band, dtype=np.int32))
        self.count += len(codes)
        if self.count >= ONCE_PAIRS:
            self.flush()

    def flush(self) -> None:
        if not self.count:
            return
        codes, bands = np.concatenate(self.codes), np.concatenate(self.bands)
        self.codes, self.bands, self.count = [], [], 0
        codes = codes[_first_found_in_store(self.store, codes, bands, self.cols, self.skip)]
        del bands
        if len(codes):
            self.kept.append(self.keep(np.sort(codes)))


def _first_found_in_store(store: "SpilledColumns", codes: np.ndarray, found_in: np.ndarray,
                          cols: list[np.ndarray], skip: np.ndarray | None) -> np.ndarray:
    """``_first_found_in`` over the spilled store for codes of several bands (``found_in``:
    each code's band): mask of the codes whose two rows hold different values in every band
    before their own, the values of skipped bands as ``_fill_skipped`` writes them; each
    earlier band's columns read once."""
    n = store.n
    i, j = np.divmod(codes, n)
    seen = np.zeros(len(codes), dtype=bool)
    fill = np.array([EMPTY_VALUE - np.uint32(1)], dtype=np.uint32)
    for b in range(int(found_in.max(initial=0))):
        same = found_in > b  # only pairs of a later band ask about band b
        si = sj = None
        if skip is not None:
            si, sj = skip[i, b], skip[j, b]
        for k, c in enumerate(cols[b].tolist()):
            v = store.column(c)
            vi, vj = v[i], v[j]
            del v
            if si is not None:
                vi[si] = i[si].astype(np.uint32) if k == 0 else fill
                vj[sj] = j[sj].astype(np.uint32) if k == 0 else fill
            same &= vi == vj
            del vi, vj
        seen |= same
    return ~seen
