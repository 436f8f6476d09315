"""The split without a dedup stage (issue 20 item 5), for files of one note content in two track
layouts: a known gap, kept as a strict expected failure until it is closed.

Dedup links files with the same canonical notes as exact duplicates (content hash), whatever
their layout. The split, signing files itself when no dedup stage runs, compares shingle sets
only (``Split.prepare`` keeps no content hash), and the shingles follow the voices: one piece
with its melody's odd bars moved to a track of their own shares little with itself (0.09, below
``group_threshold`` 0.2), so its two layouts can land in different parts (5 of 10 seeds here):
the same notes in train and test. Closing it needs the content hash among the split's own
artifacts (a new ``signature_version`` of the split) and links between equal ones."""
from __future__ import annotations

import pytest

from pipeline.stages.base import CorpusState, Member
from pipeline.stages.dedup import Dedup
from pipeline.stages.split import Split

from test_dedup import compose, family, jaccard_or_containment, member
from test_dedup_own_pairs import _layout_members


@pytest.mark.xfail(strict=True, reason="the split without dedup does not group files of one note "
                   "content whose shingles differ (no content hash among its own artifacts)")
def test_the_split_without_dedup_keeps_one_note_content_in_one_part():
    plain, alt, _, _ = _layout_members()
    assert plain.artifacts["dedup"]["content_hash"] == alt.artifacts["dedup"]["content_hash"]
    sets = [m.artifacts["dedup"]["shingles"] for m in (plain, alt)]
    assert jaccard_or_containment(*sets) < Split().opts["group_threshold"]
    stage = Dedup()
    others = [member(f"other{i}.mid", compose(family(10 + i), seed=900 + i), stage) for i in range(20)]
    # the arrays the split's own ``prepare`` makes (dedup's function at dedup's defaults), as the
    # runner stores them when no dedup stage runs
    members = [Member(m.id, m.sha256, m.source, {},
                      {"split": {k: m.artifacts["dedup"][k] for k in ("signature", "shingles")}})
               for m in [plain, alt] + others]
    for seed in range(10):
        got = Split({"seed": seed, "ratios": {"x": 0.5, "y": 0.5}}).run_corpus(members, CorpusState())
        assert got[plain.id].values["split"] == got[alt.id].values["split"], seed
