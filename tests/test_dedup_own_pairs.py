"""Dedup, issue 20 item 4, for files sharing one canonical note content: a dropped file's
``similarity`` is its own pair's with the kept file it names, and every drop rests on its own
pair. Files with one note content but another track layout have other voices, so other shingles
(the content hash leaves the layout out); dedup compares only one of them (the content's
representative, the first by id) against the corpus."""
from __future__ import annotations

import hashlib

import numpy as np

from pipeline.similarity.minhash import minhash
from pipeline.stages.base import Member
from pipeline.stages.dedup import Dedup

from test_dedup import TPB, compose, family, jaccard_or_containment, member, run, variants

BAR = 4 * TPB


def _layouts():
    """One piece (test_dedup.compose: melody, block chords, bass, drums) in two track layouts of
    one note content, and K, an edited copy of it with a drum track added (so K has the most
    notes and is kept): ``(rows, {layout name: rows}, K's rows)``."""
    rows = compose(family(4), seed=404)
    # the melody's last 4 bars (of 32) on a track of their own: one line becomes two
    last4 = [(s, e, p, ch, pr, 4 if ch == 0 and s >= 28 * BAR else tr, v) for s, e, p, ch, pr, tr, v in rows]
    # the melody's odd bars on another track: two lines full of holes
    alternate = [(s, e, p, ch, pr, 4 if ch == 0 and (s // BAR) % 2 else tr, v)
                 for s, e, p, ch, pr, tr, v in rows]
    edited, _ = variants(rows, seed=4)["edited"]
    k = edited + [(i * TPB, i * TPB + 60, 42, 9, 0, 3, 80) for i in range(200)]
    return rows, {"last4": last4, "alternate": alternate}, k


def _pair(layout: str):
    """Members X (the plain layout) and Y (``layout``) of one note content, first by id first
    (the content's representative), and K."""
    rows, other, k = _layouts()
    stage = Dedup()
    x, y = member("x.mid", rows, stage), member("y.mid", other[layout], stage)
    assert x.artifacts["dedup"]["content_hash"] == y.artifacts["dedup"]["content_hash"]
    assert not np.array_equal(x.artifacts["dedup"]["shingles"], y.artifacts["dedup"]["shingles"])
    rep, mate = sorted((x, y), key=lambda m: m.id)
    return rep, mate, member("k.mid", k, stage)


def _own(a: Member, b: Member, state) -> float:
    """The reference: the pair's Jaccard/containment on Python sets (test_dedup.
    jaccard_or_containment, Broder 1997), generic shingles of the run left out."""
    generic = np.array(state.current.get("generic", []), dtype=np.uint64)
    return jaccard_or_containment(a.artifacts["dedup"]["shingles"], b.artifacts["dedup"]["shingles"], generic)


def test_each_member_of_one_content_is_dropped_with_its_own_pair():
    rep, mate, k = _pair("last4")
    res, state = run([rep, mate, k])
    own_rep, own_mate = _own(rep, k, state), _own(mate, k, state)
    assert round(own_rep, 4) != round(own_mate, 4)  # the layouts' shingles differ enough to tell
    assert res[k.id].kept
    for m, own in ((rep, own_rep), (mate, own_mate)):
        r = res[m.id]
        assert (r.reason, r.values["duplicate_of"], r.values["duplicate_kind"]) == ("near_duplicate", k.id, "near")
        assert own >= 0.3 and r.values["similarity"] == round(own, 4), (m.source, r.values, own)
        assert f"similarity {own:.2f}" in r.detail
    # a rerun where the representative comes after its mate (the stored link was measured on
    # the mate, then the representative's own pair is compared) gives the same verdicts
    _, first = run([mate, k])
    again, _ = run([rep, mate, k], previous=first.current)
    assert {i: x.to_json() for i, x in again.items()} == {i: x.to_json() for i, x in res.items()}


def test_a_member_whose_own_pair_is_below_the_threshold_is_not_dropped_through_its_mate():
    """The representative reaches K (0.72), its mate of the same note content does not (its
    melody split across two tracks bar by bar: 0.08). The mate is not dropped on the
    representative's pair: no kept file has its content and its own pair with K is below the
    threshold, so it is kept; the representative, whose note content is now a kept file's, is
    that file's exact (content) duplicate, its most similar kept file."""
    rep, mate, k = _pair("alternate")
    res, state = run([rep, mate, k])
    assert _own(rep, k, state) >= 0.3 > _own(mate, k, state)
    assert res[k.id].kept and res[mate.id].kept
    r = res[rep.id]
    assert (r.reason, r.values["duplicate_of"], r.values["duplicate_kind"], r.values["similarity"]) == \
        ("exact_duplicate", mate.id, "content", 1.0)
    assert {x.values["cluster_size"] for x in res.values()} == {3}  # one cluster all the same (leakage)
    assert "keeps 2" in res[k.id].detail
    # a rerun keeps the same verdicts (the kept ones first, the links reused)
    again, _ = run([rep, mate, k], previous=state.current)
    assert {i: x.to_json() for i, x in again.items()} == {i: x.to_json() for i, x in res.items()}


def _planted(name: str, shingles: np.ndarray, notes: int, content: str) -> Member:
    """test_dedup.planted with a given content hash: a member whose shingle set the test
    decides (so it decides the pair similarities exactly), signed as ``prepare`` signs it."""
    sh = np.unique(np.asarray(shingles, dtype=np.uint64))
    art = {"content_hash": content, "signature": minhash(sh), "shingles": sh,
           "notes": notes, "duration_beats": float(notes)}
    sha = hashlib.sha256(name.encode()).hexdigest()
    return Member(sha[:16], sha, name, {}, {"dedup": art})


def test_a_member_names_the_kept_file_its_own_pair_reaches_best():
    """K and K2 share nothing; R links to both (0.6 and 0.4, containment); M, of R's note
    content, reaches K2 (0.8) but not K (0.2). R names K, M names K2, each at its own value
    (on the representative's links alone, M named K at R's 0.6)."""
    pool = np.arange(1, 2001, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15) | np.uint64(1 << 63)
    k = _planted("k.mid", pool[:300], 900, "content k")
    k2 = _planted("k2.mid", pool[1000:1300], 800, "content k2")
    first, second = sorted(("r.mid", "m.mid"), key=lambda n: hashlib.sha256(n.encode()).hexdigest())
    r = _planted(first, np.concatenate([pool[:150], pool[1000:1100]]), 100, "content r")
    m = _planted(second, np.concatenate([pool[250:300], pool[1000:1200]]), 100, "content r")
    assert r.id < m.id  # r is the content's representative
    res, state = run([k, k2, r, m])
    assert res[k.id].kept and res[k2.id].kept
    assert (_own(r, k, state), _own(r, k2, state)) == (0.6, 0.4)
    assert (_own(m, k, state), _own(m, k2, state)) == (0.2, 0.8)
    assert (res[r.id].values["duplicate_of"], res[r.id].values["similarity"]) == (k.id, 0.6)
    assert (res[m.id].values["duplicate_of"], res[m.id].values["similarity"]) == (k2.id, 0.8)
    assert res[m.id].reason == "near_duplicate"


def test_a_member_with_too_few_shingles_is_not_near_dropped_on_its_mates_pair():
    """``min_shingles`` (16): a file with fewer distinct shingles is only exact-deduplicated,
    so a member of R's note content holding 12 shingles (all of them K's) is not dropped as
    K's near duplicate through R's link; it is kept, and R is its exact (content) duplicate."""
    pool = np.arange(1, 1001, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15) | np.uint64(1 << 63)
    k = _planted("k.mid", pool[:100], 900, "content k")
    first, second = sorted(("r.mid", "m.mid"), key=lambda n: hashlib.sha256(n.encode()).hexdigest())
    r = _planted(first, pool[:80], 100, "content r")
    m = _planted(second, pool[:12], 100, "content r")
    res, state = run([k, r, m])
    assert _own(m, k, state) == 1.0  # containment, were it counted
    assert res[k.id].kept and res[m.id].kept
    assert (res[r.id].reason, res[r.id].values["duplicate_of"]) == ("exact_duplicate", m.id)
