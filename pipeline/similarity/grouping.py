"""Leakage-free split assignment: pure functions, no I/O.

Two steps:

1. ``build_groups`` joins members that must travel together: near-duplicate links (any pair
   above the grouping threshold) and forced groupings (same folder, same normalized title, ...)
   are merged transitively with a union-find (``links.UnionFind``), so a group is a connected
   component.
2. ``assign_groups`` puts every group, whole, into one part.

Placement rule (deterministic whatever the input order):

* A group whose previously assigned members all sat in one part stays there; its new members
  join it. Previous assignments naming a part that is no longer configured count as unassigned
  (and are reported as moves).
* A group whose previous members sat in *different* parts (a new file linked them) is merged
  into the frozen part (``freeze``, default ``"test"``) if any member was there, so the test set
  never loses a file; otherwise into the part that held most of its previous members (ties: the
  first part in ``ratios`` order). Every member that changes part is returned as a move.
* New groups are placed largest first (ties in the order of a seeded hash of the group key, so
  the seed decides which equal-size group goes where), each into the part with the largest
  deficit ``ratio * total_after - current`` (ties: first part in ``ratios`` order).

Guarantee of the greedy placement (from scratch): no part exceeds its target share by more than
``w_max / total`` and none falls short by more than ``(k - 1) * w_max / total``, where ``w_max``
is the largest group weight and ``k`` the number of parts (the deficits sum to the weight being
placed, so the chosen part's deficit is at least ``w / k``).
"""
from __future__ import annotations

import hashlib
from collections import Counter, defaultdict
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, Hashable, Iterable, Mapping, Sequence

if TYPE_CHECKING:  # the annotations' numpy; the functions on arrays import it themselves
    import numpy as np

Move = tuple[str, str, str, str]   # (member_id, from_part, to_part, reason)


def build_groups(members: Iterable[str], links: Iterable[tuple[str, str]] = (),
                 forced: Iterable[Iterable[str]] = ()) -> dict[str, list[str]]:
    """Connected components of ``members`` under ``links`` and ``forced`` groupings.

    Returns ``{group_key: sorted member ids}`` where the key is the smallest member id, so keys
    do not depend on input order. Links or forced groups naming unknown ids are ignored.
    """
    from .links import UnionFind  # the one union-find (dedup's clusters too)

    uf = UnionFind(members)
    known = uf.parent.keys()
    for a, b in links:
        if a in known and b in known:
            uf.union(a, b)
    for grp in forced:
        ids = [m for m in grp if m in known]
        for other in ids[1:]:
            uf.union(ids[0], other)
    return {g[0]: g for g in uf.groups()}


def group_by_keys(pairs: Iterable[tuple[str, Hashable | None]]) -> list[list[str]]:
    """Forced groupings from (member, key) pairs (folder, normalized title), in the order the
    keys first appear: a member may come with several keys (one per path of a content), each
    tying it; None ties nothing."""
    by: dict[Hashable, set[str]] = defaultdict(set)
    for m, k in pairs:
        if k is not None:
            by[k].add(m)
    return [sorted(v) for v in by.values() if len(v) > 1]


#: Folder depths ``group_by_folder: auto`` judges, shallowest first.
FOLDER_DEPTHS = (1, 2, 3)
#: The share of the files in folders of two or more that must lie in their folder's largest
#: identity group for ``auto`` to take the folders as pieces (a project default: the layouts
#: measured lie far on either side of it, README, Split leakage).
FOLDER_SHARE = 0.8
#: Folders of two or more files needed before ``auto`` judges a depth at all.
FOLDER_MIN = 3


def folders_mostly_pieces(rule: Mapping[str, Any]) -> bool:
    """Whether ``auto`` tied no folder (``rule``: summary.json's ``split.stage.group_by_folder``)
    although most folders of two or more files, by count, hold one piece each: a few large
    folders of other files hold most of the files (a split audit: POP909's song folders beside
    two folders of 1,000 generated files leaked songs with nothing said)."""
    folders = rule.get("folders", 0)
    return (rule.get("option") == "auto" and not rule.get("applied") and not rule.get("collections")
            and folders >= FOLDER_MIN and rule.get("alike", 0) >= FOLDER_SHARE * folders)


@dataclass(frozen=True)
class FolderLayout:
    """What ``piece_folders`` found: the depth whose folders hold one piece each (None: no
    depth qualifies), and at ``at`` (that depth, else the depth with the highest share) the
    share of files lying in their folder's largest identity group and the folders of two or
    more files it counts."""

    depth: int | None
    at: int | None
    share: float
    folders: int
    #: when no depth qualifies over the whole input: the top-level folders whose own files are
    #: laid out one folder per piece, each with what was found in it (a collection of pieces
    #: beside others that are not, e.g. a song collection beside a folder of generated files)
    collections: tuple[tuple[str, "FolderLayout"], ...] = ()
    #: of the ``folders`` at ``at``, those holding ``share`` of their own files in one group
    alike: int = 0

    def as_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"depth": self.depth, "judged_depth": self.at,
                               "share": round(self.share, 4), "folders": self.folders}
        if self.depth is None:  # why the folders were not taken as pieces
            out["alike"] = self.alike
        if self.collections:
            out["collections"] = {top: found.as_dict() for top, found in self.collections}
        return out


def piece_folders(files: Iterable[tuple[str, Hashable]], depths: Sequence[int] = FOLDER_DEPTHS,
                  share: float = FOLDER_SHARE, min_folders: int = FOLDER_MIN) -> FolderLayout:
    """Whether a collection is laid out one folder per piece, judged from its files' own
    identity: ``files`` gives each file's path (relative, "/"-separated) and identity group
    (files the notes link share one). At each depth (a file's first N folder levels, as
    ``group_by_folder: N`` reads them; files at the top are not counted), the files of folders
    holding two or more are counted, and with them those lying in their folder's largest group.
    The shallowest depth with ``min_folders`` such folders and ``share`` of their files in
    their largest group is returned; a folder that mixes pieces holds few files of any one
    group (a folder of k different pieces, 1/k), so a layout by composer, session or source
    stays far below it."""
    by_parent: dict[str, Counter] = defaultdict(Counter)  # speed: one count per parent folder
    for path, group in files:
        parent = path.rpartition("/")[0]
        if parent:
            by_parent[parent][group] += 1
    found = _judged(by_parent, depths, share, min_folders)
    if found.depth is not None:
        return found
    # no depth qualifies over the whole input: each top-level folder is judged as a collection
    # of its own, one level deeper (an audit: a song collection copied beside 25 folders of
    # generated files was no longer grouped by song, and its versions leaked)
    tops: dict[str, dict[str, Counter]] = defaultdict(dict)
    for parent, counts in by_parent.items():
        top = parent.partition("/")[0]
        if parent != top:  # files right in the top folder, as files at the top, are not counted
            tops[top][parent] = counts
    collections = []
    for top in sorted(tops):
        inner = _judged(tops[top], tuple(d + 1 for d in depths), share, min_folders)
        if inner.depth is not None:
            collections.append((top, inner))
    return FolderLayout(None, found.at, found.share, found.folders, tuple(collections), found.alike)


def _judged(by_parent: Mapping[str, Counter], depths: Sequence[int], share: float,
            min_folders: int) -> FolderLayout:
    """``piece_folders``'s judgment of the files counted by parent folder, at ``depths``."""
    best = FolderLayout(None, None, 0.0, 0)
    if not by_parent:  # every file at the top: no folder to judge
        return best
    seen: set[tuple[str, ...]] = set()
    for depth in depths:
        folders: dict[str, Counter] = defaultdict(Counter)
        for parent, counts in by_parent.items():
            folders["/".join(parent.split("/")[:depth])].update(counts)
        layout = tuple(sorted(folders))
        if layout in seen:  # no folder this deep: the same folders as a shallower depth
            continue
        seen.add(layout)
        several = [c for c in folders.values() if sum(c.values()) >= 2]
        total = sum(sum(c.values()) for c in several)
        together = sum(max(c.values()) for c in several)
        alike = sum(1 for c in several if max(c.values()) >= share * sum(c.values()))
        found = FolderLayout(None, depth, together / total if total else 0.0, len(several), alike=alike)
        if found.folders >= min_folders and found.share >= share:
            return FolderLayout(depth, depth, found.share, found.folders)
        if found.share > best.share or best.at is None:
            best = found
    return best


def seeded_rank(key: str, seed: int) -> str:
    """A seeded, order-independent shuffle key for a group."""
    return hashlib.sha256(f"{seed}\x00{key}".encode()).hexdigest()


def assign_groups(groups: Mapping[str, list[str]], ratios: Mapping[str, float], seed: int = 0,
                  previous: Mapping[str, str] | None = None, freeze: str | None = "test",
                  sizes: Mapping[str, float] | None = None) -> tuple[dict[str, str], list[Move]]:
    """Assign every group, whole, to one part of ``ratios``.

    ``previous`` maps member ids to the part they had in the last run; ``sizes`` weighs members
    (default 1 each; e.g. the number of output files, or 0 for a member that only carries a
    previous part). Returns ``(assignment, moves)`` with moves sorted by member id.
    """
    parts = list(ratios)
    if not parts:
        raise ValueError("ratios names no part; give at least one, e.g. {train: 0.8, test: 0.2}")
    previous = previous or {}
    weight = (lambda m: 1.0) if sizes is None else (lambda m: float(sizes.get(m, 1.0)))
    current = dict.fromkeys(parts, 0.0)
    assignment: dict[str, str] = {}
    moves: list[Move] = []
    fresh: list[tuple[float, str, str]] = []
    configured = set(parts)
    for key in sorted(groups):
        ids = groups[key]
        if len(ids) == 1 and previous.get(ids[0]) in configured:
            # speed: a group of one member keeping its part (most groups of a rerun); what
            # _inherited_part and _place give it, without their work (it moves nowhere)
            m = ids[0]
            current[previous[m]] += weight(m)
            assignment[m] = previous[m]
            continue
        w = sum(weight(m) for m in ids)
        target = _inherited_part(ids, previous, parts, freeze)
        if target is None:
            fresh.append((-w, seeded_rank(key, seed), key))
            continue
        _place(key, ids, target, w, current, assignment, previous, parts, moves, freeze)
    fresh.sort()
    for neg_w, _, key in fresh:
        w = -neg_w
        total_after = sum(current.values()) + w
        target = max(parts, key=lambda p: (ratios[p] * total_after - current[p], -parts.index(p)))
        _place(key, groups[key], target, w, current, assignment, previous, parts, moves, freeze)
    moves.sort()
    return assignment, moves


def _inherited_part(ids: list[str], previous: Mapping[str, str], parts: list[str],
                    freeze: str | None) -> str | None:
    """The part a group inherits from its members' previous parts, or None for a new group."""
    counts: dict[str, int] = defaultdict(int)
    for m in ids:
        p = previous.get(m)
        if p in parts:
            counts[p] += 1
    if not counts:
        return None
    if len(counts) > 1 and freeze in counts:
        return freeze
    return max(counts, key=lambda p: (counts[p], -parts.index(p)))


def _place(key: str, ids: list[str], target: str, w: float, current: dict[str, float],
           assignment: dict[str, str], previous: Mapping[str, str], parts: list[str],
           moves: list[Move], freeze: str | None) -> None:
    current[target] += w
    spanned = sorted({previous[m] for m in ids if previous.get(m) in parts})
    for m in ids:
        assignment[m] = target
        old = previous.get(m)
        if old is None or old == target:
            continue
        if old not in parts:
            reason = f"part {old!r} is no longer configured; placed with its group in {target!r}"
        elif target == freeze and freeze in spanned:
            reason = (f"its group (key {key}) now holds files of parts {', '.join(spanned)} (a "
                      f"link, or a grouping option such as a title, folder or field, joined "
                      f"them); the frozen part {target!r} keeps the whole group")
        else:
            reason = (f"its group (key {key}) now holds files of parts {', '.join(spanned)} (a "
                      f"link, or a grouping option such as a title, folder or field, joined "
                      f"them); placed in {target!r}, which held most of the members")
        moves.append((m, old, target, reason))


def achieved_ratios(assignment: Mapping[str, str], parts: Iterable[str],
                    sizes: Mapping[str, float] | None = None) -> dict[str, float]:
    """The share of (weighted) members in each part."""
    parts = list(parts)
    tot = dict.fromkeys(parts, 0.0)
    for m, p in assignment.items():
        tot[p] = tot.get(p, 0.0) + (1.0 if sizes is None else float(sizes.get(m, 1.0)))
    s = sum(tot.values())
    return {p: (tot[p] / s if s else 0.0) for p in tot}


def lsh_rows(threshold: float, num_perm: int, recall: float = 0.99) -> int:
    """The most rows per band (fewest candidates) whose banding still finds a pair of exactly
    ``threshold`` similarity with probability >= ``recall``: ``1 - (1 - s**r)**(n/r)``
    (Leskovec, Rajaraman, Ullman, Mining of Massive Datasets, ch. 3). Rows divide ``num_perm``."""
    best = 1
    for r in range(1, num_perm + 1):
        if num_perm % r == 0 and 1.0 - (1.0 - threshold ** r) ** (num_perm // r) >= recall:
            best = r
    return best


def band_codes(sig: "np.ndarray", bands: int, only: "np.ndarray | None" = None, *, shifted: bool = False
               ) -> tuple["np.ndarray", "np.ndarray"]:
    """``(codes, live)``: the rows with a non-empty signature (``live``, indices into ``sig``)
    and the sorted unique codes ``i * len(live) + j`` (``i < j`` index ``live``) of those
    sharing at least one band, with ``only`` (a boolean mask over the rows) just those with a
    row in it (incremental reruns pair the new files against everything, not all with all). 8 bytes a pair
    (memory: the split's candidates grow with the square of the corpus). One band at a time
    (``pipeline.similarity.lsh.banded_pair_codes``): memory stays near the number of distinct
    pairs instead of rows x bands x run length (a 100,000-file run held several GB in the
    all-bands-at-once form). ``shifted``: each band taken again one row over (``banded_pair_codes``)."""
    import numpy as np

    from .minhash import EMPTY_VALUE
    from .lsh import banded_pair_codes, check_banding

    n = len(sig)
    none = np.zeros(0, np.int64)
    live = np.flatnonzero(~np.all(np.asarray(sig) == EMPTY_VALUE, axis=1)) if n else none
    if len(live) < 2:
        return none, live
    is_new = np.ones(len(live), dtype=bool) if only is None else np.asarray(only, dtype=bool)[live]
    if not is_new.any():
        return none, live
    err = check_banding(sig.shape[1], bands)
    if err:
        raise ValueError(err)
    # memory: no copy of the signature matrix when every row is live (the usual case)
    return banded_pair_codes(sig if len(live) == n else sig[live], bands, is_new, shifted=shifted), live


#: Probability that the LSH banding proposes a pair lying exactly at the grouping threshold.
#: 0.9 gives 2-row bands at 0.2 with 128 permutations (0.93 at 0.2, above 0.99 from 0.26);
#: 1-row bands make the candidate count grow with the square of the corpus (DEVELOPERS.md,
#: Bench notes).
GROUP_RECALL = 0.9


def near_links(signatures: Mapping[str, "np.ndarray"], threshold: float,
               shingles: Mapping[str, "np.ndarray"] | None = None, *, recall: float = GROUP_RECALL,
               margin_sigmas: float = 4.0, only: "set[str] | None" = None) -> list[tuple[str, str, float]]:
    """All pairs at or above ``threshold`` similarity: ``(a, b, similarity)`` with ``a < b``.
    With ``only``, just the pairs with at least one member in it (incremental reruns: the new
    files against everything).

    Grouping must not miss pairs (a missed pair is a leak), so this is stricter than dedup's
    search: LSH bands chosen for ``recall`` at the threshold itself, then a vectorized MinHash
    estimate drops candidates more than ``margin_sigmas`` standard errors below the threshold,
    and the rest are verified exactly on the shingle sets (Jaccard or excerpt containment, as in
    ``pipeline.similarity.sets.set_similarity``) by ``links.verify_codes``, dedup's
    verification; without shingles the estimate decides. The ``leakage`` audit searches with
    this function too.
    """
    import numpy as np

    keys = sorted(signatures)
    if len(keys) < 2:
        return []
    return near_links_of(keys, lambda: np.vstack([np.asarray(signatures[k], dtype=np.uint32) for k in keys]),
                         threshold, shingles, recall=recall, margin_sigmas=margin_sigmas, only=only)


def near_links_of(keys: list[str], matrix: "Callable[[], np.ndarray]", threshold: float,
                  shingles: Mapping[str, "np.ndarray"] | None = None, *, recall: float = GROUP_RECALL,
                  margin_sigmas: float = 4.0, only: "set[str] | None" = None,
                  read: "Callable[[list], list] | None" = None, sizes: "np.ndarray | None" = None
                  ) -> list[tuple[str, str, float]]:
    """``near_links`` over the sorted ``keys``, whose signatures ``matrix()`` gives as the rows
    of one matrix (row ``k`` for ``keys[k]``; it may be called twice and must give the same
    matrix each time). Memory: no array object per file is needed, and the matrix, made here,
    is let go while the sets are sketched and before the candidate pairs are verified; a full
    search with shingles calls ``matrix.release()``, when it has one, once it has spilled the
    matrix to a file (``columns.stacked``: the column's own matrix leaves memory). ``read``
    turns held shingle sets that are not arrays into arrays (``links.verify_codes``); ``sizes``,
    the sets' lengths in key order, is taken from ``shingles`` when not given."""
    import numpy as np

    from .lsh import PAIR_CHUNK, few_new, pair_estimates, plausible_pairs
    from .links import verify_codes
    from .overlap_sketch import sketched_codes

    if len(keys) < 2:
        return []
    wanted = None if only is None else np.array([k in only for k in keys])
    if shingles is not None and not few_new(np.ones(len(keys), dtype=bool) if wanted is None else wanted):
        # memory: a full search streams its candidates a block of bands at a time, each block
        # bounded at once (the same pairs: similarity.candidates); it makes the matrix itself,
        # so none is held here while its survivors are verified
        return _streamed_links(keys, matrix, threshold, shingles, recall, wanted, margin_sigmas, read, sizes)
    sig = np.asarray(matrix(), dtype=np.uint32)
    num_perm = sig.shape[1]
    rows = lsh_rows(threshold, num_perm, recall)
    # recall: each half of a signature (the leads', the whole sets') holds half of the bands, so
    # a pair alike in one half only is found with 1 - (1 - s^r)^(b/2); the same values banded
    # again one row over give it as many bands more (README, "The split's search against every
    # pair"); the exact bounds below keep the extra candidates cheap
    codes, live = band_codes(sig, num_perm // rows, wanted, shifted=rows > 1)
    if not len(codes):
        return []
    m = len(live)
    if shingles is None:
        sizes = None
    elif sizes is None:
        sizes = np.array([len(shingles[k]) for k in keys], dtype=np.float64)
    else:
        sizes = np.asarray(sizes, dtype=np.float64)
    live_keys = [keys[x] for x in live.tolist()]  # codes index the live rows
    if shingles is not None:
        # exact bounds from one bitmap per set first: at a low threshold most candidates share
        # a little material and never reach it, and the estimates below cannot tell them
        # (overlap_sketch; DEVELOPERS.md, Bench notes). It drops no pair at the threshold, so
        # the links are those of the estimates and the exact comparison alone.
        # memory: the signatures are let go while the sketches are made (together they were
        # the split's peak) and gathered again for the estimates
        del sig
        codes = sketched_codes(live_keys, codes, shingles, threshold, read=read)
        if not len(codes):
            return []
        sig = np.asarray(matrix(), dtype=np.uint32)
    sel = np.empty(len(codes), dtype=bool)
    est = np.empty(len(codes), dtype=np.float64) if shingles is None else None
    for lo in range(0, len(codes), PAIR_CHUNK):  # memory: per-pair arrays a chunk at a time
        c = codes[lo:lo + PAIR_CHUNK]
        i, j = live[c // m], live[c % m]
        if shingles is None:  # the estimate decides
            est[lo:lo + len(c)] = pair_estimates(sig, i, j)
            sel[lo:lo + len(c)] = est[lo:lo + len(c)] >= threshold
        else:  # the bounds dedup uses (containment, lead voices), with a wider margin
            sel[lo:lo + len(c)] = plausible_pairs(sig, i, j, sizes, threshold,
                                                  margin_sigmas=margin_sigmas)
    del sig
    if not sel.all():
        codes = codes[sel]  # memory: millions of candidates on a large corpus
        est = None if est is None else est[sel]
    del sel
    keys = live_keys
    if shingles is None:
        # memory: only the linked pairs become Python objects
        return [(keys[a], keys[b], float(v)) for a, b, v in
                zip((codes // m).tolist(), (codes % m).tolist(), est.tolist())]
    return verify_codes(keys, codes, shingles, threshold, read=read)


def _streamed_links(keys: list[str], matrix: "Callable[[], np.ndarray]", threshold: float,
                    shingles: Mapping[str, "np.ndarray"], recall: float, wanted: "np.ndarray | None",
                    margin_sigmas: float, read: "Callable[[list], list] | None", sizes: "np.ndarray | None"
                    ) -> list[tuple[str, str, float]]:
    """``near_links_of``'s search with shingles, its candidates streamed (``similarity.candidates``
    over ``similarity.spilled``): the signatures spilled to a file column by column and let go,
    the bands of ``lsh_rows`` rows and the same bands one row over read back one at a time,
    each band's pairs bounded exactly (``overlap_sketch``, every live set sketched up front),
    the survivors bounded by the MinHash estimates (counted a column at a time) and verified:
    the links of banding every pair first."""
    import numpy as np

    from .candidates import streamed_pair_codes
    from .links import verify_codes
    from .lsh import check_banding, plausible_pair_codes
    from .minhash import EMPTY_VALUE
    from .overlap_sketch import bounded_codes, sketch_rows
    from .spilled import SpilledColumns

    # memory: the rows a block at a time where ``matrix`` gives them so (``columns.stacked``:
    # the column's matrix, spilled by dedup's search, is not read back whole), else the matrix
    held = [] if hasattr(matrix, "row_blocks") else [np.asarray(matrix(), dtype=np.uint32)]
    blocks = matrix.row_blocks if not held else lambda: iter(held)
    live_of, num_perm = [], 0
    for b in blocks():
        live_of.append(~np.all(b == EMPTY_VALUE, axis=1))
        num_perm = b.shape[1]
    rows = lsh_rows(threshold, num_perm, recall)
    err = check_banding(num_perm, num_perm // rows)
    if err:
        raise ValueError(err)
    live = np.flatnonzero(np.concatenate(live_of))
    is_new = np.ones(len(live), dtype=bool) if wanted is None else wanted[live]
    if len(live) < 2 or not is_new.any():
        return []
    sizes = (np.array([len(shingles[k]) for k in keys], dtype=np.float64) if sizes is None
             else np.asarray(sizes, dtype=np.float64))[live]
    live_keys = [keys[x] for x in live.tolist()]
    m = len(live)
    # memory: the signatures go to a file (in ``matrix.folder`` when given: the run's own
    # folder), read back a band at a time, and the matrix is let go (``matrix.release``, e.g.
    # ``columns.stacked``'s) before the sets are sketched
    live_rows = (b[ok] for b, ok in zip(blocks(), live_of))
    with SpilledColumns(live_rows, getattr(matrix, "folder", None), shape=(m, num_perm)) as store:
        del held[:], live_of
        release = getattr(matrix, "release", None)
        if release is not None:
            release()
        sk = sketch_rows(live_keys, np.arange(m), shingles, read=read)
        at = np.arange(m)
        codes = streamed_pair_codes(store, num_perm // rows, is_new,
                                    lambda c: bounded_codes(sk, at, c, threshold), shifted=rows > 1)
        del sk
        codes = plausible_pair_codes(store, codes, sizes, threshold, margin_sigmas=margin_sigmas)
    return verify_codes(live_keys, codes, shingles, threshold, read=read)
