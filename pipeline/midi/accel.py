"""The one switch for the compiled fast path: the optional C extension ``_smf_accel``
(its sources in pipeline/midi/csrc/, built by setup.py where a C compiler is present; plain
CPython C API, no dependency).

``HAVE_ACCEL`` says whether it is built; ``USE_ACCEL`` whether the decoder, the encoder's group
tracks, the per-file analyses and the similarity kernels use it by default
(``MIDISIFT_PURE_PYTHON=1`` in the environment, read at import, turns it off). Every compiled
function has a Python or numpy formulation that stays its specification, and the tests hold
both equal to the last bit (tests/test_smf_accel.py).
"""
from __future__ import annotations

import os
from typing import Any

import numpy as np

from .piece import NOTE_DTYPE

try:
    from . import _smf_accel as module
except ImportError:  # not built (no C compiler at install time): the Python paths only
    module = None

#: The compiled extension is importable.
HAVE_ACCEL: bool = module is not None
#: The compiled paths are the default; ``MIDISIFT_PURE_PYTHON=1`` (read at import) turns them off.
USE_ACCEL: bool = HAVE_ACCEL and os.environ.get("MIDISIFT_PURE_PYTHON", "") in ("", "0")


def kernel(name: str) -> Any:
    """The compiled function ``name`` when the compiled path is on and the build has it, else
    None (the caller then runs its numpy formulation)."""
    return getattr(module, name, None) if USE_ACCEL else None


def compiled_analyses(notes: np.ndarray) -> Any:
    """The compiled module whose per-file analyses may run on ``notes`` (a C-contiguous
    NOTE_DTYPE table, the compiled path on: ``USE_ACCEL``), else None. The numpy
    formulations stay the specification; the compiled ones return None where those take a
    general path, and the caller then runs them."""
    if not USE_ACCEL or notes.dtype != NOTE_DTYPE or not notes.flags.c_contiguous:
        return None
    mod = module
    if _CHECKED[0] is not mod:  # a build from before the analyses were compiled has none
        _CHECKED[:] = [mod, all(hasattr(mod, f) for f in _ANALYSES) and _sums_follow_numpy(mod)]
    return mod if _CHECKED[1] else None


def _sums_follow_numpy(mod: Any) -> bool:
    """Make the compiled sums follow this numpy's ``np.add.reduce``, bit for bit: numpy 2.4
    sums a long contiguous array in one pairwise pass, numpy 2.2 in chunks of its 8192-value
    buffer. The chunking under which probe arrays sum alike is set in the module; when none
    does, the compiled analyses are not used (the numpy code runs)."""
    if not hasattr(mod, "set_reduce_chunk"):
        return False
    rng = np.random.default_rng(20261202)
    probes = [rng.standard_normal(n) * 10.0 ** rng.integers(-6, 6, n) for n in (8193, 16385, 20001, 65536)]
    for chunk in (0, 8192):
        mod.set_reduce_chunk(chunk)
        if all(np.float64(mod.add_reduce(p)).tobytes() == np.float64(np.add.reduce(p)).tobytes()
               for p in probes):
            return True
    mod.set_reduce_chunk(0)
    return False


#: The compiled analyses the modules above call (pipeline/midi/csrc/analyses.c, shingles.c,
#: keyfeat.c and, for table_group_events, encode.c).
_ANALYSES = ("pc_histogram", "meter_accents", "grid_count", "note_stats", "voice_shingles",
             "content_rows", "shift_sort", "fold_count", "table_group_events", "key_features")
_CHECKED: list = [None, False]  # (the module last checked, whether it has them all)
