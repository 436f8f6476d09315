"""MinHash signatures of a piece's shingle set: ``signature_of`` is the one entry point for a
file's identity artifacts (shingle set, signature, content hash); dedup's ``prepare``, the split
and ``leakage`` use it. The signature's first half signs the lead voice's shingles, the second
half the whole set.

``minhash`` is a numpy implementation of datasketch's ``MinHash`` (scheme ``affine32``,
datasketch >= 2.0): each 32-bit input hash is pre-mixed with the MurmurHash3 finalizer, then
permuted by ``a*h + b mod 2**32`` with ``(a, b)`` drawn from ``numpy.random.RandomState(seed)``
exactly as datasketch draws them, and the column minimum is the signature. The tests check that
it equals ``datasketch.MinHash(...).digest()`` for the same seed and tokens.
"""
from __future__ import annotations

from typing import Any

import numpy as np

from ..analysis.shingles import ShingleSpec, content_hash, shingle_hashes
from ..midi.accel import kernel as compiled_kernel
from ..midi.piece import Piece
from .sets import MIN_LEAD, lead_part


#: Every value of the signature of an empty shingle set (such files never pair).
EMPTY_VALUE = np.uint32(0xFFFFFFFF)


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
        return np.full(num_perm, EMPTY_VALUE, dtype=np.uint32)
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
    return bool(np.all(signature == EMPTY_VALUE))


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
