"""A signature matrix spilled to a temporary file, column after column, for the full searches.

The full searches (dedup's, ``stages.dedup``; the split's, ``grouping._streamed_links``) band
the signatures one band at a time and bound each band's pairs with the overlap sketches; the
MinHash bounds (``lsh.plausible_pairs``) need the signature values of the pairs they are asked
about. None of it needs the whole matrix in memory at once: here the matrix is written
column-major to an unnamed temporary file (from the matrix, or from its rows a block at a time),
a band's columns are read back with ``os.pread`` when it is banded, and the MinHash estimates
are counted column by column. Memory: the matrix (512 bytes a file at 128 permutations) is not
held while the sketches are (together they were the peak of each search); the file's pages stay
in the page cache, not in the process (no memory map).

``candidates.streamed_pair_codes`` and ``lsh.plausible_pair_codes`` take the store where they
take the matrix (tests/test_spilled.py checks both against the in-memory forms).
"""
from __future__ import annotations

import os
from typing import Any, Iterable

import numpy as np

from ..store.spill import read_spilled, spill_file


#: Rows written at once when spilling a matrix (memory: a transposed copy of this many rows).
_WRITE_ROWS = 1 << 13


class SpilledColumns:
    """The ``(n, width)`` uint32 matrix ``sig`` in an unnamed temporary file (in ``folder``, or
    the system's temporary folder), column ``c`` at byte ``c * n * 4``. ``close()`` removes it."""

    #: Pairs whose estimates are counted at once (memory: about 20 bytes a pair; every column
    #: is read once per such chunk, so far more pairs than the matrix's ``lsh.PAIR_CHUNK``).
    PAIRS_AT_ONCE = 1 << 20

    def __init__(self, sig: "np.ndarray | Iterable[np.ndarray]", folder: str | os.PathLike | None = None,
                 shape: tuple[int, int] | None = None):
        """``sig``: the matrix, or (with its ``shape``) its rows as blocks of consecutive rows,
        each written as it comes (memory: a caller reading the rows from a file of its own
        never holds the matrix whole: the split's search, ``columns.stacked``)."""
        if shape is None:
            matrix = np.asarray(sig, dtype=np.uint32)
            shape = matrix.shape
            sig = (matrix[lo:lo + _WRITE_ROWS] for lo in range(0, len(matrix), _WRITE_ROWS))
        self.n, self.width = (int(x) for x in shape)
        self._file = spill_file(self._pieces(sig), folder)

    def _pieces(self, blocks: "Iterable[np.ndarray]") -> "Iterable[tuple[int, bytes]]":
        """Each block's part of each column, at its place in the file."""
        lo = 0
        for block in blocks:
            t = np.ascontiguousarray(np.asarray(block, dtype=np.uint32).T)  # memory: one block transposed
            if len(t) != self.width:
                raise ValueError(f"a block of {len(t)} columns for a matrix of {self.width}")
            for c in range(self.width):
                yield (c * self.n + lo) * 4, t[c].tobytes()
            lo += t.shape[1]
        if lo != self.n:
            raise ValueError(f"blocks of {lo} rows for a matrix of {self.n}")

    @property
    def shape(self) -> tuple[int, int]:
        """``(n, width)``, as the matrix's."""
        return self.n, self.width

    def column(self, c: int) -> np.ndarray:
        """Column ``c`` of the matrix (``(n,)`` uint32)."""
        size = self.n * 4
        return np.frombuffer(read_spilled(self._file, size, c * size, f"column {c}"), dtype=np.uint32)

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

    def half_estimates(self, i: np.ndarray, j: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``lsh.half_estimates`` of the row pairs ``(i[k], j[k])``: the share of equal values
        in each half, counted a column at a time."""
        half = self.width // 2
        return (self.equal_counts(i, j, range(half)) / half,
                self.equal_counts(i, j, range(half, self.width)) / (self.width - half))

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> "SpilledColumns":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

