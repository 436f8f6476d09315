"""Dedup, issue 20 item 4, for files sharing one canonical note content: a dropped file's
``similarity`` is its own pair's with the kept file it names, and every drop rests on its own
pair. Files with one note content but another track layout have other voices, so other shingles
(the content hash leaves the layout out); dedup compares only one of them (the content's
representative, the first by id) against the corpus."""
from __future__ import annotations

import hashlib

import numpy as np

from pipeline.similarity.minhash import minhash
from pipeline.stages.base import CorpusState, Member
from pipeline.stages import dedup as dedup_module
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


# --- Every member of a content is searched where its shingles differ (dedup version 5) -----------
def _layout_members():
    """The piece of ``_layouts`` as members: ``plain`` and ``alternate`` (the melody's odd bars
    on a track of their own: one note content, other voices, so other shingles), ``k`` (an
    edited copy of the plain layout with a drum track: the most notes), ``k_alt`` (the same
    edited copy in the alternate layout, with 150 drum hits: another note content, fewer notes
    than ``k``). The names are chosen (by their sha256, the members' ids) so that the alternate
    layout is its content's representative (the first by id), which dedup version 4 alone
    searched against the corpus."""
    rows, other, k = _layouts()
    edited, _ = variants(rows, seed=4)["edited"]
    alt_of = lambda rs: [(s, e, p, ch, pr, 4 if ch == 0 and (s // BAR) % 2 else tr, v)
                         for s, e, p, ch, pr, tr, v in rs]
    k_alt = alt_of(edited) + [(i * TPB, i * TPB + 60, 42, 9, 0, 3, 80) for i in range(150)]
    first, second = sorted(("alt.mid", "plain.mid"), key=lambda n: hashlib.sha256(n.encode()).hexdigest())
    stage = Dedup()
    alt, plain = member(first, other["alternate"], stage), member(second, rows, stage)
    assert alt.id < plain.id
    return plain, alt, member("k.mid", k, stage), member("k-alt.mid", k_alt, stage)


def test_a_member_whose_own_pair_reaches_a_kept_file_joins_its_cluster():
    """The content's representative (the alternate layout) does not reach K (0.08); its mate
    (the plain layout) does (0.72): the mate is searched too, so the three are one cluster
    (leakage is transitive: the representative holds the mate's notes). Removal stays on own
    pairs: K and the representative are both kept (their own pair is below the threshold), the
    mate is the exact (content) duplicate of the kept file of its note content. Dedup version 4
    left K a cluster of its own, which the split could place apart from the others."""
    plain, alt, k, _ = _layout_members()
    res, state = run([alt, plain, k])
    assert _own(plain, k, state) >= 0.3 > _own(alt, k, state)
    assert {x.values["cluster_size"] for x in res.values()} == {3}
    assert res[k.id].kept and res[alt.id].kept and "keeps 2" in res[k.id].detail
    r = res[plain.id]
    assert (r.reason, r.values["duplicate_of"], r.values["duplicate_kind"]) == ("exact_duplicate", alt.id, "content")


def test_a_member_is_dropped_on_the_pair_only_its_own_search_finds():
    """R (the plain layout) reaches K (its edited copy, 0.72), M (the alternate layout, R's
    note content) reaches K-alt (the same edited copy in M's layout) but not K; R reaches K-alt
    only below the threshold. R is dropped as K's near duplicate; M, searched on its own, as
    K-alt's, at its own similarity. Dedup version 4 searched only R (the representative): M
    reached no kept file through R's links and was kept."""
    plain, alt, k, k_alt = _layout_members()
    # the same names with the roles swapped: the plain layout first by id (the representative)
    rep = Member(alt.id, plain.sha256, alt.source, {}, plain.artifacts)
    mate = Member(plain.id, alt.sha256, plain.source, {}, alt.artifacts)
    assert rep.id < mate.id
    res, state = run([rep, mate, k, k_alt])
    assert res[k.id].kept and res[k_alt.id].kept
    assert _own(k, k_alt, state) < 0.3 and _own(rep, k_alt, state) < 0.3 and _own(mate, k, state) < 0.3
    for m, named in ((rep, k), (mate, k_alt)):
        own = _own(m, named, state)
        r = res[m.id]
        assert (r.reason, r.values["duplicate_of"], r.values["duplicate_kind"]) == ("near_duplicate", named.id, "near")
        assert own >= 0.3 and r.values["similarity"] == round(own, 4), (m.source, r.values, own)
    # the same verdicts under any order of the input, and on a rerun that adds the
    # representative (which becomes its content's representative then; M's links are reused)
    for order in ([k_alt, k, mate, rep], [mate, k_alt, rep, k]):
        again, _ = run(order)
        assert {i: x.to_json() for i, x in again.items()} == {i: x.to_json() for i, x in res.items()}
    _, first = run([mate, k, k_alt])
    again, _ = run([rep, mate, k, k_alt], previous=first.current)
    assert {i: x.to_json() for i, x in again.items()} == {i: x.to_json() for i, x in res.items()}
    # a rerun that adds K-alt, which only M (not the representative) reaches: M, searched by
    # the last run, is searched against the new file (its links stored, it stays in the
    # index). M was kept by the last run; with displace_kept the rerun equals a fresh run.
    move = {"displace_kept": True}
    _, first = run([rep, mate, k], opts=move)
    assert first.current["searched_extra"] == [mate.id]
    again, state = run([rep, mate, k, k_alt], opts=move, previous=first.current)
    assert any("1 of 4 searched files compared" in n and "against stored" in n for n in state.notes), state.notes
    assert {i: x.to_json() for i, x in again.items()} == {i: x.to_json() for i, x in res.items()}


def test_members_with_one_content_and_one_shingle_set_are_searched_once():
    """Members of one note content whose shingle sets are equal (another velocity, another
    program: the same voices) need no search of their own: only the representative is
    searched, as before; a member in another layout is."""
    plain, alt, k, _ = _layout_members()
    rows, _, _ = _layouts()
    louder = member("louder.mid", [(s, e, p, ch, (pr + 5) % 128, tr, min(127, v + 20))
                                   for s, e, p, ch, pr, tr, v in rows], Dedup())
    assert np.array_equal(louder.artifacts["dedup"]["shingles"], plain.artifacts["dedup"]["shingles"])
    _, state = run([plain, louder, k])
    assert any("2 of 2 searched files compared (2 distinct note contents + 0 " in n for n in state.notes), state.notes
    fresh, state = run([plain, louder, alt, k])
    assert any("3 of 3 searched files compared (2 distinct note contents + 1 " in n for n in state.notes), state.notes
    # a rerun adding a member compares only its set with those of its content's searched
    # members, reads no old member's set against another, and writes what a fresh run writes
    for new in (louder, alt):
        olds = [x for x in (plain, louder, alt, k) if x is not new]
        _, first = run(olds)
        read = []
        real = dedup_module._choose_searched
        dedup_module._choose_searched = lambda block, wanted, *a: read.extend(wanted) or real(block, wanted, *a)
        try:
            again, state = run([plain, louder, alt, k], previous=first.current)
        finally:
            dedup_module._choose_searched = real
        # no set is read but the new member's and the one of equal signature it may equal
        assert sorted(read) == (sorted([louder.id, plain.id]) if new is louder else []), new.source
        assert {i: x.to_json() for i, x in again.items()} == {i: x.to_json() for i, x in fresh.items()}
    assert any(" of 3 searched files compared" in n for n in state.notes), state.notes


def test_the_split_keeps_a_content_and_the_file_its_mate_reaches_in_one_part():
    """Dedup then split (as a run chains them: the split reads dedup's clusters): the
    representative kept by dedup (the alternate layout) and K (kept, reached by the
    representative's mate only) share a part under every seed, with twenty unrelated pieces
    around them (test_dedup.compose, other families)."""
    from pipeline.stages.split import Split
    plain, alt, k, _ = _layout_members()
    stage = Dedup()
    others = [member(f"other{i}.mid", compose(family(10 + i), seed=900 + i), stage) for i in range(20)]
    members = [alt, plain, k] + others
    res, _ = run(members)
    kept = [m for m in members if res[m.id].kept]
    assert alt in kept and k in kept
    for seed in range(6):
        state = CorpusState(upstream={"dedup": res})
        parts = Split({"seed": seed, "ratios": {"x": 0.5, "y": 0.5}}).run_corpus(kept, state)
        assert parts[alt.id].values["split"] == parts[k.id].values["split"], seed
