"""The ``split`` stage: a leakage-free train/valid/test split that stays put when files are added.

Which files travel together (one group, never split across parts):

* near-duplicates at ``group_threshold`` (lower than dedup's removal threshold, so near-misses
  that survived dedup still travel together), found on MinHash signatures and shingle sets made
  by the function dedup's ``prepare`` uses (``pipeline.similarity.minhash.signature_of``) at dedup's
  default settings, on which ``group_threshold`` is calibrated. When a dedup stage with those
  settings runs before the split, the split reads its stored arrays
  (``Member.artifacts["dedup"]``); without one (or with dedup at other settings) the split's own
  ``prepare`` makes them, so the split groups near-duplicates on its own. Only
  ``group_threshold: null`` turns this off, and the run's table and summary.json then say so;
* files of one note content (equal ``content_hash``, dedup's canonical content, made by the same
  ``signature_of`` call; byte-identical files are one member), whatever their shingles: two
  track layouts of one piece may share few shingles, but they are the same notes (dedup calls
  them ``exact_duplicate``). When dedup lends its arrays, they are one dedup cluster already
  and dedup keeps one of them; else the split's own ``prepare`` keeps the hash and the split
  links them. Also off with ``group_threshold: null``;
* members of one dedup ``cluster`` (a connected component of dedup's links) too;
* all augmentation copies of one source: they are one ``Member`` with several outputs, so they
  travel together by construction and weigh as many files as they write in the ratios
  (``output_count``);
* files under one folder when the input is laid out one folder per piece (``group_by_folder:
  auto``, the default: ``grouping.piece_folders`` judges the layout from the files' own links,
  so versions the notes do not link, a new melody over the same song, still share a part), or
  always (``true``: the same folder; ``N``: the same first N folder levels; files at the top of
  the input folder are not grouped by it);
* optionally files with the same normalized title (``group_by_title``) or the same
  normalized value of other manifest fields (``group_fields``, e.g. ``[composer]``).

The assignment itself is ``pipeline.similarity.grouping.assign_groups`` (placement rules documented
there). Reruns keep every file's previous part; files dropped by dedup in favour of a new file
pass their part on to it (they stay in the saved state, weightless), so the new representative
of a test piece stays in test; and a file dedup dropped carries its cluster's part to the next
run (``inherited``), so when its kept copy leaves the input it stays where its piece was.
``state.flags["reassign"]`` recomputes from scratch.
"""
from __future__ import annotations

import re
import unicodedata
from collections.abc import Sequence
from pathlib import PurePosixPath
from typing import Any

from ..errors import ConfigError
from ..similarity.grouping import (GROUP_RECALL, FolderLayout, achieved_ratios, assign_groups,
                                   build_groups, folders_mostly_pieces, group_by_keys,
                                   near_links_of, piece_folders)
from ..similarity.links import UnionFind
from ..midi.piece import Piece
from ..similarity.minhash import signature_of
from ..store.columns import ValuesOf, column_of, lengths_of, present, stacked
from ..store.ledger import load_arrays
from .base import (CorpusState, FileContext, Member, Option, Stage, StageResult,
                   options_fingerprint, register)
from .dedup import Dedup

_PART_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
DEFAULT_RATIOS = {"train": 0.8, "valid": 0.1, "test": 0.1}

def signature_options() -> dict[str, Any]:
    """The settings the split signs files with: dedup's defaults for every option its
    ``prepare`` reads (``Dedup.prepare_options``; ``group_threshold`` is calibrated on them).
    A dedup stage before the split with these settings stores the arrays the split reads."""
    defaults = {o.name: o.default for o in Dedup.options}
    return {k: defaults[k] for k in Dedup.prepare_options}


#: Moves a run lists one by one in its notes (the rest are counted; every row names its own).
MOVES_LISTED = 20


def _ratio_text(ratios: dict[str, Any], order: list[str] | None = None) -> str:
    """``train 0.8, valid 0.1, test 0.1``: the parts in ``order`` (the config's), then the rest
    (a saved state's mapping comes back with its keys sorted)."""
    first = [p for p in order or () if p in ratios]
    return ", ".join(f"{p} {float(ratios[p]):g}" for p in first + [p for p in ratios if p not in first])


def check_ratios(v: Any) -> str | None:
    """Error sentence for a bad ``ratios`` mapping, else None."""
    if not isinstance(v, dict) or not v:
        return f"ratios must map part names to shares, e.g. {DEFAULT_RATIOS}"
    for name, share in v.items():
        if not isinstance(name, str) or not _PART_NAME.match(name):
            return (f"part name {name!r} must be a plain file name (letters, digits, '_', '-', "
                    "'.'), since it names splits/<part>.txt and midi/<part>/")
        if isinstance(share, bool) or not isinstance(share, (int, float)) or share <= 0:
            return f"ratio of part {name!r} must be a number > 0, got {share!r}"
    folded: dict[str, str] = {}
    for name in v:  # one folder and list per part on a file system that ignores case too
        other = folded.setdefault(name.casefold(), name)
        if other != name:
            return (f"part names {other!r} and {name!r} differ only in case: on macOS and Windows "
                    "they would be one folder (midi/<part>/) and one list; rename one")
    total = sum(v.values())
    if abs(total - 1.0) > 1e-6:
        return f"ratios must sum to 1 (within 1e-6) but sum to {total:.6g}; rescale them"
    return None


def _check_threshold(v: Any) -> str | None:
    if v is None:
        return None
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 < v <= 1:
        return "group_threshold must be in (0, 1] or null (no near-duplicate grouping)"
    return None


def _check_fields(v: Any) -> str | None:
    if not isinstance(v, (list, tuple)) or not all(isinstance(x, str) for x in v):
        return "group_fields must be a list of manifest field names"
    return None


def normalize_text(value: Any) -> str | None:
    """Casefolded, accent-free words of a title or metadata value; None when nothing is left."""
    if value is None:
        return None
    text = unicodedata.normalize("NFKD", str(value))
    text = "".join(ch for ch in text if not unicodedata.combining(ch)).casefold()
    words = re.findall(r"[^\W_]+", text)
    return " ".join(words) or None


def _check_folder(v: Any) -> str | None:
    if isinstance(v, bool) or (isinstance(v, int) and v >= 1) or v == "auto":
        return None
    return (f"group_by_folder must be auto, true, false or a folder depth of at least 1, not {v!r}; "
            "use 1 to tie every file under one top-level folder of the input together")


def folder_of(source: str, depth: int | None = None) -> str | None:
    """The folder of a source path relative to the input folder (None at the top level); with
    ``depth``, only its first ``depth`` levels (``a/b/c.mid`` at depth 1 is ``a``), so a piece
    kept as ``song/main.mid`` beside ``song/versions/v1.mid`` is one folder."""
    parts = PurePosixPath(source.replace("\\", "/")).parent.parts
    if depth is not None:
        parts = parts[:depth]
    return "/".join(parts) if parts else None


def _piece_folder(source: str, depths: dict[str, int]) -> str | None:
    """The folder that ties ``source`` to its piece's other files under a per-collection folder
    rule (top-level folder -> depth): its first ``depth`` folder levels, None when its top folder
    has no rule or it lies less deep (files right in a collection's folder are not pieces)."""
    top = source.partition("/")[0]
    if top not in depths:
        return None
    folder = folder_of(source, depths[top])
    return folder if folder is not None and folder.count("/") + 1 >= depths[top] else None


def _value(result: StageResult, name: str) -> Any:
    """One value of an upstream result (read without parsing the others)."""
    return result.value(name)


def _same_split(r: Any, part: str, group: str, size: int) -> bool:
    """Whether a last-run result has exactly these values (and no ``moved_from``). A stored
    record is compared as its stored JSON text (sorted keys; member ids are hex and part names
    plain, so nothing needs escaping), without parsing it."""
    return r.values_json() == f'{{"group":"{group}","group_size":{size},"split":"{part}"}}'


def output_count(m: Member) -> float:
    """Files a member writes: its outputs if known, else 1 plus its augmentation copies
    (``values["augment"]``, the extra shifts of the transpose stage)."""
    augment = m.values.get("augment") or []
    return float(max(1, len(m.outputs), 1 + len(augment)))


#: A part's share of the kept files is reported (a run warning) when it lies further than this
#: from its target, absolutely, and than half its target; and only from this many kept files
#: (with fewer, whole groups move shares more than that). Common practice, no source.
OFF_TARGET = 0.15
OFF_TARGET_MIN_FILES = 30


def off_target_warnings(files: dict[str, int], ratios: dict[str, float], freeze: str | None) -> list[str]:
    """Warnings for parts far from their target shares (``files``: kept files per part), with
    the likely causes and the way back (an audit: one exploratory rerun with another folder
    grouping merged groups across parts into ``freeze``, leaving train 6 files of 182)."""
    total = sum(files.values())
    if total < OFF_TARGET_MIN_FILES:
        return []
    out = []
    for part, target in ratios.items():
        n = files.get(part, 0)
        share = n / total
        if n and abs(share - target) > max(OFF_TARGET, target / 2):
            merged = f"'{freeze}' (freeze)" if freeze else "the part holding most of their files"
            out.append(f"part '{part}' holds {share:.1%} of the kept files ({n:,} of {total:,}), "
                       f"its target {float(target):.0%}: the groups are few or large (folders, "
                       f"group fields), or reruns joined groups linked across parts to {merged}; "
                       "`midisift run --reassign` places every group again (files may change part)")
    return out


@register
class Split(Stage):
    """Split kept files into parts, keeping every near-duplicate group whole and reruns stable."""

    name = "split"
    kind = "corpus"
    version = 4
    #: The version of what ``prepare`` computes (the split's own signatures, when no dedup stage
    #: lends them): it keys those artifacts, so a change of the corpus step alone (``version``)
    #: re-signs no file. Bump it when ``prepare`` or what it calls changes.
    signature_version = 3
    doc = "Leakage-free, rerun-stable split of the kept files into parts."
    #: shingle sets are read for the members in candidate pairs only
    deferred_artifacts = ("shingles",)
    options = (
        Option("ratios", dict, dict(DEFAULT_RATIOS), "Part name -> share of the kept files "
               "(positive, summing to 1). Parts may be renamed or added.", check_ratios),
        Option("seed", int, 0, "Seed of the placement order of new groups."),
        Option("group_threshold", (int, float, type(None)), 0.2, "Similarity at which files "
               "travel together (below dedup's removal threshold, so near-misses that survive "
               "dedup still share a part); measured on dedup's signatures when a dedup stage at "
               "its default signature settings runs before the split, else on the split's own. "
               "Files of one note content (dedup's content hash) travel together whatever their "
               "similarity. null turns near-duplicate and same-content grouping off (the run's "
               "table and summary.json say so).",
               _check_threshold),
        Option("group_by_folder", (bool, int, str), "auto", "auto: files under one folder share "
               "a part when the input is laid out one folder per piece, judged from the notes: "
               "at the shallowest folder depth (1 to 3) where at least 3 folders hold two or more "
               "files and 80% of those files lie in their folder's largest near-duplicate group "
               "(dedup's clusters, its dropped files included, and the split's links; off with "
               "group_threshold: null); when the input as a whole is not, each top-level folder "
               "is judged the same way as a collection of its own (depths 2 to 4), and the "
               "folders of those laid out by piece are tied; true: "
               "files in the same folder share a part; a number N: files under the same first N "
               "folder levels share a part (1: one top-level folder per piece, its subfolders "
               "included); false: folders are not read. Files at the top of the input folder "
               "are not grouped by this.", _check_folder),
        Option("group_by_title", bool, False, "Files with the same normalized title (casefolded, "
               "accents and punctuation removed) share a part."),
        Option("group_fields", (list, tuple), [], "Other manifest fields whose normalized equal "
               "values tie files together, e.g. [composer].", _check_fields),
        Option("freeze", (str, type(None)), "test", "When a new file links groups sitting in "
               "different parts, the merged group joins this part if any member was there "
               "(null: the part that held most members). Ignored if no such part is configured "
               "and left at its default."),
    )

    def __init__(self, opts: dict[str, Any] | None = None):
        super().__init__(opts)
        problem = self.check_options(self.opts)
        if problem:
            raise ConfigError(problem, location="split.freeze")
        #: "dedup" when a dedup stage before the split stores the signatures it needs
        #: (``bind``); None: the split's own ``prepare`` makes them
        self.borrows: str | None = None

    @property
    def fingerprint(self) -> str:
        """The options' fingerprint, plus what the split signs files with (dedup's and its own
        signature versions and default signature settings): a change there re-signs the files."""
        return options_fingerprint(self.name, self.version, {
            **self.opts, "signatures": {"dedup_version": Dedup.signature_version,
                                        "own_version": self.signature_version, **signature_options()}})

    @property
    def artifact_fingerprint(self) -> str:
        """The split's own signatures depend only on what it signs with, not on its options:
        new ratios or a new seed re-sign no file."""
        return options_fingerprint(f"{self.name}.prepare", self.signature_version,
                                   {"dedup_version": Dedup.signature_version, **signature_options()})

    @property
    def uses_source_fields(self) -> bool:
        """Titles and metadata columns are read only to group by them."""
        return bool(self.opts["group_by_title"] or self.opts["group_fields"])

    def bind(self, earlier: list[Stage]) -> None:
        """Read dedup's stored signatures when a dedup stage before the split makes them with
        the settings the split needs; else sign the files in ``prepare``."""
        wanted = signature_options()
        self.borrows = next((st.name for st in earlier if isinstance(st, Dedup)
                             and all(st.opts.get(k) == v for k, v in wanted.items())), None)

    def has_prepare(self) -> bool:
        return self.opts["group_threshold"] is not None and self.borrows is None

    def reads_from(self) -> tuple[str, ...]:
        return (self.borrows,) if self.borrows and self.opts["group_threshold"] is not None else ()

    def prepare(self, piece: Piece, ctx: FileContext) -> dict[str, Any]:
        """MinHash signature, shingle set and note-content hash of one piece, by dedup's
        function at dedup's default settings (when no dedup stage before the split stores them):
        files of one content travel together whatever their shingles."""
        sig, sh, chash = signature_of(piece, signature_options())
        return {"signature": sig, "shingles": sh, "content_hash": chash}

    @classmethod
    def check_options(cls, opts: dict[str, Any]) -> str | None:
        """Cross-option rule: ``freeze`` names a configured part (the default ``"test"`` is
        simply inactive when no part is called test)."""
        freeze, parts = opts.get("freeze"), opts.get("ratios") or {}
        if freeze is not None and freeze != "test" and freeze not in parts:
            return (f"freeze names part {freeze!r}, which ratios does not define (parts: "
                    f"{', '.join(parts)}); name one of them or set freeze: null")
        return None

    def _freeze(self) -> str | None:
        freeze = self.opts["freeze"]
        return freeze if freeze in self.opts["ratios"] else None

    def parts(self) -> list[str]:
        return list(self.opts.get("ratios") or ())

    def add_to_summary(self, summary: dict[str, Any], saved: dict[str, Any]) -> None:
        """summary.json's ``split``: the target ratios, the parts in the config's order (the
        file is written with sorted keys) and the stage's own counts (``split_summary``)."""
        section = summary.setdefault("split", {})
        section["targets"] = self.opts.get("ratios")
        section["part_order"] = self.parts()
        if saved.get("summary"):
            section["stage"] = saved["summary"]
        summary.setdefault("warnings", []).extend(
            off_target_warnings(section.get("files", {}), self.opts["ratios"], self._freeze()))
        rule = (saved.get("summary") or {}).get("group_by_folder") or {}
        if folders_mostly_pieces(rule):
            summary["warnings"].append(
                f"group_by_folder: auto tied no folders, yet {rule['alike']} of {rule['folders']} "
                "folders of two or more files hold one piece each (a few larger ones hold most of "
                "the files), and the versions of a piece that its notes do not link may land in "
                "two parts: move the piece folders under one folder of their own (auto then judges "
                "each top-level folder as a collection), or set group_by_folder: "
                f"{rule.get('judged_depth')} only if every folder, the large ones too, is one piece")
        before = (saved.get("summary") or {}).get("ratios_before")
        if before:  # an audit: new ratios on a rerun were applied to nothing, and nothing said so
            summary["warnings"].append(  # true as well when a nothing-changed rerun replays it
                f"the split's ratios were changed ({_ratio_text(before, self.parts())} -> "
                f"{_ratio_text(self.opts['ratios'])}) on a rerun: files placed before kept their "
                "parts (but those of a part no longer configured); `midisift run --reassign` "
                "places every group again (files may change part)")

    def run_corpus(self, members: Sequence[Member], state: CorpusState) -> dict[str, StageResult]:
        ratios = {p: float(r) for p, r in self.opts["ratios"].items()}
        reassign = state.flags.get("reassign")
        previous = {} if reassign else dict(state.previous.get("assignments", {}))
        # the parts that files dedup dropped took from their clusters (``_heirs``)
        inherited = {} if reassign else state.previous.get("inherited", {})
        ids = sorted(m.id for m in members)
        sizes = self._output_counts(members, state)
        links, ghosts, signed, cluster_of = self._links(members, state, {**inherited, **previous})
        for g in ghosts:
            sizes[g] = 0.0
        by_folder, layout = self._folder_rule(members, links, state, cluster_of)
        heirs = _heirs(cluster_of, ids)
        del cluster_of
        groups = build_groups(ids + sorted(ghosts), links, self._forced(members, by_folder))
        prior = _prior_parts(ids, ghosts, groups, previous, inherited,
                             {} if reassign else state.flags.get("edited") or {})
        assignment, moves = assign_groups(groups, ratios, self.opts["seed"], prior,
                                          self._freeze(), sizes)
        real = set(ids)
        moved = {m: (old, new, why) for m, old, new, why in moves if m in real}
        if moved and not reassign:
            ties = _tie_texts(moved, groups, prior, members)
            moved = {m: (old, new, why + ties.get(m, "")) for m, (old, new, why) in moved.items()}
        if reassign:  # every group placed again: a file now elsewhere moved (an audit: 463
            # such files went unreported in explain, the manifest and the page)
            last_parts = state.previous.get("assignments", {})
            for m in ids:
                old = last_parts.get(m)
                if old is not None and old != assignment[m]:
                    moved[m] = (old, assignment[m], "every group was placed again (--reassign)")
        last_ratios = state.previous.get("ratios")
        state.save("ratios", ratios)
        ratios_changed = (not reassign and isinstance(last_ratios, dict) and last_ratios != ratios
                          and bool(previous))
        if ratios_changed:
            was = _ratio_text(last_ratios, list(ratios))
            state.report(f"split: the ratios changed since the last run ({was} "
                         f"-> {_ratio_text(ratios)}); files placed before keep their parts (but "
                         "those of a part no longer configured) and new groups fill toward the "
                         "new ratios; `midisift run --reassign` places every group again")
        group_of: dict[str, tuple[str, int]] = {}   # member -> (smallest member id, size)
        for grp in groups.values():
            inside = [m for m in grp if m in real]
            for m in inside:
                group_of[m] = (inside[0], len(inside))
        # the last run's result of a member whose part, group and group size did not change
        # is returned as it is (see the runner's reuse of corpus-stage results)
        last = state.flags.get("previous_results")
        results: dict[str, Any] = {}
        reported = 0
        listed: list[tuple[str, str, str, str]] = []
        for m in ids:
            key, size = group_of[m]
            if last is not None and m not in moved:
                r = last.get(m)
                if r is not None and r.kept and not r.detail and _same_split(r, assignment[m], key, size):
                    results[m] = r
                    continue
            values = {"split": assignment[m], "group": key, "group_size": size}
            detail = ""
            if m in moved:
                old, new, why = moved[m]
                values["moved_from"] = old
                detail = f"moved from {old} to {new}: {why}"
                reported += 1
                if reported <= MOVES_LISTED:
                    listed.append((m, old, new, why))
            results[m] = StageResult.keep(detail=detail, values=values)
        if listed:  # named by path (the members read once more, only when files moved)
            source_of = {mem.id: mem.source for mem in members if mem.id in moved}
            for m, old, new, why in listed:
                state.report(f"split: {source_of.get(m, m)} ({m}) moved from {old} to {new}: {why}")
        if reported > MOVES_LISTED:
            state.report(f"split: {reported - MOVES_LISTED} more files moved to another part "
                         "(each one's row, and `midisift explain FILE`, give its reason)")
        grouping = self.opts["group_threshold"] is not None
        if grouping and members and not signed:
            grouping = False
            state.report("split: no file reached the split with a signature; near-duplicate "
                         "grouping was skipped")
        kept_assign = {m: assignment[m] for m in ids}
        state.save("assignments", {**previous, **kept_assign})
        carried = {m: p for m, p in inherited.items() if m not in kept_assign}
        carried.update((m, assignment[rep]) for m, rep in heirs.items())
        state.save("inherited", carried)
        summary = split_summary(kept_assign, ratios, sizes, len(moved), self.opts["group_threshold"],
                                len(groups), grouping, signed)
        summary["group_by_folder"] = {"option": self.opts["group_by_folder"], "applied": by_folder,
                                      **(layout.as_dict() if layout is not None else {})}
        if ratios_changed:
            summary["ratios_before"] = last_ratios
        state.save("summary", summary)
        return results

    def _output_counts(self, members: Sequence[Member], state: CorpusState) -> dict[str, float]:
        """``output_count`` of every member; a member of the last run is answered from the
        counts it saved (those other than 1), valid when the runner hands over the last run's
        results (``previous_results``: this stage's and every earlier stage's options are
        unchanged, and a member id names its content, so its ``augment`` is the same). Speed:
        a rerun reads ``augment`` from the ledger for the new members only."""
        last = state.flags.get("previous_results")
        saved = state.previous.get("output_counts") if last is not None else None
        sizes: dict[str, float] = {}
        for m in members:
            if saved is not None and m.id in last and not m.outputs:
                sizes[m.id] = float(saved.get(m.id, 1.0))
            else:
                sizes[m.id] = output_count(m)
        state.save("output_counts", {k: v for k, v in sizes.items() if v != 1.0})
        return sizes

    def _links(self, members: Sequence[Member], state: CorpusState, carried: dict[str, str]
               ) -> tuple[list[tuple[str, str]], set[str], str | None, dict[str, Any]]:
        """Near-duplicate links among members (and links between members of one note
        content, ``same_content_links``), and links to dedup cluster-mates that are not members
        but carry a part from the last run (``carried``: their own, or the one a dropped file
        took from its cluster; the ghosts); the stage whose signatures were compared (None
        when grouping is off or no member has one); and each dedup member's cluster
        (``_dedup_clusters``, read after the search: memory, it is not held beside it)."""
        links: list[tuple[str, str]] = []
        threshold = self.opts["group_threshold"]
        # memory: the members' artifacts (rows of the stage's columns), not an array or a
        # handle per member; signatures and shingle sets are read from them when compared
        signed_arts: dict[str, Any] = {}
        with_shingles = 0
        signed_by: set[str] = set()
        sources: list[str] = []
        rows: dict[str, list] = {}  # source -> the artifacts of the members it signs
        for m in members:
            # the split's own arrays, else those dedup stored (``bind``)
            arts = m.artifacts  # made on each read (``walk.StepMembers``)
            own = arts.get(self.name)
            source = self.name if own else (self.borrows or Dedup.name)
            sources.append(source)
            rows.setdefault(source, []).append(own if own else arts.get(source))
        # speed: which members hold a signature and a shingle set, read from the columns'
        # marks (no view or handle made per member); shingles may still be in the ledger
        held = {source: iter(zip(arts, present(arts, "signature"), present(arts, "shingles")))
                for source, arts in rows.items()}
        for m, source in zip(members, sources):
            art, signed, with_sh = next(held[source])
            if signed:
                signed_by.add(source)
                signed_arts[m.id] = art
                with_shingles += with_sh
        del rows, held
        signed = ", ".join(sorted(signed_by)) if threshold is not None and signed_by else None
        if threshold is not None and len(signed_arts) > 1:
            use_sh = ValuesOf(signed_arts, "shingles") if with_shingles == len(signed_arts) else None
            links += self._near_links(signed_arts, use_sh, state, signed)
            # with a dedup stage lending its arrays, each note content reaches the split once
            # (dedup keeps one file of a content, its cluster holds the others): nothing to link
            same = same_content_links(signed_arts) if self.borrows is None else []
            if same:
                state.report(f"split: {len(same)} files have the note content of another file "
                             "(another track layout): each shares that file's part")
            links += same
        ghosts: set[str] = set()
        cluster_of = _dedup_clusters(state)
        by_cluster: dict[Any, list[str]] = {}
        for mid, c in cluster_of.items():
            by_cluster.setdefault(c, []).append(mid)
        here = {m.id for m in members}
        for mates in by_cluster.values():
            inside = sorted(x for x in mates if x in here)
            if not inside:
                continue
            for x in mates:
                if x not in here and x in carried:
                    ghosts.add(x)
                if x != inside[0] and (x in here or x in ghosts):
                    links.append((inside[0], x))
        return links, ghosts, signed, cluster_of

    def _near_links(self, arts: dict[str, Any], shingles: Any, state: CorpusState,
                    signed: str | None) -> list[tuple[str, str]]:
        """Near-duplicate links at ``group_threshold`` among the members of ``arts`` (id -> the
        artifacts holding its signature), incrementally: links among files seen by the last
        run under the same signature settings are reused, and only pairs with a new file are
        searched. The links are saved for the next run."""
        threshold = self.opts["group_threshold"]
        # memory: the width only (a row held here would keep the signature column's old matrix
        # alive once the search reorders it: ``columns.stacked``)
        width = len(next(iter(arts.values()))["signature"])
        signer = options_fingerprint("signatures", Dedup.signature_version, {"by": signed, **signature_options()})
        settings = f"{threshold}:{width}:{shingles is not None}:{GROUP_RECALL}:{self.version}:{signer}"
        prev = state.previous.get("links") or {}
        fresh = state.flags.get("fresh") or state.flags.get("reassign") or prev.get("settings") != settings
        here = set(arts)
        known = set() if fresh else set(prev.get("members", [])) & here
        reused = [] if fresh else [(a, b) for a, b in prev.get("links", []) if a in here and b in here]
        new = here - known if known else here  # memory: no second set of every member on a fresh search
        found = []
        if new:
            keys = sorted(arts)
            rows = [arts[k] for k in keys]
            found = near_links_of(keys, stacked(rows, "signature"), threshold, shingles, only=new,
                                  read=load_arrays,
                                  sizes=None if shingles is None else lengths_of(rows, "shingles"))
            del rows
        links = sorted(set(reused) | {(a, b) for a, b, _ in found})
        state.save("links", {"settings": settings, "members": sorted(here), "links": [list(l) for l in links]})
        return links

    def _folder_rule(self, members: Sequence[Member], links: list[tuple[str, str]], state: CorpusState,
                     cluster_of: dict[str, Any]) -> tuple[bool | int | dict[str, int], FolderLayout | None]:
        """The folder grouping to apply (False, True, a depth, or a depth per top-level folder
        that ``auto`` found laid out by piece when the whole input is not) and, for ``auto``, what
        ``grouping.piece_folders`` found. ``auto`` judges every file the corpus steps saw: a
        dedup stage's members (the files it dropped are the best evidence that a folder holds
        one piece) with dedup's clusters (``cluster_of``), else the split's members; identities
        joined by the split's links. Off with ``group_threshold: null`` (no grouping by the
        notes at all)."""
        option = self.opts["group_by_folder"]
        if option != "auto":
            return option, None
        if self.opts["group_threshold"] is None:  # grouping by the notes turned off: auto too
            return False, None
        dedup = state.upstream.get("dedup")
        sources_of = state.flags.get("sources_of")
        if dedup and sources_of is not None:
            files = sources_of("dedup")  # memory: (id, path) pairs made as they are read
            cluster = cluster_of
        else:
            files = ((m.id, m.source) for m in members)
            cluster = {}
        uf = UnionFind()
        for a, b in links:
            a, b = cluster.get(a, a), cluster.get(b, b)
            uf.add(a)
            uf.add(b)
            uf.union(a, b)
        known = uf.parent

        def identity(mid: str) -> str:
            key = cluster.get(mid, mid)
            return uf.find(key) if key in known else key

        # the run's table, report.html and explain say what was found (summary.json,
        # ``outputs.table.folder_rule_text``)
        layout = piece_folders((path, identity(mid)) for mid, path in files)
        if layout.depth is not None:
            return layout.depth, layout
        # else the top-level folders laid out by piece on their own, each at its depth
        return {top: found.depth for top, found in layout.collections} or False, layout

    def _forced(self, members: Sequence[Member], by_folder: bool | int | dict[str, int]) -> list[list[str]]:
        """Groups tied by folder and by field. Every source of a member counts: a content
        filed twice (byte-identical copies) ties the groups of both its folders and of both
        its rows' fields (an audit: a copy under another song's folder split that folder)."""
        fields = list(self.opts["group_fields"])
        if self.opts["group_by_title"] and "title" not in fields:
            fields.insert(0, "title")
        if not by_folder and not fields:
            return []
        folder_keys: list[tuple[str, Any]] = []
        field_keys: dict[str, list[tuple[str, Any]]] = {f: [] for f in fields}
        for m in members:  # each made on this read
            values = m.values if fields else None
            for rel, meta in m.sources():
                if by_folder:
                    folder_keys.append((m.id, _folder_key(rel, by_folder)))
                for f in fields:  # a source's own fields (title, metadata columns) first
                    field_keys[f].append((m.id, normalize_text(meta[f] if f in meta else values.get(f))))
        forced = group_by_keys(folder_keys)
        for f in fields:
            forced += group_by_keys(field_keys[f])
        return forced


def _folder_key(rel: str, by_folder: bool | int | dict[str, int]) -> str | None:
    """The folder that ties ``rel`` under ``group_by_folder`` as applied: a depth per top-level
    folder (``_folder_rule``), a depth, or true (the file's own folder)."""
    if isinstance(by_folder, dict):
        return _piece_folder(rel, by_folder)
    return folder_of(rel, None if by_folder is True else by_folder)


def _dedup_clusters(state: CorpusState) -> dict[str, Any]:
    """Member id -> dedup cluster, for the members of a dedup stage of this run that lie in one
    (kept or dropped; read once, without parsing the rest of each result)."""
    out: dict[str, Any] = {}
    for mid, res in (state.upstream.get("dedup") or {}).items():
        c = _value(res, "cluster") if res is not None else None
        if c is not None:
            out[mid] = c
    return out


def _tie_texts(moved: dict[str, tuple[str, str, str]], groups: dict[str, list[str]],
               prior: dict[str, str], members: Sequence[Member]) -> dict[str, str]:
    """For each member moved into the part of another member of its group: that member and
    the group's files new to this run (those that can have joined the groups), named by their
    paths, so the move's reason says which files tied it (an audit: a stray byte copy of a test
    file in another song's folder moved that song to test, and explain named no file)."""
    named: dict[str, tuple[str, list[str]]] = {}  # moved member -> (anchor, new members)
    for grp in groups.values():
        inside = [m for m in grp if m in moved]
        if not inside:
            continue
        fresh = [x for x in grp if x not in prior][:2]
        for m in inside:
            anchor = next((x for x in grp if x != m and prior.get(x) == moved[m][1]), None)
            if anchor is not None:
                named[m] = (anchor, [x for x in fresh if x != m])
    wanted = {x for anchor, fresh in named.values() for x in (anchor, *fresh)}
    paths = {mem.id: [s for s, _ in mem.sources()] for mem in members if mem.id in wanted}

    def name(x: str) -> str:
        if x not in paths:
            return f"{x} (a file dedup dropped)"
        shown = ", ".join(paths[x][:3]) + (f" and {len(paths[x]) - 3} more" if len(paths[x]) > 3 else "")
        return f"{shown} ({x})"

    out = {}
    for m, (anchor, fresh) in named.items():
        text = f"; in {moved[m][1]!r} it joins {name(anchor)}"
        if fresh:
            text += ", through files new to this run: " + "; ".join(name(x) for x in fresh)
        out[m] = text
    return out


def _prior_parts(ids: list[str], ghosts: set[str], groups: dict[str, list[str]],
                 previous: dict[str, str], inherited: dict[str, str],
                 edited: dict[str, str]) -> dict[str, str]:
    """The part each member and ghost starts from (``assign_groups``' ``prior``): its own from
    the last run; else, for a member dedup dropped last run, the part it took from its cluster
    (``inherited``); else, for the new content of a file edited in place (``edited``: new
    member id -> the id of the content its path held in the last run), the part of that
    content, so a file keeps its part across an edit, as across a rerun (an audit: a kept
    file whose tempo was edited was placed as a new piece, into another part, unreported).
    A ghost that carries only the part it took from its cluster places a group none of whose
    members has a part (a cluster's new kept file stays where its piece was), and never moves
    a member that has one."""
    prior = {m: inherited[m] for m in ids if m not in previous and m in inherited}
    for m in ids:
        old = edited.get(m)
        if m not in previous and m not in prior and old is not None:
            part = previous.get(old, inherited.get(old))
            if part is not None:
                prior[m] = part
    for grp in groups.values():
        carried = [g for g in grp if g in ghosts and g not in previous and g in inherited]
        if carried and not any(m in previous or m in prior for m in grp if m not in ghosts):
            prior.update((g, inherited[g]) for g in carried)
    return {**prior, **previous}


def _heirs(cluster_of: dict[str, Any], ids: list[str]) -> dict[str, str]:
    """For each member of a dedup cluster that is not a split member (dedup, or a stage after
    it, dropped it), the cluster's first split member: the dropped file takes that member's
    part into the saved state (``inherited``), so when it becomes kept on a later run (its
    kept copy removed from the input) it starts in the part its piece was in, not in the
    part a new piece would get."""
    here = set(ids)
    first: dict[Any, str] = {}
    for mid, c in cluster_of.items():
        if mid in here and (c not in first or mid < first[c]):
            first[c] = mid
    return {mid: first[c] for mid, c in cluster_of.items() if mid not in here and c in first}


def same_content_links(arts: dict[str, Any]) -> list[tuple[str, str]]:
    """Links tying the members of one note content (equal ``content_hash`` among ``arts``, id
    -> the artifacts holding its signature) to the first of them by id: the same notes in
    another track layout may share few shingles with it, and must not sit in another part."""
    keys = sorted(arts)
    rows = [arts[k] for k in keys]
    held = [k for k, ok in zip(keys, present(rows, "content_hash")) if ok]
    if len(held) < len(keys):
        rows = [arts[k] for k in held]
    first: dict[str, str] = {}  # content hash -> its first member
    links: list[tuple[str, str]] = []
    # speed, memory: one pass keeping each hash's first member (as dedup's exact step), not a
    # list per content (group_by_keys)
    for k, h in zip(held, column_of(rows, "content_hash")):
        rep = first.setdefault(str(h), k)
        if rep != k:
            links.append((rep, k))
    return links


def split_summary(assignment: dict[str, str], ratios: dict[str, float], sizes: dict[str, float],
                  moved: int, group_threshold: float | None, groups: int, grouping: bool = True,
                  signatures: str | None = None) -> dict[str, Any]:
    """Counts and achieved ratios per part (files weighted by their outputs) for summary.json,
    and whether near-duplicates were grouped (``near_duplicate_grouping``; false with
    ``group_threshold: null``) and on whose signatures (``near_duplicate_signatures``: the
    stage that made them, ``dedup`` or ``split``)."""
    counts = dict.fromkeys(ratios, 0)
    files = dict.fromkeys(ratios, 0)
    for m, p in assignment.items():
        counts[p] += 1
        files[p] += int(sizes.get(m, 1))
    achieved = achieved_ratios(assignment, ratios, sizes)
    return {"members": counts, "files": files, "target": dict(ratios),
            "achieved": {p: round(v, 6) for p, v in achieved.items()},
            "moved": moved, "groups": groups, "group_threshold": group_threshold,
            "near_duplicate_grouping": grouping, "near_duplicate_signatures": signatures if grouping else None}
