"""The dedup stage on corpora built in code: every variant kind, style families, reruns."""
from __future__ import annotations

import hashlib
import random

import numpy as np
import pytest

from pipeline.config import validate_stage_options
from pipeline.errors import ConfigError
from pipeline.stages.base import CorpusState, FileContext, Member
from pipeline.stages.dedup import KEEP_POLICIES, Dedup

from test_shingles import make_piece

TPB = 480
CHORDS = {1: (0, 4, 7), 4: (5, 9, 12), 5: (7, 11, 14), 6: (9, 12, 16)}


def family(seed: int) -> dict:
    """A style: key, meter (4/4), chord progression and a small rhythm vocabulary."""
    rng = random.Random(seed)
    return {"tonic": rng.randrange(12), "progression": rng.choice([(1, 6, 4, 5), (1, 4, 5, 1), (6, 4, 1, 5)]),
            "cells": [rng.choice([(2, 2), (1, 1, 2), (3, 1), (4,), (1, 1, 1, 1)]) for _ in range(4)]}


def compose(fam: dict, seed: int, bars: int = 32) -> list[tuple]:
    """Melody (channel 0) from the family's rhythm cells, block chords and bass of its progression,
    a drum groove. Rows: (start, end, pitch, channel, program, track, velocity)."""
    rng = random.Random(seed)
    rows, p = [], 72 + fam["tonic"]
    scale = (0, 2, 4, 5, 7, 9, 11)
    for bar in range(bars):
        t0 = bar * 4 * TPB
        root = fam["progression"][bar % len(fam["progression"])]
        for q in CHORDS[root]:
            rows.append((t0, t0 + 4 * TPB, 48 + fam["tonic"] + q, 1, 0, 1, 70))
        rows.append((t0, t0 + 2 * TPB, 36 + fam["tonic"] + CHORDS[root][0], 2, 33, 2, 80))
        rows.append((t0, t0 + 120, 36, 9, 0, 3, 100))
        t = t0
        for beat in range(2):
            for d in rng.choice(fam["cells"]):
                step = rng.choice((-2, -1, -1, 1, 1, 2, 3, -3))
                deg = (p - 72 - fam["tonic"]) + step
                p = int(np.clip(72 + fam["tonic"] + deg, 64, 92))
                if (p - fam["tonic"]) % 12 not in scale:
                    p += 1
                rows.append((t, t + d * TPB // 2, p, 0, 0, 0, 90))
                t += d * TPB // 2
    return rows


def variants(rows: list[tuple], seed: int) -> dict[str, tuple[list[tuple], dict]]:
    """Each planted kind as (rows, piece keywords). Near kinds lose the final drum hit so the
    original is the richest member (as synth does)."""
    rng = random.Random(seed)
    last_drum = max(i for i, r in enumerate(rows) if r[3] == 9)
    near = [r for i, r in enumerate(rows) if i != last_drum]
    pitched = [i for i, r in enumerate(near) if r[3] == 0]
    edited = list(near)
    for i in rng.sample(pitched, len(pitched) // 30):
        s, e, p, ch, pr, tr, v = edited[i]
        edited[i] = (s, e, p + rng.choice((-2, 2)), ch, pr, tr, v)
    drop = set(rng.sample(range(len(edited)), len(edited) // 40))
    edited = [r for i, r in enumerate(edited) if i not in drop]
    end = max(r[1] for r in rows)
    cut = int(end * 0.85) // (4 * TPB) * 4 * TPB
    return {
        "same_content": ([(s, e, p, ch, (pr + 9) % 128, 0, 50) for s, e, p, ch, pr, tr, v in rows], {}),
        "transposed": ([(s, e, p + (0 if ch == 9 else 5), ch, pr, tr, v) for s, e, p, ch, pr, tr, v in near], {}),
        "tempo": (near, {"tempos": ((0, 350_000),)}),
        "reorchestrated": ([(s, e, p, ch if ch == 9 else (ch + 3) % 9, (pr + 40) % 128, 3 - tr, v)
                            for s, e, p, ch, pr, tr, v in near], {}),
        "requantized": ([(max(0, s * 4 // 5 + rng.randint(-8, 8)), e * 4 // 5, p, ch, pr, tr, v)
                         for s, e, p, ch, pr, tr, v in near], {"tpb": 384}),
        "edited": (edited, {}),
        "excerpt": ([r for r in near if r[0] < cut], {}),
    }


def member(name: str, rows: list[tuple], stage: Dedup, sha: str | None = None, **kw) -> Member:
    piece = make_piece(rows, **kw)
    sha = sha or hashlib.sha256(name.encode()).hexdigest()
    art = stage.prepare(piece, FileContext(piece, name, sha))
    return Member(hashlib.sha256(name.encode()).hexdigest()[:16], sha, name, {}, {"dedup": art})


@pytest.fixture(scope="module")
def corpus():
    """Three families of three distinct pieces each; piece 0 of each family has every variant."""
    stage = Dedup()
    members, truth = [], {}
    for f in range(3):
        fam = family(f)
        for k in range(3):
            rows = compose(fam, seed=100 * f + k)
            name = f"f{f}/p{k}.mid"
            m = member(name, rows, stage)
            members.append(m)
            truth[m.id] = (f, k, "original")
            if k:
                continue
            copy = Member(hashlib.sha256(b"copy" + name.encode()).hexdigest()[:16], m.sha256,
                          f"f{f}/copy.mid", {}, m.artifacts)
            members.append(copy)
            truth[copy.id] = (f, k, "exact_copy")
            for kind, (vrows, kw) in variants(rows, seed=f).items():
                tpb = kw.pop("tpb", TPB)
                vm = member(f"f{f}/p{k}-{kind}.mid", vrows, stage, tpb=tpb, **kw)
                members.append(vm)
                truth[vm.id] = (f, k, kind)
    return members, truth


def run(members, opts=None, previous=None, flags=None):
    state = CorpusState(previous=previous, flags=flags)
    return Dedup(opts).run_corpus(members, state), state


def test_every_variant_joins_its_original_and_families_stay_apart(corpus):
    members, truth = corpus
    res, _ = run(members)
    by_id = {m.id: m for m in members}
    for mid, (f, k, kind) in truth.items():
        orig = next(m for m, t in truth.items() if t == (f, k, "original"))
        assert res[mid].values["cluster"] == res[orig].values["cluster"], (kind, res[mid].detail)
    clusters = {r.values["cluster"] for r in res.values()}
    assert len(clusters) == 9  # nine distinct pieces, three per shared-progression family
    exact = ("original", "exact_copy", "same_content")
    for mid, (f, k, kind) in truth.items():
        r = res[mid]
        kept = r.values["cluster"]
        kept_kind = truth[kept][2]
        assert kept_kind in exact  # the richest members tie; the smallest id among them wins
        assert kept == min(m for m, t in truth.items() if t[:2] == (f, k) and t[2] in exact)
        if mid == kept:
            assert r.kept and r.values["cluster_size"] == (9 if k == 0 else 1)
            continue
        assert not r.kept and r.values["duplicate_of"] == kept
        if {kind, kept_kind} <= {"original", "exact_copy"}:
            expected = ("exact_duplicate", "bytes")
        elif kind in exact:
            expected = ("exact_duplicate", "content")
        else:
            expected = ("near_duplicate", "near")
        assert (r.reason, r.values["duplicate_kind"]) == expected, (kind, r.detail)
        assert r.values["similarity"] >= 0.3 and by_id[kept].source in r.detail


def test_result_does_not_depend_on_member_order(corpus):
    members, _ = corpus
    first, _ = run(members)
    shuffled = list(members)
    random.Random(1).shuffle(shuffled)
    again, _ = run(shuffled)
    assert {k: v.to_json() for k, v in first.items()} == {k: v.to_json() for k, v in again.items()}


def test_rerun_compares_only_new_files_and_keeps_the_kept(corpus):
    members, truth = corpus
    old = [m for m in members if truth[m.id][2] != "excerpt"]
    first, state = run(old)
    stage = Dedup()
    fam = family(0)
    rows = compose(fam, seed=0)
    longer = rows + [(s + 32 * 4 * TPB, e + 32 * 4 * TPB, p, ch, pr, tr, v)
                     for s, e, p, ch, pr, tr, v in rows[:40]]  # richer than the kept original
    newcomer = member("new/longer.mid", longer, stage)
    new = old + [newcomer] + [m for m in members if truth[m.id][2] == "excerpt"]
    second, state2 = run(new, previous=state.current)
    assert "4 of 25" in state2.notes[0] and "against stored signatures" in state2.notes[0]
    kept0 = next(r.values["cluster"] for m, r in first.items() if truth[m] == (0, 0, "original"))
    assert second[newcomer.id].values["duplicate_of"] == kept0   # the newcomer does not displace it
    assert second[kept0].kept and second[kept0].values["cluster_size"] == 10
    assert all(second[k].to_json() == first[k].to_json() for k in first if truth[k][1] != 0)
    displaced, _ = run(new, {"displace_kept": True}, previous=state.current)
    assert displaced[newcomer.id].kept and displaced[kept0].values["duplicate_of"] == newcomer.id
    fresh, st3 = run(new, previous=state.current, flags={"fresh": True})
    assert fresh[newcomer.id].kept and "all against all" in st3.notes[0]


def test_rerun_with_same_files_reproduces_the_first_run(corpus):
    members, _ = corpus
    first, state = run(members)
    second, state2 = run(members, previous=state.current)
    assert {k: v.to_json() for k, v in first.items()} == {k: v.to_json() for k, v in second.items()}
    assert state2.notes[0].startswith("dedup: 0 of")
    changed, state3 = run(members, {"threshold": 0.6}, previous=state.current)
    assert "all against all" in state3.notes[0]  # other threshold: stored links are not reused


def test_keep_policies_are_deterministic(corpus):
    members, truth = corpus
    for policy in KEEP_POLICIES:
        res, _ = run(members, {"keep_policy": policy})
        group = [m for m in members if truth[m.id][:2] == (0, 0)]
        key, _ = KEEP_POLICIES[policy]
        facts = [{"id": m.id, "source": m.source, "notes": m.artifacts["dedup"]["notes"],
                  "duration_beats": m.artifacts["dedup"]["duration_beats"]} for m in group]
        assert res[group[0].id].values["cluster"] == min(facts, key=key)["id"]


@pytest.mark.parametrize("opts,match", [
    ({"bands": 30}, r"bands \(30\) must divide num_perm \(128\)"),
    ({"threshold": 1.5}, r"threshold: must be in \(0, 1\] \(got 1.5\)"),
    ({"keep_policy": "biggest"}, r"keep_policy: must be one of"),
    ({"num_perm": 4}, r"num_perm: must be between 8 and 1024 \(got 4\)"),
])
def test_bad_options_say_the_rule_and_value(opts, match):
    # the config loader checks every option of the table and then the stage's check_options
    with pytest.raises(ConfigError, match=match):
        validate_stage_options("dedup", opts, "stages[3].dedup")


def test_prepare_returns_compact_plain_data(corpus):
    members, _ = corpus
    art = members[0].artifacts["dedup"]
    assert set(art) == {"content_hash", "signature", "shingles", "notes", "duration_beats"}
    assert art["signature"].dtype == np.uint32 and art["signature"].shape == (128,)
    assert art["shingles"].dtype == np.uint64 and np.all(np.diff(art["shingles"].astype(np.float64)) > 0)
    assert isinstance(art["content_hash"], str) and isinstance(art["notes"], int)


# --- Real near-duplicates: music21's bundled Bach chorales ---------------------------------------
# Several chorale files harmonize the same hymn tune. Tune groups verified by hand (soprano
# lines printed with music21 and compared note by note; tune names from memory):
#   "Herzlich tut mich verlangen" (the Passion chorale): bwv244.15, bwv244.17 (the same setting a
#     semitone higher), bwv244.44, bwv244.54, bwv244.62, bwv270, bwv271;
#   "Wo Gott der Herr nicht bei uns hält": bwv114.7, bwv256, bwv258;
#   bwv245.11 and bwv395 (same tune, same key); bwv120.8-a and bwv137.5 (same tune a tone apart);
#   bwv20.7 and bwv20.11 (two verses of one cantata, same setting); bwv84.5 and bwv197.10;
#   bwv281.krn and bwv281.mxl: one chorale in two encodings bundled with music21.
BACH_TUNES = {
    "passion": ("bwv244.15", "bwv244.17", "bwv244.44", "bwv244.54", "bwv244.62", "bwv270", "bwv271"),
    "wo_gott": ("bwv114.7", "bwv256", "bwv258"),
    "245.11": ("bwv245.11", "bwv395"), "137.5": ("bwv120.8-a", "bwv137.5"),
    "20": ("bwv20.7", "bwv20.11"), "84.5": ("bwv84.5", "bwv197.10"),
    "281": ("bwv281.krn", "bwv281.mxl"),
}


def chorale_piece(name: str):
    """A chorale from music21's corpus as a Piece (one track per voice, 480 ticks per quarter)."""
    from music21 import corpus
    score = corpus.parse(f"bach/{name}")
    rows = []
    for part_index, part in enumerate(score.parts):
        for n in part.flatten().notes:
            for p in n.pitches:
                s = int(round(float(n.offset) * TPB))
                rows.append((s, s + max(1, int(round(float(n.quarterLength) * TPB))), p.midi,
                             part_index, 52, part_index, 80))
    return make_piece(rows)


@pytest.fixture(scope="module")
def chorales():
    pytest.importorskip("music21")
    stage = Dedup()
    out = {}
    for tune, names in BACH_TUNES.items():
        for name in names:
            piece = chorale_piece(name)
            sha = hashlib.sha256(name.encode()).hexdigest()
            out[name] = (tune, Member(sha[:16], sha, name, {}, {"dedup": stage.prepare(piece, FileContext(piece, name))}))
    return out


def test_bach_chorales_sharing_a_tune(chorales):
    from pipeline.similarity.grouping import near_links
    members = [m for _, m in chorales.values()]
    name_of = {m.id: name for name, (_, m) in chorales.items()}
    tune_of = {m.id: tune for tune, m in chorales.values()}
    res, _ = run(members)
    clusters: dict[str, set[str]] = {}
    for mid, r in res.items():
        clusters.setdefault(r.values["cluster"], set()).add(name_of[mid])
    # what the stage links at its default threshold (0.3):
    linked = sorted(sorted(c) for c in clusters.values() if len(c) > 1)
    assert ["bwv281.krn", "bwv281.mxl"] in linked          # same chorale, two encodings
    assert ["bwv20.11", "bwv20.7"] in linked
    assert ["bwv120.8-a", "bwv137.5"] in linked             # transposed setting
    assert ["bwv245.11", "bwv395"] in linked
    assert ["bwv114.7", "bwv256", "bwv258"] in linked       # one soprano (the lead), three settings
    passion = next(c for c in linked if "bwv244.15" in c)
    assert {"bwv244.15", "bwv244.17", "bwv244.44", "bwv244.54", "bwv271"} <= set(passion)
    # no cluster mixes two tunes
    for c in clusters.values():
        assert len({tune_of[m.id] for n, (_, m) in chorales.items() if n in c}) == 1, c
    # the split stage's grouping search at its threshold (0.2) also joins more harmonizations
    sigs = {m.id: m.artifacts["dedup"]["signature"] for m in members}
    shingles = {m.id: m.artifacts["dedup"]["shingles"] for m in members}
    low = {(name_of[a], name_of[b]) for a, b, _ in near_links(sigs, 0.2, shingles)}
    low = {tuple(sorted(p)) for p in low}
    assert ("bwv114.7", "bwv258") in low and ("bwv256", "bwv258") in low
    assert all(tune_of[chorales[a][1].id] == tune_of[chorales[b][1].id] for a, b in low), low


def _changes(members, truth):
    """A first corpus and the changed second one: variants of kept originals arrive (their
    clusters grow), an excerpt of a piece kept alone arrives, an unrelated piece arrives, and
    one member of a cluster and one lone member are now read under another source path."""
    first = [m for m in members if truth[m.id][2] not in ("excerpt", "edited", "tempo")]
    stage = Dedup()
    arrived = [m for m in members if truth[m.id][2] in ("excerpt", "edited", "tempo")]
    lone = compose(family(1), seed=101)  # piece 1 of family 1: alone in the first corpus
    arrived.append(member("new/f1p1-excerpt.mid", [r for r in lone if r[0] < 60 * TPB], stage))
    arrived.append(member("new/unrelated.mid", compose(family(9), seed=999), stage))
    renamed = {next(m.id for m in first if truth[m.id] == (2, 0, "transposed")): "0/renamed.mid",
               next(m.id for m in first if truth[m.id] == (0, 2, "original")): "0/lone.mid"}
    second = [Member(m.id, m.sha256, renamed.get(m.id, m.source), m.values, m.artifacts)
              for m in first] + arrived
    return first, second


@pytest.mark.parametrize("opts", [{}, {"displace_kept": True}, {"keep_policy": "smallest_id"}])
def test_clusters_as_last_run_keep_their_results_and_the_rest_equals_a_full_computation(corpus, opts):
    """With the last run's results at hand, dedup returns them (the same objects) for clusters
    with no new member and no changed source, and recomputes the others; every result and the
    saved state must equal what the computation without them gives (the oracle)."""
    members, truth = corpus
    first, second = _changes(members, truth)
    res1, st1 = run(first, opts)
    full, st_full = run(second, opts, previous=st1.current)
    inc, st_inc = run(second, opts, previous=st1.current, flags={"previous_results": res1})
    assert {k: v.to_json() for k, v in inc.items()} == {k: v.to_json() for k, v in full.items()}
    assert st_inc.current == st_full.current and st_inc.notes == st_full.notes
    reused = [k for k in inc if inc[k] is res1.get(k)]
    changed = {k for k in full if k not in res1 or full[k].to_json() != res1[k].to_json()}
    assert reused and not changed & set(reused)
    assert {m.id for m in second} - set(reused) == changed  # only what changed was recomputed
    # a source read under another path is never reused (details name sources)
    moved = {m.id for m in second if m.source.startswith("0/")}
    assert not moved & {k for k in reused if full[k].values["cluster_size"] > 1}


@pytest.mark.parametrize("change", ["removed", "replaced", "moved_lone", "config"])
def test_lone_members_as_last_run_equal_a_full_computation_after_any_change(corpus, change):
    """Most clusters of a corpus are single members, reused on a rerun by their own quick rule;
    after a removed file, a file replaced by other bytes under its path, a lone file moved to
    another path, or a changed threshold, every result and the saved state must equal the
    computation without the last run's results (the oracle), and a lone member is reused only
    when its cluster is the last run's."""
    members, truth = corpus
    first, second = _changes(members, truth)
    res1, st1 = run(first)
    opts = {}
    lone = [m for m in second if m.id in res1 and res1[m.id].values["cluster_size"] == 1]
    if change == "removed":
        second = [m for m in second if m.id != lone[0].id]
    elif change == "replaced":  # the same path, other bytes: another member id and content
        victim = lone[0]
        sha = hashlib.sha256(b"other bytes of " + victim.source.encode()).hexdigest()
        made = member(victim.source, compose(family(7), seed=707), Dedup(), sha=sha)
        other = Member(sha[:16], sha, victim.source, {}, made.artifacts)  # ids are content hashes
        second = [other if m.id == victim.id else m for m in second]
    elif change == "moved_lone":
        second = [Member(m.id, m.sha256, "moved/" + m.source, m.values, m.artifacts)
                  if m.id == lone[1].id else m for m in second]
    else:
        opts = {"threshold": 0.5}
    full, st_full = run(second, opts, previous=st1.current)
    inc, st_inc = run(second, opts, previous=st1.current, flags={"previous_results": res1})
    assert {k: v.to_json() for k, v in inc.items()} == {k: v.to_json() for k, v in full.items()}
    assert st_inc.current == st_full.current and st_inc.notes == st_full.notes
    reused = {k for k in inc if inc[k] is res1.get(k)}
    if change == "moved_lone":  # a lone member's result names no source: it is reused
        assert lone[1].id in reused
    elif change == "config":  # other link options: no link of the last run is trusted
        assert not reused
    else:  # a member gone: the links among the members left are (test_a_rerun_after_removals...)
        assert reused and lone[0].id not in reused


@pytest.mark.parametrize("removed", ["lone", "kept", "dropped", "content", "several"])
def test_a_rerun_after_removals_equals_a_search_of_every_pair(corpus, removed):
    """Files removed since the last run: the links among the members left are reused, the
    members of a note content that lost one are searched again, and the clusters that held a
    removed member are decided again. Every result and the saved state must equal a search of
    every pair with the same generic shingles (the oracle: the last run's generic shingles are
    kept while its links are reused, as on a rerun that adds files), and the clusters that held
    no removed member keep their stored results (the same objects)."""
    members, truth = corpus
    res1, st1 = run(members, flags={})
    by_kind = {truth[m.id]: m.id for m in members}
    content = sorted([by_kind[(0, 0, "original")], by_kind[(0, 0, "same_content")]])
    assert res1[content[0]].values["cluster"] == res1[content[1]].values["cluster"]
    assert any(set(content) <= set(c) for c in st1.current["contents"])  # one note content
    lone = next(m.id for m in members if res1[m.id].values["cluster_size"] == 1)
    kept = res1[by_kind[(1, 0, "original")]].values["cluster"]
    dropped = by_kind[(2, 0, "transposed")]
    assert not res1[dropped].kept and res1[kept].kept
    gone = {"lone": [lone], "kept": [kept], "dropped": [dropped], "content": [content[0]],
            "several": [lone, kept, content[0]]}[removed]
    second = [m for m in members if m.id not in gone]
    inc, st_inc = run(second, previous=st1.current, flags={"previous_results": res1})
    oracle, st_oracle = run(second, previous={k: st1.current[k] for k in ("link_fingerprint", "generic")})
    assert {k: v.to_json() for k, v in inc.items()} == {k: v.to_json() for k, v in oracle.items()}
    assert st_inc.current == st_oracle.current
    reused = {k for k in inc if inc[k] is res1.get(k)}
    touched = {res1[g].values["cluster"] for g in gone}
    assert reused and not {k for k in reused if res1[k].values["cluster"] in touched}
    assert "against stored signatures" in st_inc.notes[0]


def test_a_newcomer_joining_two_old_clusters_and_a_missing_result_equal_a_full_computation():
    """A rerun walks only the clusters that may differ from the last run's (a new member, a
    member without a stored result, a moved source): a newcomer sharing half of each of two
    old clusters merges them into one, and an old lone member whose stored result is gone is
    made again; every result and the saved state equal the computation without the last
    run's results (the oracle), and the untouched clusters keep the stored objects."""
    pool = np.arange(1, 2001, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15) | np.uint64(1 << 63)
    a, a2 = planted("a.mid", pool[:300], notes=500), planted("a2.mid", pool[:290], notes=450)
    c, c2 = planted("c.mid", pool[300:600], notes=400), planted("c2.mid", pool[310:600], notes=350)
    lone = [planted(f"lone{k}.mid", pool[700 + 200 * k:900 + 200 * k], notes=300) for k in range(4)]
    first = [a, a2, c, c2, *lone]
    res1, st1 = run(first)
    assert res1[a.id].values["cluster_size"] == res1[c.id].values["cluster_size"] == 2
    bridge = planted("new/bridge.mid", pool[150:450], notes=100)  # containment 0.5 with a and c
    second = first + [bridge]
    stored = {k: r for k, r in res1.items() if k != lone[0].id}  # its stored result is gone
    full, st_full = run(second, previous=st1.current)
    inc, st_inc = run(second, previous=st1.current, flags={"previous_results": stored})
    assert {k: v.to_json() for k, v in inc.items()} == {k: v.to_json() for k, v in full.items()}
    assert st_inc.current == st_full.current and st_inc.notes == st_full.notes
    assert {full[k].values["cluster_size"] for k in (a.id, a2.id, c.id, c2.id, bridge.id)} == {5}
    reused = {k for k in inc if inc[k] is stored.get(k)}
    assert reused == {m.id for m in lone[1:]}


# --- No chaining: every drop is justified by its own pair -----------------------------------------
def planted(name: str, shingles: np.ndarray, notes: int) -> Member:
    """A member whose dedup artifacts are given directly: a shingle set (sorted unique uint64)
    signed as ``prepare`` signs it, so the test decides the pair similarities exactly."""
    from pipeline.similarity.minhash import minhash
    sh = np.unique(np.asarray(shingles, dtype=np.uint64))
    mid = hashlib.sha256(name.encode()).hexdigest()[:16]
    art = {"content_hash": "content-" + name, "signature": minhash(sh), "shingles": sh,
           "notes": notes, "duration_beats": float(notes)}
    return Member(mid, hashlib.sha256(name.encode()).hexdigest(), name, {}, {"dedup": art})


def jaccard_or_containment(a: np.ndarray, b: np.ndarray, generic: np.ndarray | None = None) -> float:
    """The similarity dedup documents (README, "How similarity is computed"), on Python sets,
    independently of pipeline.similarity: generic shingles left out; Jaccard |A & B| / |A | B|
    (Broder 1997), or containment |A & B| / min(|A|, |B|) when the smaller set holds at least
    10% of the larger's size and it is higher; the same between the lead-voice parts (shingles
    below 2**63) when both hold 16 or more (containment there from 64), the higher counting."""
    drop = set(generic.tolist()) if generic is not None else set()
    sa, sb = set(a.tolist()) - drop, set(b.tolist()) - drop

    def measure(x: set, y: set, min_contained: int = 0) -> float:
        if not x or not y:
            return 0.0
        inter = len(x & y)
        small, large = sorted((len(x), len(y)))
        jac = inter / len(x | y)
        return max(jac, inter / small) if small >= 0.1 * large and small >= min_contained else jac

    best = measure(sa, sb)
    la, lb = {v for v in sa if v < 2 ** 63}, {v for v in sb if v < 2 ** 63}
    if len(la) >= 16 and len(lb) >= 16:
        best = max(best, measure(la, lb, 64))
    return best


def test_a_chain_drops_nothing_through_other_members():
    """A ~ B ~ C with A and C disjoint: B shares half of A and half of C (containment 0.5 with
    each), so single linkage makes one cluster of three, but C is not a duplicate of A."""
    pool = np.arange(1, 601, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15) | np.uint64(1 << 63)
    a = planted("a.mid", pool[:300], notes=500)          # kept first (most notes)
    b = planted("b.mid", pool[150:450], notes=400)
    c = planted("c.mid", pool[300:], notes=300)
    res, state = run([a, b, c])
    assert jaccard_or_containment(pool[:300], pool[300:]) == 0.0
    assert res[a.id].kept and res[c.id].kept, res[c.id].detail
    assert not res[b.id].kept and res[b.id].reason == "near_duplicate"
    assert res[b.id].values["duplicate_of"] in (a.id, c.id)
    assert res[b.id].values["similarity"] == 0.5 == jaccard_or_containment(pool[150:450], pool[:300])
    # one cluster (leakage is transitive: the split keeps it in one part), named by A
    assert {r.values["cluster"] for r in res.values()} == {a.id}
    assert {r.values["cluster_size"] for r in res.values()} == {3}
    assert "cluster of 3 that keeps 2" in res[c.id].detail and "below threshold" not in res[b.id].detail
    assert sorted(state.current["kept"]) == sorted([a.id, c.id])
    # the order decides who is kept, never the chain: with B richest, A and C are its duplicates
    b2 = planted("b.mid", pool[150:450], notes=900)
    res2, _ = run([a, b2, c])
    assert res2[b2.id].kept and not res2[a.id].kept and not res2[c.id].kept
    assert res2[a.id].values["similarity"] == res2[c.id].values["similarity"] == 0.5


def test_a_drop_names_its_most_similar_kept_member():
    """D links to two kept members (which do not link to each other): it names the closer."""
    pool = np.arange(1, 1001, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15) | np.uint64(1 << 63)
    a = planted("a.mid", pool[:300], notes=500)
    c = planted("c.mid", pool[500:800], notes=400)
    d = planted("d.mid", np.concatenate([pool[100:200], pool[500:700]]), notes=100)
    res, _ = run([a, c, d])
    assert res[a.id].kept and res[c.id].kept
    assert res[d.id].values["duplicate_of"] == c.id
    assert res[d.id].values["similarity"] == round(jaccard_or_containment(d.artifacts["dedup"]["shingles"],
                                                                          pool[500:800]), 4)


def test_every_drop_on_the_corpus_reaches_the_threshold_with_its_own_pair(corpus):
    members, _ = corpus
    by_id = {m.id: m for m in members}
    for opts in ({}, {"threshold": 0.6}, {"keep_policy": "smallest_id"}):
        res, state = run(members, opts)
        t = opts.get("threshold", 0.3)
        generic = np.array(state.current.get("generic", []), dtype=np.uint64)
        for mid, r in res.items():
            if r.kept or r.reason != "near_duplicate":
                continue
            own = jaccard_or_containment(by_id[mid].artifacts["dedup"]["shingles"],
                                         by_id[r.values["duplicate_of"]].artifacts["dedup"]["shingles"],
                                         generic)
            assert r.values["similarity"] == round(own, 4) and own >= t, r.detail
            assert res[r.values["duplicate_of"]].kept


def test_musical_chain_keeps_both_ends():
    """Piece A, piece C of another style family, and B = A's first 16 bars then C's last 16:
    B duplicates A or C, but C is no duplicate of A."""
    stage = Dedup()
    ra, rc = compose(family(0), seed=11, bars=36), compose(family(5), seed=12)
    half = 16 * 4 * TPB
    rb = [r for r in ra if r[0] < half] + [r for r in rc if r[0] >= half]
    a, b, c = member("a.mid", ra, stage), member("b.mid", rb, stage), member("c.mid", rc, stage)
    res, _ = run([a, b, c])
    assert res[a.id].kept and res[c.id].kept, res[c.id].detail
    assert not res[b.id].kept and res[b.id].values["similarity"] >= 0.3


def test_a_bridge_arriving_later_keeps_both_ends_and_equals_a_full_computation():
    """A and C kept alone in the first run; B bridging them arrives: both stay kept, B is
    dropped, and the results with the last run's results equal those computed without."""
    pool = np.arange(1, 601, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15) | np.uint64(1 << 63)
    a = planted("a.mid", pool[:300], notes=300)
    c = planted("c.mid", pool[300:], notes=300)
    b = planted("b.mid", pool[150:450], notes=900)   # richest: would be kept first from scratch
    res1, st1 = run([a, c])
    full, st_full = run([a, b, c], previous=st1.current)
    inc, st_inc = run([a, b, c], previous=st1.current, flags={"previous_results": res1})
    assert {k: v.to_json() for k, v in inc.items()} == {k: v.to_json() for k, v in full.items()}
    assert st_inc.current == st_full.current
    assert full[a.id].kept and full[c.id].kept and not full[b.id].kept
    again, _ = run([a, b, c], previous=st_full.current, flags={"previous_results": full})
    assert all(again[k] is full[k] for k in full)   # nothing new: the last results as they are


def test_a_byte_copy_of_a_dropped_file_carries_that_files_own_pair(tmp_path):
    """End to end: B (an edited copy of A, dropped as its near duplicate) and B2, B's
    byte-identical copy. B2's manifest line and its decision trail agree, and name A with B's
    own similarity (the same bytes' pair), not 1.0; A's byte copy is an exact duplicate."""
    import json

    import yaml

    from pipeline.config import load_config
    from pipeline.audit.explain import explain
    from pipeline.engine.runner import Runner
    from test_split import _midi_bytes
    rows = compose(family(2), seed=77)
    edited, _ = variants(rows, seed=2)["edited"]
    corpus = tmp_path / "in"
    corpus.mkdir()
    for name, data in (("a.mid", _midi_bytes(rows)), ("a2.mid", _midi_bytes(rows)),
                       ("b.mid", _midi_bytes(edited)), ("b2.mid", _midi_bytes(edited))):
        (corpus / name).write_bytes(data)
    cfg = tmp_path / "c.yaml"
    cfg.write_text(yaml.safe_dump({"input": str(corpus), "output": str(tmp_path / "out"), "workers": 1,
                                   "stages": [{"validate": {}}, {"dedup": {}}]}))
    Runner(load_config(cfg), quiet=True).run()
    got = {json.loads(x)["source"]: json.loads(x)
           for x in (tmp_path / "out" / "manifest.jsonl").read_text().splitlines()}
    a, a2, b, b2 = (got[n] for n in ("a.mid", "a2.mid", "b.mid", "b2.mid"))
    assert a["status"] == "kept" and b["reason"] == "near_duplicate" and b["duplicate_of"] == a["id"]
    assert 0.3 <= b["similarity"] < 1.0
    assert (b2["reason"], b2["duplicate_of"], b2["similarity"], b2["duplicate_kind"]) == \
        ("near_duplicate", a["id"], b["similarity"], "near")
    assert (a2["reason"], a2["duplicate_of"], a2["similarity"]) == ("exact_duplicate", a["id"], 1.0)
    trail = explain(tmp_path / "out", "b2.mid")
    assert "near_duplicate" in trail and "byte-identical copy" in trail
    # cluster_size counts contents (2: A and B), the manifest has four rows; explain gives both
    assert a["cluster_size"] == 2 and sum(r["cluster"] == a["cluster"] for r in got.values()) == 4
    assert "cluster members (4 files, 2 contents: byte-identical files share an id" in trail


# --- Generic material counted over the corpus (issue 20, item 2) -------------------------------
def _tunes_over_one_accompaniment(count: int):
    """``count`` different tunes (test_shingles.melody) over one and the same accompaniment
    (test_shingles.comping(7)): the accompaniment is generic in this corpus, the tunes are not."""
    from test_shingles import comping, melody
    stage = Dedup()
    members = []
    for k in range(count):
        piece = make_piece(melody(300 + k) + comping(7, 30))
        sha = hashlib.sha256(f"tune {k}".encode()).hexdigest()
        members.append(Member(sha[:16], sha, f"tune{k}.mid", {},
                              {"dedup": stage.prepare(piece, FileContext(piece, f"tune{k}.mid"))}))
    return members


def test_a_shared_accompaniment_does_not_link_different_tunes():
    members = _tunes_over_one_accompaniment(12)
    res, state = run(members)
    assert all(r.kept for r in res.values()), [r.detail for r in res.values() if not r.kept]
    assert len(state.current["generic"]) > 0
    # the mechanism matters: with every shingle kept, the shared accompaniment links them
    res, _ = run(members, {"generic_share": 1.0})
    assert sum(not r.kept for r in res.values()) > 0


def test_a_rerun_reuses_the_generic_shingles_it_counted():
    members = _tunes_over_one_accompaniment(12)
    _, first = run(members[:11])
    res, again = run(members, previous=first.current)
    assert again.current["generic"] == first.current["generic"]
    assert all(r.kept for r in res.values())


def test_a_rerun_with_few_new_files_finds_the_links_a_full_computation_finds(corpus, monkeypatch):
    # Incremental == from scratch: a rerun adding 2 files to 46 (few new: the generic bands
    # are marked for the rows of its candidate pairs only, lsh.unskipped_codes) saves the same
    # links, the same results and the same kept members as one computation over all of them
    # with the same generic shingles (the rerun reuses those it counted; pinned here)
    import pipeline.similarity.lsh as lsh
    members, truth = corpus
    tunes = _tunes_over_one_accompaniment(20)
    later = [m for m in members if truth[m.id][2] in ("excerpt", "edited")][:1] + tunes[-1:]
    old = [m for m in members + tunes if m not in later]
    _, first = run(old)
    assert len(first.current["generic"]) > 0
    calls = []
    marked = lsh.unskipped_codes
    monkeypatch.setattr(lsh, "unskipped_codes", lambda *a: calls.append(1) or marked(*a))
    again, rerun_state = run(old + later, previous=first.current)
    assert calls and "against stored signatures" in rerun_state.notes[0]
    generic = np.array(first.current["generic"], dtype=np.uint64)
    monkeypatch.setattr(Dedup, "_generic_shingles", lambda self, indexed, arts: generic)
    full, full_state = run(old + later, previous=first.current, flags={"fresh": True})
    assert "all against all" in full_state.notes[0]
    assert rerun_state.current["links"] == full_state.current["links"]
    assert len(rerun_state.current["links"]) > len(first.current["links"])  # the newcomers linked
    assert rerun_state.current["kept"] == full_state.current["kept"]
    assert {k: r.to_json() for k, r in again.items()} == {k: r.to_json() for k, r in full.items()}
