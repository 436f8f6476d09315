"""The one codec of stored forms: how values become the JSON text and array rows that the
ledger stores and the output files hold, and back.

* ``canonical_json``: sorted keys, no spaces; numpy scalars and arrays as plain numbers and
  lists (``json_default``). Fingerprints, stored results, trails and run records use it.
* ``stored_result`` / ``stored_artifacts``: a stage result and a corpus stage's ``prepare``
  output in the ledger's row form, made in the workers.
* ``encode_array`` / ``decode_array``: a numpy array as (dtype, shape, bytes), never pickle.

numpy is imported where arrays are (de)serialised: the nothing-changed check opens the ledger
without paying numpy's import time.
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import Any

#: Artifact name recorded when a corpus stage's ``prepare`` returned nothing for a file.
EMPTY = "~"
#: Artifact name of the row holding all of a file's scalar artifacts of one stage (a JSON object).
SCALARS = "~scalars"


def json_default(value: Any) -> Any:
    """JSON form of the values the json module does not know: numpy scalars and arrays, paths."""
    import numpy as np
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"not JSON-serialisable: {type(value).__name__}")


_ENCODE = json.JSONEncoder(sort_keys=True, separators=(",", ":"), default=json_default).encode


def _dumps(value: Any) -> str:
    # speed: json.dumps with options builds a new JSONEncoder per call (a worker writes about
    # eight texts per file); one made once encodes the same
    return _ENCODE(value)


def stored_result(r: Any) -> tuple[int, str | None, str, str, str]:
    """A stage result (dict or ``records.Result``) as the ledger stores it: (kept, reason,
    detail, values JSON, thresholds JSON). Workers make it, so the main process neither
    serialises nor compacts per-file values (``records.Compactor.from_stored`` reads it)."""
    values = r.values_json() if hasattr(r, "values_json") else _dumps(r["values"])
    return (int(r["kept"]), r["reason"], r["detail"], values, thresholds_json(r["thresholds"]))


def stored_artifacts(items: dict[str, Any]) -> tuple[tuple[str, str | None, str | None, Any], ...]:
    """A corpus stage's ``prepare`` output as the ledger stores it: (name, dtype, shape, data)
    rows, one per array and one (``SCALARS``) holding every JSON scalar as an object, or one
    ``EMPTY`` row when there is nothing (remembering that prepare ran). Workers make it, so the
    main process neither receives numpy arrays nor encodes them."""
    if not items:
        return ((EMPTY, None, None, "null"),)
    import numpy as np
    rows = []
    scalars = {}
    for name, value in items.items():
        if isinstance(value, np.ndarray):
            rows.append((name, *encode_array(value)))
        else:
            scalars[name] = value
    if scalars:  # speed: one row for all of them (a row costs more than its bytes)
        rows.append((SCALARS, None, None, _dumps(scalars)))
    return tuple(rows)


def canonical_json(value: Any) -> str:
    """The JSON text the ledger stores for a value (sorted keys, no spaces)."""
    return _dumps(value)


_THRESHOLD_TEXTS: dict[int, tuple[Any, str]] = {}


def thresholds_json(thresholds: dict[str, Any]) -> str:
    """``canonical_json`` of a thresholds dict, remembered per object: a stage's results share
    a few such dicts (the memo keeps each alive, so its id is not reused)."""
    hit = _THRESHOLD_TEXTS.get(id(thresholds))
    if hit is not None and hit[0] is thresholds:
        return hit[1]
    text = _dumps(thresholds)
    if len(_THRESHOLD_TEXTS) < 4096:
        _THRESHOLD_TEXTS[id(thresholds)] = (thresholds, text)
    return text


_THRESHOLD_DICTS: dict[str, dict[str, Any]] = {}


def thresholds_from_json(text: str) -> dict[str, Any]:
    """The thresholds dict of a stored text, one shared (read-only) dict per distinct text: a
    stage's thresholds come from its options, so a run sees few of them."""
    t = _THRESHOLD_DICTS.get(text)
    if t is None:
        t = json.loads(text)
        if len(_THRESHOLD_DICTS) < 4096:
            _THRESHOLD_DICTS[text] = t
    return t



def encode_array(value: Any) -> tuple[str, str, bytes]:
    """(dtype, shape, bytes) of a numpy array as stored (the shape as ``_dumps`` writes a list)."""
    import numpy as np
    arr = np.ascontiguousarray(value)
    return arr.dtype.str, "[" + ",".join(map(str, arr.shape)) + "]", arr.tobytes()


def decode_array(dtype: str, shape: str | None, data: bytes) -> Any:
    arr = _frombuffer()(data, dtype=_dtype(dtype))
    dims = shape_of(shape)
    # memory: a 1-D array is returned as read, not as a second (reshaped) view of it
    return arr if len(dims) == 1 and dims[0] == len(arr) else arr.reshape(dims)


_NUMPY: list = []


def _frombuffer() -> Any:
    """``numpy.frombuffer``, imported on first use (see the note on numpy above)."""
    if not _NUMPY:
        import numpy as np
        _NUMPY.append(np.frombuffer)
    return _NUMPY[0]


_DTYPES: dict[str, Any] = {}
_SHAPES: dict[str, tuple[int, ...]] = {}


def _dtype(text: str) -> Any:
    d = _DTYPES.get(text)
    if d is None:
        import numpy as np
        d = _DTYPES[text] = np.dtype(text)
    return d


def shape_of(text: str | None) -> tuple[int, ...]:
    dims = _SHAPES.get(text or "")
    if dims is None:
        dims = tuple(json.loads(text)) if text else ()
        if len(_SHAPES) < 4096:
            _SHAPES[text or ""] = dims
    return dims
