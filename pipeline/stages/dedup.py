"""Stage ``dedup``: drop exact and near duplicates, corpus-wide, and record the clusters.

Per file (``prepare``, in the worker): the canonical note-content hash, the shingle set (the
lines of every voice above the bass register, interval x onset gap in units of the line, and
their pitch-only contours; the lead voice's again, marked; see ``pipeline.analysis.shingles``)
and its MinHash signature (``similarity.minhash.signature_of``). Over the corpus (``run_corpus``):

1. byte-identical files (equal sha256) and files with identical note content (equal content
   hash) are linked first, with no MinHash work (``exact_duplicate``);
2. one representative per content group goes through LSH banding, with each other member
   of a content whose shingle set differs (another track layout: ``searched_members``); each
   candidate pair of two contents is verified on the exact shingle sets, generic shingles
   (held by ``generic_share`` of the files) left out (Jaccard, or containment for excerpts
   and voice subsets, of the whole sets or of the lead voices) and linked when the
   similarity reaches ``threshold`` (``near_duplicate``);
3. clusters are the connected components of the links (union-find; they are transitive, as
   leakage is, and the split keeps each one in one part). Removal is not transitive: in each
   cluster, members are taken in ``keep_policy`` order, those a per-file stage after dedup
   (filter) drops last (on a rerun with the last run's options, members kept last time first
   among the others unless ``displace_kept`` is set); a member with a direct link to a member already
   kept is dropped, else it is kept too. Each dropped member names the kept member it is most
   similar to among those it links to directly (``duplicate_of``, ``similarity``), so every
   drop is justified by its own pair, never through other members (a chain A~B~C where A and
   C are unlike keeps both A and C). Members of one note content may differ in layout, so in
   shingles: each is searched on its own (dedup version 5), and a member's near link to a
   kept member is a pair measured in the search, or else their own pair, compared when
   needed (``_OwnPairs``). Only new files are compared on a rerun (stored links are reused).
"""
from __future__ import annotations

from collections import Counter, defaultdict
from collections.abc import Sequence
from typing import Any, Callable

import numpy as np

from ..analysis.shingles import ShingleSpec, duration_beats
from ..midi.piece import Piece
from ..similarity.sets import GENERIC_SAMPLE, GENERIC_SHARE, MIN_SIZE_RATIO, generic_shingles
from ..similarity.lsh import GenericBands, LSHIndex, check_banding, few_new, generic_bands, plausible_pair_codes
from ..similarity.links import UnionFind, verify_codes
from ..similarity.minhash import signature_of
from ..similarity.candidates import streamed_pair_codes
from ..similarity.overlap_sketch import Sketches, bounded_codes, sketch_rows, sketched_codes
from ..similarity.spilled import SpilledColumns
from ..store.columns import column_of, lengths_of, stacked
from ..store.columns import present as holding  # run_corpus names its member set `present`
from ..store.ledger import load_arrays
from .base import (CorpusState, FileContext, Member, Option, Stage, StageResult, in_range, one_of,
                   options_fingerprint, positive, register, unit_interval)


class _Facts:
    """What dedup knows of one member when choosing the kept ones (read as
    ``facts[k]["notes"]``, like a dict); a slotted object instead of a dict per file (memory).
    Shingle sets are not among them: they are read only where pairs are verified."""

    __slots__ = ("id", "source", "sha256", "notes", "duration_beats")

    def __init__(self, id: str, source: str, sha256: str, notes: int, duration_beats: float):
        self.id, self.source, self.sha256 = id, source, sha256
        self.notes, self.duration_beats = notes, duration_beats

    def __getitem__(self, name: str) -> Any:
        return getattr(self, name)


class _LazyFacts(dict):
    """member id -> ``_Facts``, each built from the member's artifacts when first read (a rerun
    reads the facts of the clusters it recomputes, not of every member)."""

    def __init__(self, by_id: dict[str, Member], arts: dict[str, dict[str, Any]]):
        super().__init__()
        self._by_id, self._arts = by_id, arts

    def __missing__(self, k: str) -> _Facts:
        m, art = self._by_id[k], self._arts[k]
        f = self[k] = _Facts(k, m.source, m.sha256, int(art["notes"]), float(art["duration_beats"]))
        return f


class _Shingles:
    """member id -> shingle set as stored (maybe a ``ledger.StoredArray``, which
    ``verify_codes`` reads with the others in bulk)."""

    __slots__ = ("_arts",)

    def __init__(self, arts: dict[str, dict[str, Any]]):
        self._arts = arts

    def __getitem__(self, k: str) -> Any:
        return self._arts[k]["shingles"]


def _key_most_notes(m: dict) -> tuple:
    return (-m["notes"], -m["duration_beats"], m["id"], m["source"])


def _key_longest(m: dict) -> tuple:
    return (-m["duration_beats"], -m["notes"], m["id"], m["source"])


def _key_smallest_id(m: dict) -> tuple:
    return (m["id"], m["source"])


#: Keep policies: name -> (sort key over member facts, README sentence). The first member in
#: sort order is kept. All keys end in the file id (a hash of the bytes) and the source path,
#: so the choice never depends on file order or worker scheduling.
KEEP_POLICIES: dict[str, tuple[Callable[[dict], tuple], str]] = {
    "most_notes": (_key_most_notes, "most notes, then longest in beats, then smallest id"),
    "longest": (_key_longest, "longest in beats, then most notes, then smallest id"),
    "smallest_id": (_key_smallest_id, "smallest id (first 16 hex of the sha256)"),
}

#: Defaults chosen by measurement on the dedup benchmark (``python -m pipeline.tools.bench_dedup``,
#: synth corpora of 1,000 and 20,000 files, seed 0), with version 1's shingles (the skyline);
#: version 2 (every voice, the lead, ratios of gaps) keeps them: README, Near-duplicate removal.
#: * ``ngram`` 4: n=3 catches every edited copy too but lets distinct pieces reach 0.35
#:   (many more LSH candidates); n=5 loses edited copies.
#: * ``threshold`` 0.3: the lowest edited copies score 0.29-0.38 and the highest pair of distinct
#:   pieces (same style family or not) 0.18 on the 20,000-file corpus; 0.3 sits between.
#:   At 0.6 edited recall falls to 0.76, at 0.8 to 0.11.
#: * ``num_perm`` 128 in 64 bands of 2 rows: the candidate curve ``1-(1-s^2)^64`` is 0.99 at
#:   Jaccard 0.27 and 0.88 at 0.18 (containment 0.3 between equal-size sets); 32 bands of 4
#:   rows miss edited copies (recall 0.79). Random pairs of distinct pieces rarely share a band
#:   (95k candidates among 1.6e8 pairs at 20,000 files, verified in well under a second).
DEFAULT_THRESHOLD = 0.3
DEFAULT_NUM_PERM = 128
DEFAULT_BANDS = 64
DEFAULT_NGRAM = 4


def _containment_ratio(v: Any) -> str | None:
    return None if 0.0 < float(v) <= 1.0 else "must be in (0, 1] (1 disables containment)"


#: Options that change links (a change invalidates the links stored by the previous run).
_LINK_OPTIONS = ("threshold", "num_perm", "bands", "ngram", "grid", "seed", "min_size_ratio",
                 "min_shingles", "generic_share")


@register
class Dedup(Stage):
    name = "dedup"
    kind = "corpus"
    version = 6  # 6: links stored at full precision (a rerun rounded their 6-decimal values again)
    #: The version of what ``prepare`` computes (content hash, shingles, signature): it keys the
    #: stored artifacts and the split's signatures, so a change of the corpus step alone
    #: (``version``) re-decodes no file. Bump it when ``prepare`` or what it calls changes.
    #: 4: the bass register relative to the piece's median pitch (``ShingleSpec.bass_gap``)
    signature_version = 4
    doc = ("Drop exact and near duplicates (MinHash LSH over shingles of every voice, invariant to "
           "transposition, tempo, double/half time, instrumentation and layout).")
    #: shingle sets are read for the members in candidate pairs and in clusters of several
    #: (split reads them for its candidate pairs too), not for every member
    deferred_artifacts = ("shingles",)
    #: what ``prepare`` reads (``signature_of``): the other options only steer the corpus step
    prepare_options = ("ngram", "grid", "num_perm", "seed")
    options = (
        Option("threshold", float, DEFAULT_THRESHOLD,
               "Similarity (Jaccard, or containment for excerpts) at or above which two files are "
               "linked as near-duplicates.", unit_interval),
        Option("num_perm", int, DEFAULT_NUM_PERM, "MinHash signature length.", in_range(8, 1024)),
        Option("bands", int, DEFAULT_BANDS,
               "LSH bands; must divide num_perm (rows per band = num_perm / bands).", positive),
        Option("ngram", int, DEFAULT_NGRAM, "Line tokens (interval, onset gap in units of the line) "
               "per shingle (pitch-only shingles take 2 more).", in_range(1, 16)),
        Option("grid", int, ShingleSpec.grid, "Onset grid steps per beat for shingles.", positive),
        Option("seed", int, 1, "MinHash permutation seed.", None),
        Option("min_size_ratio", float, MIN_SIZE_RATIO,
               "Containment (an excerpt, or a subset of the voices such as a melody-only file) is "
               "used only when the smaller shingle set has at least this fraction of the larger "
               "one's size; 1 disables it.", _containment_ratio),
        Option("min_shingles", int, 16,
               "Files with fewer distinct shingles are only exact-deduplicated: such short sets "
               "cannot tell a copy from a shared figure (a scale, an arpeggio).", positive),
        Option("generic_share", float, GENERIC_SHARE,
               "Shingles held by at least this share of the files (and by 10 or more) are generic "
               "(a stock bass or accompaniment figure) and are left out when files are compared; "
               "1 keeps every shingle. They are counted when every pair is searched (a first run, "
               "--fresh, other dedup options) and kept while a rerun reuses the stored links, with "
               "files added or removed (by the input, or by other options of the stages before "
               "dedup), so the pairs a rerun compares are compared as the stored ones were; "
               "--fresh counts them again.", unit_interval),
        Option("keep_policy", str, "most_notes",
               "Order in which a cluster's members are kept (the first always; a later one unless "
               "it is a direct duplicate of one kept before it), after the files that the "
               "per-file stages after dedup (filter) keep: " + "; ".join(f"{k}: {d}" for k, (_, d) in KEEP_POLICIES.items()) + ".",
               one_of(*KEEP_POLICIES)),
        Option("displace_kept", bool, False,
               "On a rerun, let a newcomer replace a member kept by the previous run (a rerun "
               "with other options than the last run's chooses as a fresh run either way).", None),
    )

    @classmethod
    def check_options(cls, opts: dict[str, Any]) -> str | None:
        """The rule between options (the config loader checks each option on its own)."""
        return check_banding(int(opts["num_perm"]), int(opts["bands"]))

    # -- per file ---------------------------------------------------------------------------
    def prepare(self, piece: Piece, ctx: FileContext) -> dict[str, Any]:
        """Content hash, shingles and signature of one piece (compact plain data)."""
        sig, sh, chash = signature_of(piece, self.opts)
        return {"content_hash": chash, "signature": sig, "shingles": sh,
                "notes": int(len(piece.notes)), "duration_beats": duration_beats(piece)}

    @property
    def artifact_fingerprint(self) -> str:
        """The cache key of the ``prepare`` artifacts: ``signature_version``, not ``version``."""
        return options_fingerprint(f"{self.name}.prepare", self.signature_version,
                                   {k: self.opts[k] for k in self.prepare_options})

    # -- corpus -----------------------------------------------------------------------------
    def _link_fingerprint(self) -> str:
        return options_fingerprint(self.name, self.version, {k: self.opts[k] for k in _LINK_OPTIONS})

    judges_byte_copies = True
    #: of a cluster, a file the per-file stages after dedup (filter) keep is kept first
    weighs_later_verdicts = True

    def byte_copy_verdict(self, rep_source: str, sha: str, rep_result: dict) -> dict:
        """A byte-identical copy of a file that reached dedup: an exact duplicate of it when
        dedup kept it; when dedup dropped it as the duplicate of another file, the same verdict
        (same reason, ``duplicate_of`` and ``similarity``: the copy's own pair with that file is
        the same bytes' pair)."""
        vals = dict(rep_result.get("values", {}))
        if not rep_result.get("kept", True):
            return {"stage": self.name, "kept": False, "reason": rep_result.get("reason"),
                    "detail": f"byte-identical copy of {sha[:16]} ({rep_source}), which dedup "
                              f"dropped: {rep_result.get('detail')}", "values": vals,
                    "thresholds": rep_result.get("thresholds", {})}
        vals.update({"duplicate_of": sha[:16], "similarity": 1.0, "duplicate_kind": "bytes"})
        return {"stage": self.name, "kept": False, "reason": "exact_duplicate",
                "detail": f"byte-identical copy of {sha[:16]} ({rep_source}); sha256 equal",
                "values": vals, "thresholds": rep_result.get("thresholds", {})}

    def run_corpus(self, members: Sequence[Member], state: CorpusState) -> dict[str, StageResult]:
        """Results for every member. With ``state.flags["previous_results"]`` (the last run's
        results by member id, given by the runner when it stored them), a cluster none of whose
        members is new, none of whose sources changed and that held no removed member keeps
        the last run's results as they are (the same objects are returned): its members, links
        and kept members are the last run's, so recomputing would give the same. Everything
        that decides which clusters exist is computed over the whole corpus each time, as
        without them."""
        o = self.opts
        threshold = float(o["threshold"])
        arts: dict[str, dict[str, Any]] = {}
        by_id: dict[str, Member] = {}
        rows = [m.artifacts.get(self.name) for m in members]
        # speed: the columns' marks tell which members hold artifacts (no test made per row)
        for m, art, ok in zip(members, rows, holding(rows, "content_hash")):
            if not ok:
                raise ValueError(f"member {m.id} ({m.source}) has no dedup artifacts: "
                                 "prepare() must run for every file that reaches dedup")
            arts[m.id] = art
            by_id[m.id] = m
        del rows
        facts = _LazyFacts(by_id, arts)  # speed: facts are built for the members that need them
        ids = sorted(arts)
        prev = {} if state.flags.get("fresh") else (state.previous or {})
        uf = UnionFind(ids)

        # 1. exact: bytes, then canonical note content (a member's content representative is
        # the first member with its note content; near links are found between those)
        same_bytes = _first_of_each(ids, [by_id[k].sha256 for k in ids])
        same_content = _first_of_each(ids, list(map(str, column_of([arts[k] for k in ids], "content_hash"))))
        for firsts in (same_bytes, same_content):
            for k, first in zip(ids, firsts):
                if first != k:
                    uf.union(first, k)
        content_rep = dict(zip(ids, same_content))
        rep_ids = [k for k, first in zip(ids, same_content) if first == k]  # the first member of each note content
        del same_bytes, same_content  # memory: lists of every member, not read again

        # 2. near: every verified pair of searched members (each representative, and each other
        # member whose shingle set differs from those of the searched members of its content:
        # another track layout, other voices, so other pairs with the corpus) at or above the
        # threshold (all of them, not only those that join clusters: a drop needs its own pair);
        # last run's links are reused when nothing they depend on changed (its old members are
        # then searched as it searched them; after removals, see ``_after_removal``)
        present = set(ids)
        same_links = prev.get("link_fingerprint") == self._link_fingerprint()
        last_members = prev.get("members", []) if same_links else []
        gone = {k for k in last_members if k not in present}
        # after files were removed the links among the files left are reused too, when the last
        # run saved its note contents of several members (``_after_removal``)
        reusable = same_links and (not gone or "contents" in prev)
        renewed, touched = self._after_removal(gone, prev, present) if reusable and gone else (set(), set())
        del present
        old = set(last_members) - gone - renewed if reusable else set()
        searched, extra = searched_members(ids, content_rep, arts, old,
                                           set(prev.get("searched_extra", [])) & old if reusable else set())
        near = _NearLinks(content_rep)
        near_links: list[list] = []
        if reusable:
            for a, b, sim in prev.get("links", []):
                if a in old and b in old:
                    near.add(a, b, float(sim))
                    uf.union(a, b)
                    near_links.append([a, b, float(sim)])
        index = LSHIndex(int(o["num_perm"]), int(o["bands"]))
        min_sh = int(o["min_shingles"])
        lengths = lengths_of([arts[k] for k in searched], "shingles")
        indexed = [k for k, ok in zip(searched, (lengths >= min_sh).tolist()) if ok]
        lengths = lengths[lengths >= min_sh]  # the indexed sets' sizes
        # the generic shingles are counted once and kept while the links are reused (a rerun
        # must not read every file's set; its new pairs are verified as the old ones were);
        # memory: counted before the index holds its copy of the signatures (the count's
        # arrays are dedup's largest transient)
        if reusable and "generic" in prev:
            self._generic = np.array(prev["generic"], dtype=np.uint64)
        else:
            # counted over note contents (their representatives), as before other members were
            # searched: a content in two layouts is one piece
            self._generic = self._generic_shingles([k for k in indexed if content_rep[k] == k], arts)
        state.save("generic", self._generic.tolist())
        rows = [arts[k] for k in indexed]
        signatures = stacked(rows, "signature") if rows else None
        try:  # speed, memory: one array taken from the signature column, no view per member
            sigs = np.asarray(signatures(), dtype=np.uint32) if rows else None
        except ValueError:  # signatures of several lengths
            sigs = None
        if sigs is not None and sigs.ndim == 2 and sigs.shape[1] == index.num_perm:
            index.extend(indexed, sigs)
        else:
            for k, r in zip(indexed, rows):
                index.add(k, r["signature"])  # names the member whose signature does not fit
        del sigs, rows
        new_searched = {k for k in searched if k not in old}
        # candidate pairs as compact codes, turned into (a, b) one at a time in sorted order
        # (the searched ids are sorted, so code order is pair order): no list of millions of tuples;
        # bands made of generic material only pair nothing
        # (a rerun marks the generic bands of the rows in its candidate pairs only)
        is_new = np.array([k in new_searched for k in index.ids], dtype=bool)
        n_new = len(new_searched)
        # the indexed sets' sizes, of the ids the index holds (those with a signature)
        sizes = (lengths if len(index.ids) == len(indexed)
                 else lengths[np.isin(np.array(indexed), np.array(index.ids))])
        del lengths
        # two members of one content are no pair to verify (they are exact duplicates already)
        content = content_numbers(index.ids, content_rep) if len(searched) > len(rep_ids) else None
        counts = [0, 0, 0]  # pairs after banding, after the MinHash bounds, after the exact bounds
        if len(index.ids) > 1 and is_new.any() and not few_new(is_new):
            # memory: a full run streams its candidates a block of bands at a time, each block
            # bounded at once (the same pairs and counts: similarity.candidates)
            del new_searched  # memory: not read past here on this path
            codes = self._streamed_candidates(index, is_new, sizes, arts, content, counts, signatures)
            index_ids = index.ids
            del index
        else:
            codes = index.candidate_codes(new_searched if reusable else None,
                                          skip=GenericBands(index.matrix, self._generic, *self._banding()))
            codes = self._bounded_candidates(codes, index, sizes, arts, content, counts)
            index_ids = index.ids
            del index  # memory: what it holds goes before the pairs are verified (the peak)
        n_candidates, n_plausible, n_sketched = counts
        verified = verify_codes(index_ids, codes, _Shingles(arts), threshold,
                                min_size_ratio=float(o["min_size_ratio"]), generic=self._generic,
                                read=load_arrays)
        del codes  # memory: millions of candidates on a large corpus
        for a, b, sim in verified:
            near.add(a, b, sim)
            uf.union(a, b)
            near_links.append([a, b, float(sim)])  # rounded once, in the result
        state.report(f"dedup: {n_new} of {len(searched)} searched files compared "
                     f"({len(rep_ids)} distinct note contents + {len(searched) - len(rep_ids)} "
                     f"members of a content with shingles of their own), "
                     f"{'against stored signatures' if reusable else 'all against all'}; "
                     f"{n_candidates} LSH candidate pairs, {n_plausible} plausible by their MinHash "
                     f"estimate, {n_sketched} by their exact bounds, {len(verified)} verified links; "
                     f"{len(self._generic)} generic shingles left out")

        # 3. clusters and their kept members (a pair of members other than the one a link was
        # measured on, as a member that is not its content's representative, is compared itself)
        near.own = _OwnPairs(_Shingles(arts), threshold, float(o["min_size_ratio"]), min_sh,
                             self._generic)
        key, _ = KEEP_POLICIES[o["keep_policy"]]
        # the files kept last time stay kept before newcomers (a growing corpus keeps its
        # training files), but not after a change of options: a changed keep_policy or filter
        # limit decides as in a fresh run (an audit found a relaxed filter limit leaving the
        # stand-in kept while it failed the limit, and a new keep_policy ignored)
        sticky = not o["displace_kept"] and not state.flags.get("options_changed", False)
        previously_kept = set(prev.get("kept", [])) if sticky else set()
        # a file that a per-file stage after dedup drops (filter) is kept only when no file of
        # its cluster passes them: else the piece would leave the corpus with it
        later = state.flags.get("dropped_later") or (lambda sha: None)
        last = state.flags.get("previous_results") if reusable and "cluster_sources" in prev else None
        if last is None:
            groups = uf.groups()
            results: dict[str, Any] = {}
            kept_ids: list[str] = []
            cluster_sources: dict[str, str] = {}
        else:
            # speed: only the clusters that may differ from the last run's are walked (see
            # ``_changed_clusters``); the others keep its results, kept members and sources
            groups = self._changed_clusters(uf, ids, old, last, prev["cluster_sources"], by_id, touched)
            again = {k for g in groups for k in g}
            results = {k: last[k] for k in ids if k not in again}
            # memory: the members' own id and source strings, not the saved state's copies
            # (which go with it once the stage is done)
            kept_ids = [by_id[k].id for k in prev.get("kept", []) if k not in again and k in by_id]
            cluster_sources = {by_id[k].id: by_id[k].source for k in prev["cluster_sources"]
                               if k not in again and k in by_id}
        # memory: one detail text and thresholds dict shared by the results of every member
        # found alone (read-only), not one of each per member
        alone = "no duplicate found at threshold %.2f" % threshold
        alone_limits = {"similarity": threshold}
        for group in groups:
            if len(group) > 1:
                for k in group:
                    cluster_sources[k] = by_id[k].source
            if len(group) == 1:
                kept_ids.append(group[0])
                results[group[0]] = StageResult.keep(alone, values={"cluster": group[0], "cluster_size": 1},
                                                     thresholds=alone_limits)
                continue
            fails = {k: later(by_id[k].sha256) for k in group}
            order = sorted(group, key=lambda k: (fails[k] is not None, k not in previously_kept, key(facts[k])))
            kept, dropped = choose_kept(order, facts, near, lambda k: fails[k] is not None)
            kept_ids.extend(kept)
            results.update(self._cluster_results(order, kept, dropped, facts, threshold, fails))
        state.save("link_fingerprint", self._link_fingerprint())
        state.save("members", ids)
        state.save("contents", _contents_of_several(content_rep))
        state.save("links", sorted(near_links))
        state.save("searched_extra", extra)
        state.save("kept", sorted(kept_ids))
        state.save("cluster_sources", cluster_sources)
        return results

    def _streamed_candidates(self, index: LSHIndex, is_new: np.ndarray, sizes: np.ndarray,
                             arts: dict[str, dict[str, Any]], content: np.ndarray | None,
                             counts: list[int], signatures: Any) -> np.ndarray:
        """The codes of ``index``'s candidate pairs (generic bands skipped) that
        ``_bounded_candidates`` keeps, found a band at a time (``similarity.candidates``) from
        the signatures spilled to a file column by column (``similarity.spilled``), gathered
        pieces bounded at once against the sketches of every indexed set, made up front.
        Memory: the index's and the column's matrix (``signatures``, ``columns.stacked``'s
        function: ``release()`` moves the column to a file until the split reads it) leave
        memory before the sets are sketched; the signatures of the pairs' MinHash bounds are
        read back a column at a time."""
        sig = index.matrix()
        n = len(sig)
        skip = generic_bands(sig, self._generic, *self._banding())  # memory: its transients go before the sketches come
        with SpilledColumns(sig, getattr(signatures, "folder", None)) as store:
            del sig
            index.drop_signatures()
            getattr(signatures, "release", lambda: None)()
            sketches = (sketch_rows(index.ids, np.arange(n), _Shingles(arts), read=load_arrays,
                                    generic=self._generic), np.arange(n))
            return streamed_pair_codes(store, index.bands, is_new, lambda codes: self._bounded_candidates(
                codes, index, sizes, arts, content, counts, sketches, store), skip=skip, once=True)

    def _bounded_candidates(self, codes: np.ndarray, index: LSHIndex, sizes: np.ndarray,
                            arts: dict[str, dict[str, Any]], content: np.ndarray | None, counts: list[int],
                            sketches: tuple[Sketches, np.ndarray] | None = None,
                            store: SpilledColumns | None = None) -> np.ndarray:
        """The candidate codes (pairs of ``index``'s rows) that may reach the threshold: pairs
        of one note content (equal ``content`` numbers) left out (``other_content_codes``), then
        the MinHash bounds (``plausible_codes``), then the exact bounds from one bitmap per set
        (``overlap_sketch``, generic shingles left out, as compared: the same links, fewer sets
        read by the exact comparison); adds the pairs left after each to ``counts``.
        ``sketches`` (the sketches and each row's place in them) are those of every indexed set,
        made up front (a full search); without them only the sets of the pairs left are read and
        sketched (``sketched_codes``: a rerun reads no other set). ``store``: the index's
        signatures spilled (a full search), for the MinHash bounds."""
        o = self.opts
        threshold, ratio = float(o["threshold"]), float(o["min_size_ratio"])
        if content is not None:
            codes = other_content_codes(codes, content)
        counts[0] += len(codes)
        if store is None:
            codes = index.plausible_codes(codes, sizes, threshold, min_size_ratio=ratio)
        elif len(codes):  # the bounds of ``plausible_codes``, their signatures read from the file
            codes = plausible_pair_codes(store, codes, sizes, threshold, min_size_ratio=ratio)
        counts[1] += len(codes)
        if sketches is None:
            codes = sketched_codes(index.ids, codes, _Shingles(arts), threshold, read=load_arrays,
                                   generic=self._generic, min_size_ratio=ratio)
        else:
            codes = bounded_codes(*sketches, codes, threshold, min_size_ratio=ratio)
        counts[2] += len(codes)
        return codes

    def _banding(self) -> tuple[int, int]:
        """(bands, seed) of the signatures, as ``generic_bands`` takes them."""
        return int(self.opts["bands"]), int(self.opts["seed"])

    def _generic_shingles(self, indexed: list[str], arts: dict[str, dict[str, Any]]) -> np.ndarray:
        """The generic shingles (``similarity.sets.generic_shingles``) of the compared files, counted
        on the first ``GENERIC_SAMPLE`` of them by id (ids are hashes: a consistent sample)."""
        share = float(self.opts["generic_share"])
        if share >= 1.0:
            return np.zeros(0, dtype=np.uint64)
        sample = load_arrays([arts[k]["shingles"] for k in indexed[:GENERIC_SAMPLE]])
        return generic_shingles(sample, share=share)

    @staticmethod
    def _after_removal(gone: set[str], prev: dict[str, Any], present: set[str]) -> tuple[set[str], set[str]]:
        """After the last run's members ``gone`` were removed: the members left of its note
        contents of several members that lost one (``renewed``: searched again as new ones, as
        the removed member may have been the one whose pairs they shared, and their stored
        links dropped), and the members left that a removed one was linked to (``touched``:
        their clusters are decided again). Every other stored link joins two members left and
        holds as it was measured; a cluster that held a removed member reaches one of these
        through the links left (its other members were joined to the removed one through a
        link or a note content)."""
        renewed: set[str] = set()
        for content in prev["contents"]:
            if any(k in gone for k in content):
                renewed.update(k for k in content if k in present)
        touched: set[str] = set()
        for a, b, _ in prev.get("links", []):
            if a in gone and b in present:
                touched.add(b)
            elif b in gone and a in present:
                touched.add(a)
        return renewed, touched

    @staticmethod
    def _changed_clusters(uf: UnionFind, ids: list[str], old: set[str], last: Any,
                          last_sources: dict[str, str], by_id: dict[str, Member],
                          touched: set[str] = frozenset()) -> list[list[str]]:
        """The clusters (``uf``'s sets, as ``UnionFind.groups`` gives them) that may not be the
        last run's as it wrote them: those holding a new member, a member without a stored
        result (``last``), a member of a cluster of several (whose details name sources)
        no longer represented by the source path it had (``last_sources``), or a member that
        was linked to a removed one (``touched``). The others are the last run's clusters: the
        stored links are reused, and every new link has a new member."""
        changed = [k for k in ids if k not in old or k not in last]
        changed += [k for k, source in last_sources.items() if k in by_id and by_id[k].source != source]
        changed += sorted(touched)
        return uf.groups_of(changed)

    def _cluster_results(self, order: list[str], kept: list[str],
                         dropped: dict[str, tuple[str, float, str]], facts: dict[str, _Facts],
                         threshold: float, fails: dict[str, tuple[str, str] | None]
                         ) -> dict[str, StageResult]:
        """The results of one cluster of several: ``order`` its members in keep order,
        ``kept`` the kept ones (the first names the cluster), ``dropped`` member -> (kept
        member it duplicates, their own similarity, kind) (see ``choose_kept``), ``fails``
        member -> (stage, reason) of a per-file stage after dedup that drops it, or None."""
        size, name = len(order), kept[0]
        limits = {"similarity": threshold}
        out: dict[str, StageResult] = {}
        dups: dict[str, list[str]] = {k: [] for k in kept}
        for mid in order:
            if mid not in dropped:
                continue
            rep, sim, kind = dropped[mid]
            if kind == "near":
                how = f"similarity {sim:.2f} >= threshold {threshold:.2f}"
            else:
                how = "identical bytes" if kind == "bytes" else "identical note content"
            detail = (f"{'near' if kind == 'near' else 'exact'} duplicate of {rep} "
                      f"({facts[rep]['source']}), {how}; cluster of {size}")
            if fails[rep] is not None:  # then so does this file (choose_kept)
                detail += (f"; {rep} is dropped later by {fails[rep][0]} ({fails[rep][1]}), as this "
                           "file would be")
            out[mid] = StageResult.drop(
                "near_duplicate" if kind == "near" else "exact_duplicate", detail, values={
                    "cluster": name, "cluster_size": size, "duplicate_of": rep,
                    "similarity": round(float(sim), 4), "duplicate_kind": kind}, thresholds=limits)
            dups[rep].append(f"{mid} ({facts[mid]['source']}, {kind} {sim:.2f})")
        policy = self.opts["keep_policy"]
        if any(f is not None for f in fails.values()):
            policy += ", files the stages after dedup keep first"
        for k in kept:
            shown = ", ".join(dups[k][:8]) + (f" and {len(dups[k]) - 8} more" if len(dups[k]) > 8 else "")
            if len(kept) == 1:
                detail = (f"kept as the representative of a cluster of {size} (policy {policy}); "
                          f"also in it: {shown}")
            else:
                others = [x for x in kept if x != k]
                detail = (f"kept (policy {policy}) in a cluster of {size} that keeps {len(kept)}: "
                          f"no two of them are similar at threshold {threshold:.2f} (other "
                          f"members link them); its duplicates: {shown or 'none'}; the other kept: "
                          + ", ".join(f"{x} ({facts[x]['source']})" for x in others[:8])
                          + (f" and {len(others) - 8} more" if len(others) > 8 else ""))
            out[k] = StageResult.keep(detail, values={"cluster": name, "cluster_size": size},
                                      thresholds=limits)
        return out


class _NearLinks:
    """The verified near links, between note contents: members with one note content (its
    representative is ``content_rep[member]``) share their links (for the clusters). A link's
    value is the similarity of the two members it was measured on (two contents may be linked
    by several measured pairs, when members besides the representatives are searched);
    ``pair`` gives any two members' own."""

    __slots__ = ("content_rep", "_adj", "_more", "own")

    def __init__(self, content_rep: dict[str, str]):
        self.content_rep = content_rep
        #: the own similarity of two members, None below the threshold (``_OwnPairs``; set once
        #: the generic shingles it leaves out are known)
        self.own: Callable[[str, str], float | None] | None = None
        # memory: entries only for contents with a link (most files have none)
        self._adj: defaultdict[str, dict[str, tuple[float, str, str]]] = defaultdict(dict)
        #: further measured pairs of two linked contents (members of a content searched
        #: besides its representative), by (smaller id, larger id)
        self._more: dict[tuple[str, str], float] = {}

    def add(self, a: str, b: str, sim: float) -> None:
        ca, cb = self.content_rep[a], self.content_rep[b]
        if ca == cb:
            return
        if cb in self._adj.get(ca, ()):
            self._more[(a, b) if a < b else (b, a)] = sim
        else:
            self._adj[ca][cb] = self._adj[cb][ca] = (sim, a, b)

    def of(self, member: str) -> dict[str, tuple[float, str, str]]:
        """Content representative -> (similarity, the two members it was measured on), for
        every content linked to the member's."""
        return self._adj.get(self.content_rep[member], {})

    def pair(self, a: str, b: str) -> float | None:
        """The own similarity of members ``a`` and ``b``, whose contents are linked: the link's
        value when it was measured on them, else their own pair compared (``own``; None when it
        falls below the threshold): members of one note content may differ in their voices'
        layout, and so in their shingles."""
        sim, x, y = self._adj[self.content_rep[a]][self.content_rep[b]]
        if (a == x and b == y) or (a == y and b == x):
            return sim
        measured = self._more.get((a, b) if a < b else (b, a))
        if measured is not None:
            return measured
        return sim if self.own is None else self.own(a, b)


def searched_members(ids: list[str], content_rep: dict[str, str], arts: dict[str, dict[str, Any]],
                     old: set[str] | frozenset[str] = frozenset(),
                     old_extra: set[str] | frozenset[str] = frozenset()) -> tuple[list[str], list[str]]:
    """The members dedup searches against the corpus, sorted, and among them those that are not
    the first of their note content (the ``extra`` ones, saved for a rerun).

    The content hash leaves the track layout out, the shingles follow the voices: a member in
    another layout may reach a file its content's representative (``content_rep``, the first
    member by id) does not. So every note content is searched once per distinct shingle set
    of its members: a member is searched when its set differs from those of the searched
    members of its content before it in id order (equal sets give equal pairs). Sets are
    compared exactly, read only where lengths and signatures are equal (a few shingles apart,
    MinHash signatures are often equal).

    On a rerun whose stored links are reused, ``old`` are the last run's members and
    ``old_extra`` its extra searched ones: an old member is searched as it was (the first old
    member of its content and the old extra ones: their pairs are stored, and they are
    searched against the new members), and only new members are compared with the searched
    members of their content (no old set is read again). A new member whose set equals an old
    searched one is not searched: that member's pairs are its pairs."""
    mates: defaultdict[str, list[str]] = defaultdict(list)
    for k in ids:
        if content_rep[k] != k:
            mates[content_rep[k]].append(k)
    searched = [k for k in ids if content_rep[k] == k and k not in mates]  # contents of one member
    extra: list[str] = []
    block: list[tuple[list[str], list[str], dict[str, tuple]]] = []  # (members, chosen, keys)
    wanted: list[str] = []
    for rep, others in mates.items():
        members = [rep] + others  # ids are sorted, so each content's members are in id order
        olds = [k for k in members if k in old]
        chosen = olds[:1] + [k for k in olds[1:] if k in old_extra]
        new = [k for k in members if k not in old]
        keys = {k: (len(arts[k]["shingles"]), np.asarray(arts[k]["signature"]).tobytes())
                for k in chosen + new}
        count = Counter(keys.values())
        new_keys = {keys[k] for k in new}
        # the sets compared: those whose length and signature another one shares, a new one
        wanted.extend(k for k in keys if count[keys[k]] > 1 and keys[k] in new_keys)
        block.append((members, chosen, keys))
        if len(wanted) >= SAME_SET_BLOCK:
            _choose_searched(block, wanted, arts, old, searched, extra)
            block, wanted = [], []
    _choose_searched(block, wanted, arts, old, searched, extra)
    return sorted(searched), sorted(extra)


#: Shingle sets read at once (in one call) where members of one content are compared.
SAME_SET_BLOCK = 2048


def _choose_searched(block: list[tuple[list[str], list[str], dict[str, tuple]]], wanted: list[str],
                     arts: dict[str, dict[str, Any]], old: set[str] | frozenset[str],
                     searched: list[str], extra: list[str]) -> None:
    """``searched_members`` for a block of contents, the ``wanted`` sets read in one call: each
    new member of a content is searched unless its set equals that of a searched one (the old
    searched members first, then the new ones chosen before it)."""
    sets = dict(zip(wanted, load_arrays([arts[k]["shingles"] for k in wanted]))) if wanted else {}
    for members, chosen, keys in block:
        for k in members:
            if k not in old and not any(keys[c] == keys[k] and np.array_equal(sets[c], sets[k])
                                        for c in chosen):
                chosen.append(k)
        searched.extend(chosen)
        extra.extend(k for k in chosen if k != members[0])


def _contents_of_several(content_rep: dict[str, str]) -> list[list[str]]:
    """The note contents of several members (``content_rep``: member -> the first member of its
    content), each as its members in id order, for the next run (``Dedup._after_removal``)."""
    several: dict[str, list[str]] = {}
    for k, rep in content_rep.items():
        if rep != k:
            several.setdefault(rep, [rep]).append(k)
    return sorted(several.values())


def _first_of_each(ids: list[str], values: list[str]) -> list[str]:
    """For each of ``ids`` (sorted), the first id with its value (``values[i]`` is that of
    ``ids[i]``): the exact step's links and a member's content representative."""
    first: dict[str, str] = {}
    return [first.setdefault(v, k) for k, v in zip(ids, values)]


def content_numbers(keys: list[str], content_rep: dict[str, str]) -> np.ndarray:
    """One number per note content for each of ``keys`` (equal numbers: one content)."""
    number: dict[str, int] = {}
    return np.fromiter((number.setdefault(content_rep[k], len(number)) for k in keys),
                       dtype=np.int64, count=len(keys))


def other_content_codes(codes: np.ndarray, content: np.ndarray) -> np.ndarray:
    """The candidate codes ``i * n + j`` (``n = len(content)``) whose two members have other
    note contents (``content_numbers``; two members of one content are exact duplicates
    already)."""
    n = len(content)
    step = 1 << 20  # memory: index arrays for a block of codes at a time
    keep = [c[content[c // n] != content[c % n]] for c in (codes[lo:lo + step] for lo in range(0, len(codes), step))]
    return np.concatenate(keep) if keep else codes


class _OwnPairs:
    """The own similarity of two members whose note contents are linked through other members
    (a member that is not its content's representative, or a kept member that is not): the
    pair verified as every candidate pair is (``links.verify_codes``: the same measure, the
    same generic shingles left out), None when it falls below the threshold or a set holds
    fewer than ``min_shingles`` (such files are only exact-deduplicated). Values are cached."""

    def __init__(self, shingles: "_Shingles", threshold: float, min_size_ratio: float,
                 min_shingles: int, generic: np.ndarray):
        self._shingles, self._threshold = shingles, threshold
        self._min_size_ratio, self._min_shingles, self._generic = min_size_ratio, min_shingles, generic
        self._done: dict[tuple[str, str], float | None] = {}

    def __call__(self, a: str, b: str) -> float | None:
        key = (a, b) if a < b else (b, a)
        if key not in self._done:
            sim = None
            if min(len(self._shingles[a]), len(self._shingles[b])) >= self._min_shingles:
                found = verify_codes(list(key), np.array([1], dtype=np.int64), self._shingles,
                                     self._threshold, min_size_ratio=self._min_size_ratio,
                                     generic=self._generic, read=load_arrays)
                sim = found[0][2] if found else None
            self._done[key] = sim
        return self._done[key]


def choose_kept(order: list[str], facts: Any, near: _NearLinks,
                fails_later: Callable[[str], bool] = lambda k: False
                ) -> tuple[list[str], dict[str, tuple[str, float, str]]]:
    """The kept members of one cluster, and for each other member the kept member it
    duplicates: ``(kept, {member: (kept member, similarity, kind)})``.

    Members are taken in ``order`` (the keep order): one with a direct link to a member kept
    before it (same bytes, same note content, or its own pair with it verified at the
    threshold, ``_NearLinks.pair``) is dropped, else it is kept. A dropped member then names,
    among all kept members it links to directly, one that a later per-file stage does not
    drop (``fails_later``) before one it drops, then the most similar (exact before near at
    equal similarity, then the first in ``order``). So no drop rests on a chain through other
    members, nor on a pair of other members of its note content (whose voices, and so
    shingles, may differ from its own), and no two kept members are linked directly (a rerun
    that puts last run's kept members first keeps them all)."""
    rank = {k: i for i, k in enumerate(order)}
    kept: list[str] = []
    kept_content: dict[str, str] = {}  # content representative -> the kept member with it

    def links_to_kept(k: str) -> list[tuple[float, str, str]]:
        same = kept_content.get(near.content_rep[k])
        if same is not None:  # 1.0 and exact: no near link can come before it
            kind = "bytes" if facts[k]["sha256"] == facts[same]["sha256"] else "content"
            return [(1.0, kind, same)]
        found = []
        for c in near.of(k):
            m = kept_content.get(c)
            if m is not None:
                sim = near.pair(k, m)
                if sim is not None:
                    found.append((sim, "near", m))
        return found

    for k in order:
        if not links_to_kept(k):
            kept.append(k)
            kept_content[near.content_rep[k]] = k
    dropped: dict[str, tuple[str, float, str]] = {}
    for k in order:
        if kept_content.get(near.content_rep[k]) == k:
            continue
        sim, kind, rep = max(links_to_kept(k), key=lambda t: (not fails_later(t[2]), t[0], t[1] != "near",
                                                               -rank[t[2]]))
        dropped[k] = (rep, sim, kind)
    return kept, dropped
