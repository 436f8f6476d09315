"""The fifth round's experimental key classifiers (pipeline/tools/key_variants.py): the
network keeps the linear model's transposition invariance, and its pair contrasts are read
from the relative pair they name."""
from __future__ import annotations

import numpy as np

from pipeline.analysis import key as keymod
from pipeline.tools import key_variants


def _random_features(rng: np.random.Generator) -> np.ndarray:
    raw = rng.random((len(keymod.FEATURES), 12))
    return raw / raw.sum(axis=1, keepdims=True)


def test_network_scores_transpose_with_the_piece():
    # key finding commutes with transposition (common practice): rotating every distribution
    # by s semitones moves each key's score to the key s semitones up, in both modes
    rng = np.random.default_rng(3)
    width = keymod.N_CLASS_FEATURES
    params = {"v": rng.normal(size=width), "W1": rng.normal(size=(8, width)),
              "b1": rng.normal(size=8), "w2": rng.normal(size=8)}
    raw = _random_features(rng)
    base = key_variants.network_scores(params, keymod.class_features(raw)[None])[0]
    for s in (1, 5, 11):
        moved = key_variants.network_scores(params, keymod.class_features(np.roll(raw, s, axis=1))[None])[0]
        expect = np.concatenate([np.roll(base[:12], s), np.roll(base[12:], s)])
        np.testing.assert_allclose(moved, expect, rtol=1e-12, atol=1e-12)
    # and the hidden layer matters: without it the scores differ (the network is not linear)
    linear = keymod.class_features(raw) @ params["v"]
    assert np.abs(base - linear).max() > 1e-6


def test_pair_contrasts_name_the_relative_pair():
    # relative keys share a signature, the minor tonic a major sixth above the major tonic
    # (common practice): a piece that is all A and C, with A in the bass, leans to A minor in
    # the pair C major / A minor (pair 0) and to A major in the pair A major / F# minor (pair 9)
    raw = np.zeros((len(keymod.FEATURES), 12))
    fi = {f: i for i, f in enumerate(keymod.FEATURES)}
    raw[fi["duration"], [9, 0]] = 0.5
    raw[fi["bass"], 9] = 1.0
    c = key_variants.pair_contrasts(raw[None])[0]
    bass_tonic = 3  # the column of the bass's major-against-minor tonic share
    assert c[0, bass_tonic] == -0.5  # all bass on A, the minor tonic of pair 0
    assert c[9, bass_tonic] == 0.5   # all bass on A, the major tonic of pair 9
