"""A corpus stage's per-file artifacts as columns: one array per name for the whole run
instead of a dict of values per file (``Ledger.artifact_columns``).

Memory: as a dict per file, dedup's artifacts cost about 1.3 KB per file in the main process
(a dict, a 512-byte signature array with its own header, a shingle handle with its shape
text, the parsed scalars); as columns, a signature is one row of one matrix, a number one
cell of an int64 or float64 column, and a deferred array's handle is made when read (texts
stay ``str`` objects in a list). ``row(i)`` reads like the dict it replaces
(``Member.artifacts[stage]``): the same names, and values equal to those the dict held
(arrays read-only, numbers as Python ``int``/``float``).
"""
from __future__ import annotations

import sys
from collections.abc import Mapping
from typing import Any, Callable, Iterator

import numpy as np

from .spill import read_spilled, spill_file

__all__ = ["ArtifactColumns", "ArtifactRow", "ValuesOf", "column_of", "lengths_of", "present", "stacked"]

_MISSING = object()


class _ArrayColumn:
    """Equal-shape arrays of one name as the rows of one matrix; arrays of several shapes or
    dtypes as a list of arrays (the rare case: the matrix is given up for the list). Row ``i``
    is the matrix's row ``i``, or ``place[i]`` once ``first`` has reordered the matrix. The
    matrix may be ``spill``ed to a file (``spilled``: the file, the matrix's shape and dtype),
    read back when a reader needs it whole or a row is written."""

    __slots__ = ("n", "matrix", "has", "rows", "place", "spilled")

    def __init__(self, n: int):
        self.n = n
        self.matrix: np.ndarray | None = None
        self.has: np.ndarray | None = None
        self.rows: list | None = None
        self.place: np.ndarray | None = None  # row -> its matrix row (None: the same)
        self.spilled: tuple | None = None  # (file, shape, dtype) while the matrix is in a file

    def __del__(self) -> None:
        if self.spilled is not None:  # closed with the column, not by the collector (which warns)
            self.spilled[0].close()

    def _at(self, i: Any) -> Any:
        return i if self.place is None else self.place[i]

    def put(self, i: int, arr: np.ndarray) -> None:
        if self.spilled is not None:
            self._load()
        if self.rows is None:
            if self.matrix is None:
                self.matrix = np.zeros((self.n, *arr.shape), dtype=arr.dtype)
                self.has = np.zeros(self.n, dtype=bool)
            if arr.dtype == self.matrix.dtype and arr.shape == self.matrix.shape[1:]:
                self.matrix[self._at(i)] = arr
                self.has[i] = True
                return
            self.rows = [self._row(j) if self.has[j] else None for j in range(self.n)]
            self.matrix = self.has = self.place = None
        self.rows[i] = arr

    def put_block(self, at: list[int], block: np.ndarray) -> None:
        """Rows ``at`` set to the rows of ``block`` (arrays of one dtype and shape)."""
        if self.spilled is not None:
            self._load()
        if self.rows is None and self.matrix is None:
            self.matrix = np.zeros((self.n, *block.shape[1:]), dtype=block.dtype)
            self.has = np.zeros(self.n, dtype=bool)
        if self.rows is None and block.dtype == self.matrix.dtype and block.shape[1:] == self.matrix.shape[1:]:
            idx = np.asarray(at, dtype=np.intp)
            self.matrix[self._at(idx)] = block
            self.has[idx] = True
            return
        for i, arr in zip(at, block):  # another shape than the column's: one by one
            arr = arr.copy()
            arr.flags.writeable = False
            self.put(i, arr)

    def _row(self, i: int) -> np.ndarray:
        # a private copy when giving up the matrix (read-only like a stored array)
        arr = self.matrix[self._at(i)].copy()
        arr.flags.writeable = False
        return arr

    def finish(self) -> None:
        if self.matrix is not None:
            self.matrix.flags.writeable = False  # as a stored array reads (numpy over bytes)

    def get(self, i: int) -> Any:
        if self.rows is not None:
            v = self.rows[i]
            return _MISSING if v is None else v
        if not self.has[i]:
            return _MISSING
        if self.spilled is not None:
            return self._spilled_rows(int(self._at(i)), 1)[0]
        return self.matrix[self._at(i)]

    def holds(self, i: int) -> bool:
        return self.rows[i] is not None if self.rows is not None else bool(self.has[i])

    def first(self, at: np.ndarray) -> np.ndarray:
        """The rows ``at`` (distinct, each held) as a read-only view of the first rows of the
        matrix, which is reordered when they do not already lie there in that order. Memory:
        a corpus step's search reads its members' signatures from the column itself, not from
        a gathered copy beside it (the reordering copies the matrix once, and the old one goes
        unless a reader still holds a row of it; a spilled matrix is read back in the new order)."""
        where = self._at(at)
        k = len(where)
        total = self.n_matrix_rows()
        if not np.array_equal(where, np.arange(k)):
            rest = np.ones(total, dtype=bool)
            rest[where] = False
            order = np.concatenate([where, np.flatnonzero(rest)])
            moved = np.empty(len(order), dtype=np.intp)  # old matrix row -> new one
            moved[order] = np.arange(len(order))
            if self.spilled is not None:
                self._load(moved)
                matrix = self.matrix
            else:
                matrix = self.matrix[order]
            self.place = moved if self.place is None else moved[self.place]
            self.matrix = matrix
        elif self.spilled is not None:
            self._load()
        view = self.matrix[:k]
        view.flags.writeable = False  # the readers' view only: the column may still be written
        return view

    def row_blocks(self, at: np.ndarray) -> Iterator[np.ndarray]:
        """The rows ``at`` (each held), in that order, ``_LOAD_ROWS`` at a time; a spilled
        matrix's rows are read from its file (memory: the matrix is not read back whole, nor
        reordered)."""
        where = self._at(at)
        for lo in range(0, len(where), _LOAD_ROWS):
            part = where[lo:lo + _LOAD_ROWS]
            if self.spilled is None:
                yield self.matrix[part]
                continue
            # a run of consecutive matrix rows is one read
            cut = np.flatnonzero(np.diff(part) != 1) + 1
            yield np.concatenate([self._spilled_rows(int(part[a]), int(b - a)) for a, b in
                                  zip(np.append(0, cut).tolist(), np.append(cut, len(part)).tolist())])

    def n_matrix_rows(self) -> int:
        return self.spilled[1][0] if self.spilled is not None else len(self.matrix)

    def whole(self) -> np.ndarray:
        """The matrix, read back first when spilled."""
        if self.spilled is not None:
            self._load()
        return self.matrix

    def spill(self, folder: str | None = None) -> None:
        """The matrix moved to an unnamed temporary file (in ``folder``, else the system's
        temporary folder), let go from memory: a row read is read from the file, and the
        matrix is read back when a reader needs it whole or a row is written. Memory: dedup's
        full search lets the signature column go once banded, the split's once it holds a
        column-major copy of its own (``similarity.spilled``); no memory map: the pages of a
        mapped file read count in the process's resident memory."""
        if self.matrix is None or self.spilled is not None or not self.matrix.size:
            return
        m = self.matrix
        f = spill_file((np.ascontiguousarray(m[lo:lo + _LOAD_ROWS]).tobytes()
                        for lo in range(0, len(m), _LOAD_ROWS)), folder)
        self.spilled = (f, m.shape, m.dtype)
        self.matrix = None

    def _spilled_rows(self, lo: int, count: int) -> np.ndarray:
        """Rows ``lo .. lo + count - 1`` of the spilled matrix (read-only)."""
        f, shape, dtype = self.spilled
        width = int(np.prod(shape[1:], dtype=np.int64)) * np.dtype(dtype).itemsize
        data = read_spilled(f, count * width, lo * width, f"rows {lo}..{lo + count - 1}")
        return np.frombuffer(data, dtype=dtype).reshape(count, *shape[1:])

    def _load(self, moved: np.ndarray | None = None) -> None:
        """The spilled matrix read back (file row ``r`` to row ``moved[r]`` when given), a block
        of rows at a time (memory: no second copy of the whole matrix), and the file closed."""
        f, shape, dtype = self.spilled
        matrix = np.empty(shape, dtype=dtype)
        for lo in range(0, shape[0], _LOAD_ROWS):
            part = self._spilled_rows(lo, min(_LOAD_ROWS, shape[0] - lo))
            if moved is None:
                matrix[lo:lo + len(part)] = part
            else:
                matrix[moved[lo:lo + len(part)]] = part
        f.close()
        self.spilled = None
        self.matrix = matrix


#: Rows of a spilled column read back at once.
_LOAD_ROWS = 1 << 13


class _DeferredColumn:
    """Arrays left in the ledger (``ledger.StoredArray``): the dtype and shape text of each
    row (texts interned: few distinct ones), the handle made when the row is read."""

    __slots__ = ("rows", "order", "dtypes", "shapes", "handle")

    def __init__(self, rows: Any, order: list[str], handle: Callable[..., Any]):
        self.rows, self.order, self.handle = rows, order, handle
        self.dtypes: list = [None] * len(order)
        self.shapes: list = [None] * len(order)

    def put(self, i: int, dtype: str, shape: str | None) -> None:
        self.dtypes[i] = sys.intern(dtype)
        self.shapes[i] = None if shape is None else sys.intern(shape)

    def finish(self) -> None:
        pass

    def get(self, i: int) -> Any:
        dtype = self.dtypes[i]
        return _MISSING if dtype is None else self.handle(self.rows, self.order[i], dtype, self.shapes[i])

    def holds(self, i: int) -> bool:
        return self.dtypes[i] is not None


class _ScalarColumn:
    """JSON scalars of one name: as an int64 or float64 column when every file has one of that
    one type, as a column of fixed-width bytes when every file has an ASCII text of one length
    (dedup's content hash: 32 bytes a file where a str object took 81), else as a list."""

    __slots__ = ("values", "column", "kind")

    def __init__(self, n: int):
        self.values: list | None = [_MISSING] * n
        self.column: np.ndarray | None = None
        self.kind: type | None = None

    def put(self, i: int, value: Any) -> None:
        self.values[i] = value

    def finish(self) -> None:
        vals = self.values
        kinds = {type(v) for v in vals}
        if len(kinds) != 1 or not vals:
            return
        kind = kinds.pop()
        if kind is int and all(-2**63 <= v < 2**63 for v in vals):
            self.column = np.array(vals, dtype=np.int64)
        elif kind is float:
            self.column = np.array(vals, dtype=np.float64)
        elif kind is str and _fixed_ascii(vals):
            self.column = np.array(vals, dtype=f"S{len(vals[0])}")
        else:
            return
        self.kind, self.values = kind, None

    def get(self, i: int) -> Any:
        if self.values is not None:
            return self.values[i]
        v = self.column[i]
        return v.decode("ascii") if self.kind is str else self.kind(v)

    def read(self, at: list[int]) -> list:
        """The values of rows ``at`` as Python objects (a column held as an array)."""
        picked = self.column[at]
        return picked.astype(str).tolist() if self.kind is str else picked.tolist()

    def holds(self, i: int) -> bool:
        return self.values is None or self.values[i] is not _MISSING


def _fixed_ascii(texts: list[str]) -> bool:
    """Every text non-empty, ASCII, of one length and without a NUL (numpy's fixed-width
    bytes drop trailing NULs)."""
    n = len(texts[0])
    return n > 0 and all(len(t) == n and t.isascii() and "\x00" not in t for t in texts)


class ArtifactColumns:
    """The artifacts of one stage for the contents ``order`` (sha256s), row ``i`` for
    ``order[i]``. Filled by ``Ledger.artifact_columns`` (``put_*``, then ``finish``); a deferred
    array is read through ``handle(rows, sha256, dtype, shape)`` (``ledger.StoredArray``), with
    ``rows`` the store's access to that name (``deferred_rows[name]``)."""

    def __init__(self, order: list[str], deferred_rows: dict[str, Any],
                 handle: Callable[..., Any] | None = None):
        self.order = order
        self._deferred_rows = deferred_rows
        self._handle = handle
        self._columns: dict[str, Any] = {}  # name -> column, in the order names were first seen
        self.spill_folder: str | None = None  # where a spilled matrix's file goes (None: the system's)

    def _column(self, name: str, make: Any) -> Any:
        col = self._columns.get(name)
        if col is None:
            col = self._columns[name] = make()
        return col

    # speed: called for every row and name of a stage (no function made per call)
    def put_array(self, i: int, name: str, arr: np.ndarray) -> None:
        col = self._columns.get(name)
        if col is None:
            col = self._column(name, lambda: _ArrayColumn(len(self.order)))
        col.put(i, arr)

    def put_deferred(self, i: int, name: str, dtype: str, shape: str | None) -> None:
        col = self._columns.get(name)
        if col is None:
            col = self._column(name, lambda: _DeferredColumn(self._deferred_rows[name], self.order, self._handle))
        col.put(i, dtype, shape)

    def put_scalar(self, i: int, name: str, value: Any) -> None:
        col = self._columns.get(name)
        if col is None:
            col = self._column(name, lambda: _ScalarColumn(len(self.order)))
        col.put(i, value)

    def put_arrays(self, name: str, at: list[int], stored: list[tuple]) -> None:
        """Arrays in their stored form (dtype, shape, bytes), row ``at[k]`` for ``stored[k]``:
        when they share one dtype and shape and fit the column's matrix, decoded from their
        joined bytes in one call (speed: no array object per row); else one by one."""
        from .codec import decode_array, shape_of
        col = self._columns.get(name)
        if col is None:
            col = self._column(name, lambda: _ArrayColumn(len(self.order)))
        dtype, shape = stored[0][0], stored[0][1]
        dims = shape_of(shape)
        if dims and all(d == dtype and s == shape for d, s, _ in stored):
            block = np.frombuffer(b"".join(data for _, _, data in stored), dtype=dtype)
            if block.size == len(stored) * int(np.prod(dims, dtype=np.int64)):
                col.put_block(at, block.reshape((len(stored), *dims)))
                return
        for i, (d, s, data) in zip(at, stored):
            col.put(i, decode_array(d, s, data))

    def put_deferred_many(self, name: str, at: list[int], shapes: list[tuple[str, str | None]]) -> None:
        """Deferred arrays' (dtype, shape) texts, row ``at[k]`` for ``shapes[k]``."""
        col = self._columns.get(name)
        if col is None:
            col = self._column(name, lambda: _DeferredColumn(self._deferred_rows[name], self.order, self._handle))
        for i, (dtype, shape) in zip(at, shapes):
            col.put(i, dtype, shape)

    def put_scalar_objects(self, at: list[int], objects: list[dict[str, Any]]) -> None:
        """Each row's JSON scalars, row ``at[k]`` for the object ``objects[k]``."""
        columns = self._columns
        for i, obj in zip(at, objects):
            for k, v in obj.items():
                col = columns.get(k)
                if col is None:
                    col = self._column(k, lambda: _ScalarColumn(len(self.order)))
                col.values[i] = v

    def finish(self) -> "ArtifactColumns":
        for col in self._columns.values():
            col.finish()
        return self

    def row(self, i: int) -> "ArtifactRow":
        """Content ``i``'s artifacts as a read-only mapping name -> value."""
        return ArtifactRow(self, i)

    def value(self, i: int, name: str) -> Any:
        col = self._columns.get(name)
        v = _MISSING if col is None else col.get(i)
        if v is _MISSING:
            raise KeyError(name)
        return v

    def names(self, i: int) -> list[str]:
        return [n for n, col in self._columns.items() if col.holds(i)]

    def holds_any(self, i: int) -> bool:
        return any(col.holds(i) for col in self._columns.values())


class ArtifactRow(Mapping):
    """One content's artifacts (a row of ``ArtifactColumns``): reads like the dict
    ``{name: value}`` it stands for; values are read from the columns on each access."""

    __slots__ = ("_cols", "_i")

    def __init__(self, cols: ArtifactColumns, i: int):
        self._cols, self._i = cols, i

    def __getitem__(self, name: str) -> Any:
        return self._cols.value(self._i, name)

    def __iter__(self) -> Iterator[str]:
        return iter(self._cols.names(self._i))

    def __len__(self) -> int:
        return len(self._cols.names(self._i))

    def __bool__(self) -> bool:  # speed: a truth test (``if not art``) makes no value
        return self._cols.holds_any(self._i)

    def __repr__(self) -> str:
        return f"ArtifactRow({self._cols.order[self._i][:16]}: {', '.join(self)})"


def _one_table(rows: list[Mapping], name: str) -> tuple[Any, list[int]] | None:
    """The column ``name`` and the row numbers of ``rows`` when every row is an
    ``ArtifactRow`` of one ``ArtifactColumns`` holding that column; else None."""
    if not rows or any(type(r) is not ArtifactRow for r in rows):
        return None
    cols = rows[0]._cols
    col = cols._columns.get(name)
    if col is None or any(r._cols is not cols for r in rows):
        return None
    return col, [r._i for r in rows]


def column_of(rows: list[Mapping], name: str) -> list:
    """``[r[name] for r in rows]`` for a name held as scalars, read from the column in one pass
    when the rows share one (speed: a corpus stage reads one value of every member)."""
    found = _one_table(rows, name)
    if found is not None and type(found[0]) is _ScalarColumn:
        col, at = found
        if col.values is None:
            return col.read(at)  # Python ints, floats or texts, as row reads give
        out = [col.values[i] for i in at]
        if all(v is not _MISSING for v in out):
            return out
    return [r[name] for r in rows]


def present(rows: list[Any], name: str) -> list[bool]:
    """``[r is not None and r.get(name) is not None for r in rows]``, read from the column's
    marks of which rows hold a value when the rows share one table (speed: no value, view or
    handle is made per row)."""
    found = _one_table(rows, name)
    if found is not None:
        col, at = found
        kind = type(col)
        if kind is _ArrayColumn:
            if col.rows is None:
                return col.has[np.array(at, dtype=np.intp)].tolist()
            return [col.rows[i] is not None for i in at]
        if kind is _DeferredColumn:
            return [col.dtypes[i] is not None for i in at]
        if col.values is None:
            return [True] * len(at)
        return [col.values[i] is not _MISSING and col.values[i] is not None for i in at]
    return [r is not None and r.get(name) is not None for r in rows]


def lengths_of(rows: list[Mapping], name: str) -> np.ndarray:
    """``len(r[name])`` for every row (int64), for arrays left in the ledger read from their
    stored shapes without making a handle per row."""
    found = _one_table(rows, name)
    if found is not None and type(found[0]) is _DeferredColumn:
        col, at = found
        if all(col.dtypes[i] is not None for i in at):
            from .codec import shape_of
            dims = [shape_of(col.shapes[i]) for i in at]
            if all(dims):
                return np.array([d[0] for d in dims], dtype=np.int64)
    return np.array([len(r[name]) for r in rows], dtype=np.int64)


def stacked(rows: list[Mapping], name: str) -> Callable[[], np.ndarray]:
    """A function giving the arrays ``rows[k][name]`` (of one shape) as the rows of one matrix.
    Memory: when every row is an ``ArtifactRow`` of one ``ArtifactColumns`` that holds them as
    one matrix, its rows are taken from it (no array object per row): for distinct rows, as a
    read-only view of the column's own matrix, reordered so they come first
    (``_ArrayColumn.first``: no second copy of the signatures during a corpus step's search);
    otherwise they are stacked from the values."""
    if rows and all(type(r) is ArtifactRow for r in rows):
        cols = rows[0]._cols
        col = cols._columns.get(name)
        if (type(col) is _ArrayColumn and (col.matrix is not None or col.spilled is not None)
                and all(r._cols is cols for r in rows)):
            at = np.array([r._i for r in rows], dtype=np.intp)
            if col.has[at].all():
                ordered = np.sort(at)
                if (ordered[1:] != ordered[:-1]).all():
                    return _FirstRows(col, at, cols.spill_folder)
                return lambda: col.whole()[col._at(at)]  # a row twice: a copy
    return lambda: np.vstack([np.asarray(r[name]) for r in rows])


class _FirstRows:
    """``stacked``'s function over one column's matrix (``_ArrayColumn.first``), its rows also
    given a block at a time (``row_blocks``); ``release()``
    moves that matrix to a file in ``folder`` when its caller no longer needs it whole in memory
    (``_ArrayColumn.spill``); a caller spilling a copy of its own may put it there too."""

    __slots__ = ("col", "at", "folder")

    def __init__(self, col: _ArrayColumn, at: np.ndarray, folder: str | None = None):
        self.col, self.at, self.folder = col, at, folder

    def __call__(self) -> np.ndarray:
        return self.col.first(self.at)

    def row_blocks(self) -> Iterator[np.ndarray]:
        """The rows of ``__call__``'s matrix a block at a time, the column left as it is
        (``_ArrayColumn.row_blocks``: a spilled one stays in its file)."""
        return self.col.row_blocks(self.at)

    def release(self) -> None:
        self.col.spill(self.folder)


class ValuesOf(Mapping):
    """key -> ``rows[key][name]``: one artifact of many files read when asked (memory: no
    handle or array per file is made ahead)."""

    __slots__ = ("_rows", "_name")

    def __init__(self, rows: Mapping[str, Mapping], name: str):
        self._rows, self._name = rows, name

    def __getitem__(self, key: str) -> Any:
        return self._rows[key][self._name]

    def __iter__(self) -> Iterator[str]:
        return iter(self._rows)

    def __len__(self) -> int:
        return len(self._rows)
