"""The one result type: a stage's verdict on one file (``Result``, which stages know as
``StageResult``), in a compact form the main process holds for a whole run.

A run keeps one result per (file, stage) from the per-file pass until the manifest is written:
at 100,000 files and four per-file stages that is 400,000 results. As plain dicts (an outer
dict, a values dict, a thresholds dict) they cost about 3.4 KB per file. A ``Result`` keeps the
values either as the JSON text the ledger stores (results from workers and from the ledger:
parsed only when read) or as a tuple under a value-name tuple shared by every result of the
stage (results made in the main process), and the thresholds shared with the stage's previous
result when equal.

A ``Result`` reads like the result dict it replaces (``r["kept"]``, ``r["values"]``,
``{**r}``, ``r.get("thresholds")``), so the ledger, the workers and the manifest need not know.
"""
from __future__ import annotations

import json
import sys
from array import array
from collections.abc import Iterable, Mapping
from typing import Any, Iterator, Protocol

from .codec import canonical_json, thresholds_from_json

__all__ = ["Result", "Compactor", "TrailValues", "Verdicts"]

_FIELDS = ("kept", "reason", "detail", "values", "thresholds")
_DECODER = json.JSONDecoder()
#: Value-name tuples shared by every result with the same value names (few distinct ones).
_SHARED_NAMES: dict[tuple[str, ...], tuple[str, ...]] = {}
_MISSING = object()
_intern = sys.intern


class Result:
    """One stage's verdict on one file: ``kept``, ``reason``, ``detail``, ``values``,
    ``thresholds``. Read-only; ``values`` builds a new dict on each access (use ``value`` for
    one name).

    A result read from the ledger keeps its values as the stored JSON text until they are first
    needed (``Compactor.make_stored``): a rerun reads every stored result to know what is kept,
    but needs the values only of the rows it rebuilds. ``names`` and ``vals`` are then
    ``None`` and the text; ``expand()`` parses them.

    A per-file result whose row is in the ledger can leave even the text there (``defer``,
    ``Compactor.make_deferred``): ``names`` is then the stage's ``ValueSource`` (the ledger's
    ``StoredValues``) and ``vals`` the content's index there, and every read of the values reads the
    text from it (memory: the values text is about 0.9 KB per file over the per-file stages)."""

    __slots__ = ("kept", "reason", "detail", "names", "vals", "thresholds")

    def __init__(self, kept: bool, reason: str | None, detail: str, names: tuple[str, ...] | None,
                 vals: tuple | str, thresholds: dict[str, Any]):
        self.kept = kept
        self.reason = reason
        self.detail = detail
        self.names = names
        self.vals = vals
        self.thresholds = thresholds

    @classmethod
    def keep(cls, detail: str = "", values: Mapping[str, Any] | None = None,
             thresholds: dict[str, Any] | None = None) -> "Result":
        """A kept verdict; ``values`` go into the manifest, ``thresholds`` name the limits held."""
        return _plain(True, None, detail, values, thresholds)

    @classmethod
    def drop(cls, reason: str, detail: str, values: Mapping[str, Any] | None = None,
             thresholds: dict[str, Any] | None = None) -> "Result":
        """A dropped verdict with its reason code (README, Reason codes) and sentence."""
        return _plain(False, reason, detail, values, thresholds)

    @classmethod
    def from_json(cls, d: Mapping[str, Any]) -> "Result":
        """The result of its dict form (``to_json``)."""
        return _plain(d["kept"], d.get("reason"), d.get("detail", ""), d.get("values"), d.get("thresholds"))

    def defer(self, source: "ValueSource", index: int) -> None:
        """Leave the values text in the ledger (its row is committed): read from ``source``
        (content ``index``) whenever needed. A result made in the main process is left as it is."""
        if self.names is None:
            self.names, self.vals = source, index

    def _stored_text(self) -> str | None:
        """The stored JSON text of values not parsed yet (kept or read from the ledger)."""
        names = self.names
        if names is None:
            return self.vals
        if type(names) is not tuple:  # deferred: the text is the ledger's
            return names.text(self.vals)
        return None

    def expand(self) -> "Result":
        """Parse values still held as stored JSON text or left in the ledger (no-op
        otherwise); returns self."""
        if type(self.names) is not tuple:
            values = json.loads(self._stored_text())
            self.names = _shared_names(values)
            self.vals = _compact_values(values)  # memory: one form at a time
        return self

    def values_json(self) -> str:
        """The values as the ledger stores them (JSON, sorted keys): the form in which a record
        read back from the ledger and one computed in this run compare equal
        (``pipeline.outputs.rowreuse``). Made on each call for values held parsed (memory:
        the text of every corpus-stage record, kept, stood beside its values at the run's
        end; a call takes a few microseconds)."""
        if type(self.names) is not tuple:  # stored text, or deferred: read, not kept (memory)
            return self._stored_text()
        return canonical_json(self.values)

    @property
    def values(self) -> dict[str, Any]:
        if type(self.names) is not tuple:  # parsed for the reader, the record stays text (memory, speed)
            return json.loads(self._stored_text())
        return dict(zip(self.names, self.vals))

    def value(self, name: str, default: Any = None) -> Any:
        """One value by name, without building the values dict."""
        names = self.names
        if type(names) is not tuple:
            # stored JSON has every key as '"name":' (a quote inside a string is escaped, so
            # the pattern is a key); a name not in the text is not a value
            simple = name.isascii() and name.isprintable() and '"' not in name and "\\" not in name
            if simple and names is not None and not names.may_have(name):
                return default  # deferred, and no stored text of the stage has that key
            text = self._stored_text()
            if simple:
                at = text.find(f'"{name}":')  # written as it is (no escapes)
                if at < 0:
                    return default
                if text.count("{") == 1:  # a flat object: the key is a top-level one; read its value only
                    return _DECODER.raw_decode(text, at + len(name) + 3)[0]
            self.expand()
        try:
            return self.vals[self.names.index(name)]
        except ValueError:
            return default

    # the mapping protocol of the result dict it stands for ------------------------------------
    def __getitem__(self, key: str) -> Any:
        if key == "values":
            return self.values
        if key in _FIELDS:
            return getattr(self, key)
        raise KeyError(key)

    def get(self, key: str, default: Any = None) -> Any:
        return self[key] if key in _FIELDS else default

    def keys(self) -> tuple[str, ...]:
        return _FIELDS

    def __iter__(self) -> Iterator[str]:
        return iter(_FIELDS)

    def __len__(self) -> int:
        return len(_FIELDS)

    def __contains__(self, key: object) -> bool:
        return key in _FIELDS

    def to_json(self) -> dict[str, Any]:
        return {"kept": self.kept, "reason": self.reason, "detail": self.detail,
                "values": self.values, "thresholds": self.thresholds}

    def __eq__(self, other: object) -> bool:
        if isinstance(other, (Result, Mapping)):
            return all(self[k] == other[k] for k in _FIELDS) if set(other.keys()) == set(_FIELDS) else False
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]

    def __reduce__(self) -> tuple:  # plain pickling to and from the workers
        if type(self.names) is not tuple:  # parsed for the pickle, the record stays as it is
            values = json.loads(self._stored_text())
            return (Result, (self.kept, self.reason, self.detail, _shared_names(values),
                             _compact_values(values), self.thresholds))
        return (Result, (self.kept, self.reason, self.detail, self.names, self.vals, self.thresholds))

    def __repr__(self) -> str:
        return f"Result({self.to_json()!r})"


def _plain(kept: bool, reason: str | None, detail: str, values: Mapping[str, Any] | None,
           thresholds: dict[str, Any] | None) -> Result:
    """A result made by a stage (names shared with every result of the same value names)."""
    values = values or {}
    return Result(bool(kept), reason, detail, _shared_names(values), _compact_values(values),
                  thresholds or _NO_THRESHOLDS)


#: The thresholds of a result that names none: one empty dict, shared (read-only; memory: a
#: corpus stage makes a result per member)
_NO_THRESHOLDS: dict[str, Any] = {}


def _shared_names(values: Mapping[str, Any]) -> tuple[str, ...]:
    """The value names of ``values`` as one tuple shared by every result with the same names
    (few distinct ones per run), each name interned."""
    names = tuple(values)
    shared = _SHARED_NAMES.get(names)
    if shared is None:
        shared = _SHARED_NAMES[names] = tuple(_intern(k) for k in names)
    return shared


def _compact_values(values: Mapping[str, Any]) -> tuple:
    """The values as a tuple, short strings interned (shared between results)."""
    return tuple(_intern(v) if type(v) is str and len(v) <= 32 else v for v in values.values())


class ValueSource(Protocol):
    """Where a deferred result's values text is read (``ledger.StoredValues``)."""

    def text(self, index: int) -> str: ...

    def may_have(self, name: str) -> bool:
        """False when no stored values text of the stage has the key ``name`` (written as
        ``"name":``), so no deferred record of it has that value."""
        ...


#: Distinct details a ``Compactor`` shares (a stage whose details name files, as dedup's
#: do, has one per file: past this many, new ones are kept as they come).
SHARED_DETAILS = 4096


class Compactor:
    """Makes ``Result`` records for one stage, sharing name tuples and thresholds among them."""

    def __init__(self) -> None:
        self._thresholds: dict[str, Any] | None = None
        self._details: dict[str, str] = {}

    def make(self, kept: bool, reason: str | None, detail: str, values: Mapping[str, Any],
             thresholds: dict[str, Any] | None) -> Result:
        return Result(bool(kept), _intern(reason) if reason else reason, self._shared_detail(detail),
                      _shared_names(values), _compact_values(values),
                      self._shared_thresholds(thresholds))

    def make_stored(self, kept: bool, reason: str | None, detail: str, values_json: str,
                    thresholds: dict[str, Any] | None) -> Result:
        """A result read from the ledger, its values left as the stored JSON text (a JSON
        object written with sorted keys) until first read."""
        return Result(bool(kept), _intern(reason) if reason else reason, self._shared_detail(detail),
                      None, values_json, self._shared_thresholds(thresholds))

    def make_deferred(self, kept: bool, reason: str | None, detail: str, thresholds: dict[str, Any] | None,
                      source: "ValueSource", index: int) -> Result:
        """A result read from the ledger without its values, which stay there (``Result.defer``)."""
        r = Result(bool(kept), _intern(reason) if reason else reason, self._shared_detail(detail),
                   None, "", self._shared_thresholds(thresholds))
        r.defer(source, index)
        return r

    def from_stored(self, stored: tuple[int, str | None, str, str, str]) -> Result:
        """The result of a stored form (``codec.stored_result``), its values left as text."""
        kept, reason, detail, values_json, thresholds_json = stored
        return self.make_stored(kept, reason, detail, values_json, thresholds_from_json(thresholds_json))

    def _shared_detail(self, detail: str) -> str:
        """One string per distinct detail of the stage (memory: a per-file stage writes few
        distinct sentences, "SMF format 1, 5 tracks, 480 ticks per beat", but each result
        arrives from a worker with its own copy); up to ``SHARED_DETAILS`` of them."""
        shared = self._details.get(detail)
        if shared is None:
            if len(self._details) < SHARED_DETAILS:
                self._details[detail] = detail
            return detail
        return shared

    def _shared_thresholds(self, thresholds: dict[str, Any] | None) -> dict[str, Any]:
        t = thresholds if thresholds is not None else {}
        if t is self._thresholds:  # speed: the ledger hands out one dict per distinct text
            return t
        if self._thresholds is not None and t == self._thresholds:
            return self._thresholds
        self._thresholds = t
        return t

    def of(self, r: Mapping[str, Any] | Result) -> Result:
        """The compact form of a result dict (a ``Result`` is compacted again, sharing more)."""
        if isinstance(r, Result):
            r.expand()
            return self.make(r.kept, r.reason, r.detail, dict(zip(r.names, r.vals)), r.thresholds)
        return self.make(r["kept"], r.get("reason"), r.get("detail", ""), r.get("values") or {},
                         r.get("thresholds"))


class TrailValues(Mapping):
    """The values of a file's results in stage order as one read-only mapping, later stages
    winning, without merging them into a dict (what a corpus stage's ``Member.values`` reads)."""

    __slots__ = ("_trail",)

    def __init__(self, trail: list[Result]):
        self._trail = tuple(trail)

    def __getitem__(self, name: str) -> Any:
        for r in reversed(self._trail):
            v = r.value(name, _MISSING)
            if v is not _MISSING:
                return v
        raise KeyError(name)

    def __iter__(self) -> Iterator[str]:
        seen: dict[str, None] = {}
        for r in self._trail:
            seen.update(dict.fromkeys(r.expand().names))
        return iter(seen)

    def __len__(self) -> int:
        return sum(1 for _ in self)


class Verdicts:
    """One per-file stage's verdicts on a run's contents as columns (memory: a ``Result`` and a
    dict entry per file and stage cost about 150 bytes; these columns 11): a state byte (none,
    dropped, kept), and codes of the reason, the detail and the thresholds text among the
    stage's distinct ones, by content index. The values stay in the ledger (``source``, a
    ``ledger.StoredValues`` over the same contents); ``record`` makes the ``Result`` a reader
    asks for, ``get`` by sha256 reads like the dict of records it replaces."""

    __slots__ = ("source", "index", "compactor", "state", "reason", "detail", "thresholds",
                 "_reasons", "_details", "_thresholds", "_codes", "_triples")

    NONE, DROPPED, KEPT = 0, 1, 2

    def __init__(self, source: ValueSource, index: dict[str, int], compactor: Compactor, n: int):
        self.source = source
        self.index = index  # sha256 -> content index (shared by every stage's columns)
        self.compactor = compactor
        self.state = bytearray(n)
        self.reason = array("H", bytes(2 * n))
        self.detail = array("I", bytes(4 * n))
        self.thresholds = array("I", bytes(4 * n))
        # the distinct values of the stage and their codes (code 0 of the reason is None)
        self._reasons: list[str | None] = [None]
        self._details: list[str] = []
        self._thresholds: list[dict[str, Any]] = []
        self._codes: dict[tuple[int, Any], int] = {(0, None): 0}
        # speed: (reason, detail, thresholds text) -> their three codes (a stage has few)
        self._triples: dict[tuple, tuple[int, int, int]] = {}

    def _code(self, column: int, value: Any, table: list) -> int:
        code = self._codes.get((column, value))
        if code is None:
            code = self._codes[(column, value)] = len(table)
            table.append(value if column != 2 else thresholds_from_json(value))
        return code

    def put(self, i: int, kept: bool, reason: str | None, detail: str, thresholds_json: str) -> None:
        """Record content ``i``'s verdict (its values are, or are about to be, in the ledger)."""
        self.state[i] = self.KEPT if kept else self.DROPPED
        key = (reason, detail, thresholds_json)
        codes = self._triples.get(key)
        if codes is None:
            codes = (self._code(0, reason, self._reasons), self._code(1, detail, self._details),
                     self._code(2, thresholds_json, self._thresholds))
            if len(self._triples) < SHARED_DETAILS:
                self._triples[key] = codes
        self.reason[i], self.detail[i], self.thresholds[i] = codes

    def fill(self, rows: Iterable[tuple[str, int, str | None, str, str]]) -> None:
        """``put`` for every stored row (sha256, kept, reason, detail, thresholds text) whose
        content is one of the run's (speed: a rerun fills every stage's columns from the ledger;
        one loop, no call per row)."""
        index, triples, put = self.index, self._triples, self.put
        state, reason_col, detail_col, thr_col = self.state, self.reason, self.detail, self.thresholds
        kept_b, dropped_b = self.KEPT, self.DROPPED
        for sha, kept, reason, detail, thr in rows:
            i = index.get(sha)
            if i is None:
                continue
            codes = triples.get((reason, detail, thr))
            if codes is None:  # a triple not seen yet (or past the shared ones): the general way
                put(i, bool(kept), reason, detail, thr)
                continue
            state[i] = kept_b if kept else dropped_b
            reason_col[i], detail_col[i], thr_col[i] = codes

    def stored_columns(self) -> tuple[dict[str, Any], bytes]:
        """The verdicts as the next run reads them back (``take_columns``): the tables of the
        distinct reasons, details and thresholds texts, and the state, reason, detail and
        thresholds columns as little-endian bytes, by content index."""
        import numpy as np
        texts = [""] * len(self._thresholds)
        for (column, value), code in self._codes.items():
            if column == 2:
                texts[code] = value
        meta = {"n": len(self.state), "reasons": self._reasons, "details": self._details,
                "thresholds": texts}
        data = b"".join((bytes(self.state), np.asarray(self.reason, dtype="<u2").tobytes(),
                         np.asarray(self.detail, dtype="<u4").tobytes(),
                         np.asarray(self.thresholds, dtype="<u4").tobytes()))
        return meta, data

    def take_columns(self, meta: dict[str, Any], data: bytes, rows: Any, at: Any) -> None:
        """Take the verdicts of an earlier run's ``stored_columns``: its row ``rows[k]`` for
        this run's content ``at[k]`` (numpy index arrays). Called before any other verdict is
        recorded: the stored tables become these columns' tables."""
        import numpy as np
        if len(self._details) or len(self._reasons) > 1:
            raise ValueError("take_columns must come before any other verdict")
        n = meta["n"]
        self._reasons = list(meta["reasons"])
        self._details = list(meta["details"])
        self._thresholds = [thresholds_from_json(t) for t in meta["thresholds"]]
        codes: dict[tuple[int, Any], int] = {}
        for column, table in ((0, self._reasons), (1, self._details), (2, meta["thresholds"])):
            codes.update(((column, value), code) for code, value in enumerate(table))
        self._codes = codes
        # this run's columns, written through numpy views of their buffers
        for view, dtype, offset in ((np.frombuffer(self.state, dtype=np.uint8), np.uint8, 0),
                                    (np.frombuffer(self.reason, dtype=np.uint16), "<u2", n),
                                    (np.frombuffer(self.detail, dtype=np.uint32), "<u4", 3 * n),
                                    (np.frombuffer(self.thresholds, dtype=np.uint32), "<u4", 7 * n)):
            view[at] = np.frombuffer(data, dtype=dtype, count=n, offset=offset)[rows]

    def put_stored(self, i: int, stored: tuple[int, str | None, str, str, str]) -> None:
        """Record a worker's result in stored form (``codec.stored_result``)."""
        kept, reason, detail, _, thresholds_json = stored
        self.put(i, bool(kept), reason, detail, thresholds_json)

    def kept_at(self, i: int) -> bool | None:
        """Whether content ``i`` was kept (None: no verdict)."""
        s = self.state[i]
        return None if s == self.NONE else s == self.KEPT

    def record(self, i: int) -> Result | None:
        """Content ``i``'s verdict as a ``Result`` whose values are read from the ledger."""
        s = self.state[i]
        if s == self.NONE:
            return None
        return self.compactor.make_deferred(s == self.KEPT, self._reasons[self.reason[i]],
                                            self._details[self.detail[i]],
                                            self._thresholds[self.thresholds[i]], self.source, i)

    def get(self, sha: str, default: Any = None) -> Result | None:
        i = self.index.get(sha)
        r = self.record(i) if i is not None else None
        return default if r is None else r

    def __getitem__(self, sha: str) -> Result:
        r = self.get(sha)
        if r is None:
            raise KeyError(sha)
        return r

    def __contains__(self, sha: object) -> bool:
        i = self.index.get(sha)  # type: ignore[arg-type]
        return i is not None and self.state[i] != self.NONE

    def __len__(self) -> int:
        return len(self.state) - self.state.count(self.NONE)
