"""A signature matrix spilled to a temporary file, column after column, for the split's search.

The split's full search (``grouping._streamed_links``) bands the signatures one band at a time
and bounds each band's pairs with the overlap sketches; the MinHash bounds (``lsh.plausible_pairs``)
need the signature values of the few pairs the sketches keep. None of it needs the whole matrix
in memory at once: here the matrix is written column-major to an unnamed temporary file, a
band's columns are read back with ``os.pread`` when it is banded, and the MinHash estimates of
the surviving pairs are counted column by column. Memory: the matrix (512 bytes a file at 128
permutations) is not held while the sketches are (together they were the split's peak); the
file's pages stay in the page cache, not in the process (no memory map).

``spilled_pair_codes`` gives the codes of ``candidates.streamed_pair_codes`` (the same pairs:
``banded_pair_codes`` filtered), without its test of earlier bands (that reads whole rows): a
pair found in several bands is filtered once per band and made unique at the end
(tests/test_spilled.py checks both against the in-memory forms).
"""
from __future__ import annotations

import os
import tempfile
from typing import Any, Callable

import numpy as np

from .lsh import band_key, check_banding, equal_key_pairs, plausible_estimates, sorted_unique

#: Columns written at once when spilling (memory: a transposed copy of this many columns).
_WRITE_COLUMNS = 8

#: Pairs whose estimates are counted at once (memory: about 20 bytes a pair).
_COUNT_PAIRS = 1 << 20


class SpilledColumns:
    """The ``(n, width)`` uint32 matrix ``sig`` in an unnamed temporary file (in ``folder``, or
    the system's temporary folder), column ``c`` at byte ``c * n * 4``. ``close()`` removes it."""

    def __init__(self, sig: np.ndarray, folder: str | os.PathLike | None = None):
        sig = np.asarray(sig, dtype=np.uint32)
        self.n, self.width = sig.shape
        self._file = tempfile.TemporaryFile(dir=folder)
        for c in range(0, self.width, _WRITE_COLUMNS):
            self._file.write(np.ascontiguousarray(sig[:, c:c + _WRITE_COLUMNS].T).tobytes())
        self._file.flush()

    def column(self, c: int) -> np.ndarray:
        """Column ``c`` of the matrix (``(n,)`` uint32)."""
        size = self.n * 4
        data = os.pread(self._file.fileno(), size, c * size)
        if len(data) != size:
            raise OSError(f"{self._file.name}: column {c} of the spilled signatures read "
                          f"{len(data)} of {size} bytes")
        return np.frombuffer(data, dtype=np.uint32)

    def columns(self, cols: Any) -> np.ndarray:
        """The columns ``cols`` as an ``(n, len(cols))`` matrix."""
        cols = [int(c) for c in cols]
        out = np.empty((self.n, len(cols)), dtype=np.uint32)
        for k, c in enumerate(cols):
            out[:, k] = self.column(c)
        return out

    def equal_counts(self, i: np.ndarray, j: np.ndarray, cols: range) -> np.ndarray:
        """For each pair of rows ``(i[k], j[k])``, how many of the columns ``cols`` hold equal
        values (int64)."""
        count = np.zeros(len(i), dtype=np.int64)
        for c in cols:
            v = self.column(c)
            count += v[i] == v[j]
        return count

    def plausible_codes(self, codes: np.ndarray, set_sizes: np.ndarray, threshold: float,
                        **bounds: Any) -> np.ndarray:
        """``lsh.plausible_pair_codes`` over the spilled matrix: the codes ``i * n + j`` whose
        MinHash estimates (share of equal values in each half) leave ``set_similarity`` a chance
        to reach ``threshold``; the same estimates, counted a column at a time."""
        half = self.width // 2
        sizes = np.asarray(set_sizes, dtype=np.float64)
        keep = np.empty(len(codes), dtype=bool)
        for lo in range(0, len(codes), _COUNT_PAIRS):  # memory: per-pair arrays a chunk at a time
            i, j = np.divmod(codes[lo:lo + _COUNT_PAIRS], self.n)
            est_lead = self.equal_counts(i, j, range(half)) / half
            est = self.equal_counts(i, j, range(half, self.width)) / (self.width - half)
            keep[lo:lo + len(i)] = plausible_estimates(est_lead, est, sizes[i], sizes[j], threshold,
                                                       half, **bounds)
        return codes[keep]

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> "SpilledColumns":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


def spilled_pair_codes(store: SpilledColumns, bands: int, is_new: np.ndarray,
                       keep: Callable[[np.ndarray], np.ndarray], *, shifted: bool = False) -> np.ndarray:
    """The sorted unique codes ``i * n + j`` (``i < j``) of the pairs of ``store``'s rows sharing
    a band, with at least one ``is_new`` row, that ``keep`` keeps: the pairs of
    ``lsh.banded_pair_codes(sig, bands, is_new, shifted=shifted)`` filtered by ``keep`` (a pure
    per-pair filter given sorted unique codes). A band's columns are read when it is banded,
    its pairs ``lsh.STREAM_PAIRS`` at a time; with ``shifted`` every band is taken again one
    column over (the last wrapping round to column 0)."""
    n, width = store.n, store.width
    err = check_banding(width, bands)
    if err:
        raise ValueError(err)
    rows = width // bands
    cols = [np.arange(b * rows, (b + 1) * rows) for b in range(bands)]
    if shifted:
        cols += [(c + 1) % width for c in cols[:bands]]
    kept: list[np.ndarray] = []
    for c in cols:
        key = band_key(store.columns(c), 1, 0)
        for i, j in equal_key_pairs(key, is_new):
            codes = sorted_unique(i * n + j)
            kept.append(keep(codes))
            del codes
        del key
    if not kept:
        return np.zeros(0, dtype=np.int64)
    return sorted_unique(np.concatenate(kept))
