"""The ordered lead evidence of pipeline.tools.lead_order (a diagnostic of weak links)."""
from __future__ import annotations

import numpy as np

from pipeline.tools.lead_order import (lead_tokens, longest_common_run, order_figures,
                                       ordered_chain, smith_waterman, windows)

from test_shingles import make_piece


def test_smith_waterman_textbook_example():
    # The worked example of the Smith-Waterman article on Wikipedia (from memory): TGTTACGG
    # against GGTTGACTA, match +3, mismatch -3, linear gap 2, best local score 13 (GTT-AC /
    # GTTGAC).
    code = {c: k for k, c in enumerate("ACGT")}
    a, b = [code[c] for c in "TGTTACGG"], [code[c] for c in "GGTTGACTA"]
    assert smith_waterman(a, b, match=3, mismatch=-3, gap=-2) == 13
    # identical sequences align whole; disjoint ones not at all (common practice)
    assert smith_waterman(a, a) == len(a)
    assert smith_waterman([1, 2, 3], [4, 5, 6]) == 0


def test_longest_common_run():
    # common practice: the longest common substring of "xabcdy" and "zzabcdzz" is "abcd"
    assert longest_common_run(list(b"xabcdy"), list(b"zzabcdzz")) == 4
    assert longest_common_run([1, 2], [3, 4]) == 0


def test_chain_counts_shared_windows_in_order_only():
    wa = [(1,), (2,), (3,), (4,), None]
    assert ordered_chain(wa, [(1,), (2,), (3,), (4,)]) == [(0, 0), (1, 1), (2, 2), (3, 3)]
    # the same windows in reverse order: one of them at most forms a chain
    assert len(ordered_chain(wa, [(4,), (3,), (2,), (1,)])) == 1
    # generic windows (None) never match
    assert ordered_chain([None, None], [None, None]) == []


def _tokens(intervals, gaps):
    """Tokens as line_tokens makes them (interval, ratio of gaps) from a note list."""
    pitches = np.cumsum([60] + list(intervals))
    starts = np.cumsum([0] + list(gaps))
    rows = [(int(s) * 240, int(s) * 240 + 200, int(p), 0, 0, 0, 90) for s, p in zip(starts, pitches)]
    return lead_tokens(make_piece(rows))


def test_a_tune_with_a_changed_note_keeps_its_order_and_a_shared_phrase_is_one_run():
    rng = np.random.default_rng(3)
    steps = rng.choice([-3, -2, -1, 1, 2, 4], 60).tolist()
    gaps = rng.choice([1, 2, 2, 4], 60).tolist()
    tune = _tokens(steps, gaps)
    assert len(tune) == 60  # one token per move after the first note
    varied = list(steps)
    varied[30] += 1  # one changed note: the windows around it differ
    fig = order_figures(tune, _tokens(varied, gaps))
    assert fig["chain"] == fig["shared"] and fig["span"] > 0.9 and fig["run"] >= 29
    # another tune that quotes 16 moves of the first in the middle: one run, a share of it
    other_steps = rng.choice([-5, -4, 3, 5, 7], 40).tolist()
    other_gaps = rng.choice([3, 6], 40).tolist()
    quote = other_steps[:12] + steps[20:36] + other_steps[12:]
    fig = order_figures(tune, _tokens(quote, other_gaps[:12] + gaps[20:36] + other_gaps[12:]))
    assert fig["run"] >= 15 and fig["span"] < 0.5
    assert len(windows(tune)) == 57
