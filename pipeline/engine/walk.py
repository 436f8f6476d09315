"""The stage walk: every stage in config order over the contents still alive.

Per-file verdicts come from the result cache (each content's records, computed by the workers
or stored by earlier runs); corpus stages (dedup, split) run over the survivors here, in the
main process, with the artifacts their ``prepare`` stored and the results of earlier corpus
stages. A dropped content never reaches a later stage. The outcome, a ``Walk``, holds each
content's trail (its records in stage order) and is what the outputs are written from; the
walk writes nothing.
"""
from __future__ import annotations

import time
from array import array
from collections.abc import Iterable, Iterator, Mapping, MutableMapping, Sequence
from dataclasses import dataclass, field
from json.encoder import encode_basestring_ascii as _json_string
from types import MappingProxyType
from typing import Any, Callable

from ..metadata import Metadata
from ..outputs.manifest import source_fields
from ..stages import CorpusState, Member, Stage
from ..store.codec import canonical_json, thresholds_json
from ..store.ledger import Ledger
from ..store.records import Compactor, TrailValues
from .heap import release_free_memory


class StageWalk:
    """One run's stage walk; ``run`` does it. ``compactor(stage)`` gives the stage's maker of
    compact records, ``bar(label, total)`` a progress bar, ``chains[stage]`` the fingerprint of
    the stage and every stage before it (the key of its stored last-run results); ``edited``
    (new member id -> the id of the content its path held in the last run, for files edited in
    place) reaches the corpus stages as ``state.flags["edited"]``."""

    def __init__(self, stages: list[Stage], metadata: Metadata | None, compactor: Callable[[str], Compactor],
                 bar: Callable[..., Any], chains: dict[str, str], *, fresh: bool, reassign: bool,
                 edited: Mapping[str, str] | None = None):
        self.stages = stages
        self.metadata = metadata
        self.compactor = compactor
        self.bar = bar
        self.chains = chains
        self.fresh = fresh
        self.reassign = reassign
        self.edited = edited or {}  # new member id -> the id its path's content had last run

    def run(self, ledger: Ledger, rep: Mapping[str, str], cache: dict, timings: dict,
            staged: dict[str, tuple[str, ...]], index: dict[str, int], *,
            unread: Mapping[str, tuple[str, str]] | None = None) -> "Walk":
        """Apply the stages in order to the contents ``rep`` (sha256 -> first source): per-file
        verdicts from ``cache`` (stage -> its ``records.Verdicts``, by content index: ``index``,
        sha256 -> position in ``rep``), corpus stages run here. ``unread``: the contents a
        worker could not read (sha256 -> reason, detail), dropped by the first stage in this
        run's trail only, whatever verdicts are stored for them."""
        names = [st.name for st in self.stages]
        walk = Walk(staged=staged, stage_names=names, metadata=self.metadata, index=index, rep=rep,
                    verdicts={name: cache[name] for name in names if name in cache})
        # memory: a content's trail is not held as a list of records: its per-file steps are
        # the verdict columns, its corpus steps ``walk.corpus``, its length follows from where
        # it was dropped; ``Walk.step`` makes a record when a reader asks
        alive = list(rep)  # contents in first-source order (sorted paths)
        ids: list[str] | None = None  # the member ids of ``alive``, once a corpus step made them
        upstream: dict[str, dict[str, Any]] = {}  # stage -> id -> Result (reads like StageResult)
        stepped: dict[str, tuple[list[str], list[str]]] = {}  # corpus stage -> its (contents, member ids)
        for st in self.stages:
            t = time.perf_counter()
            if st.kind == "file":
                survivors = []
                verdicts = cache[st.name]
                state, dropped, kept = verdicts.state, verdicts.DROPPED, verdicts.KEPT
                not_read = unread if unread and walk.stages_done == 0 else None
                for sha in alive:
                    s = state[index[sha]]
                    if not_read is not None and sha in not_read:
                        reason, detail = not_read[sha]
                        walk.replaced[(st.name, sha)] = self.compactor(st.name).make(
                            False, reason, detail, {}, {})
                        s = dropped
                    elif s == kept and st.uses_source_fields:
                        r = self._source_verdict(st, walk.step(walk.stages_done, sha), walk, sha, rep[sha])
                        if r is not None:
                            walk.replaced[(st.name, sha)] = r
                            s = dropped
                    elif s != kept and s != dropped:
                        # cannot happen unless a worker died; keep the file's trail honest
                        walk.replaced[(st.name, sha)] = self.compactor(st.name).make(
                            False, "decoder_crash", "the worker processing this file did not "
                            "return a result", {}, {})
                    if s == kept:
                        survivors.append(sha)
                    else:
                        walk.mark_dropped(sha, st.name, walk.step(walk.stages_done, sha).reason)
                ids = _ids_of(survivors, alive, ids)
                alive = survivors
            else:
                # speed, memory: the large per-file arrays a stage compares only in pairs stay
                # in the ledger until compared (Stage.deferred_artifacts); the others are held
                # as columns, each member's artifacts a row of them
                arts = (ledger.artifact_columns(st.name, st.artifact_fingerprint, alive,
                                                defer=st.deferred_artifacts)
                        if st.has_prepare() else None)
                if arts is not None:
                    walk.artifacts[st.name] = ContentRows(arts, alive, index)
                del arts
                members = StepMembers(walk, st, alive, self.metadata, ids)
                saved = ledger.state_for(st.name)
                last = None  # the last run's results of this stage, when it stored them
                if not self.fresh and saved.get(CORPUS_RESULTS) == self.chains[st.name]:
                    last = _last_results(ledger, st.name, st.fingerprint, self.compactor(st.name))
                state = CorpusState(saved, upstream, {
                    "fresh": self.fresh, "reassign": self.reassign, "previous_results": last,
                    "edited": self.edited,
                    "sources_of": lambda name: _member_sources(stepped.get(name), rep),
                    "dropped_later": _later_drops(self.stages, st, cache, index),
                    # the stage's options, or those of the stages its results depend on, differ
                    # from the last run's (its choices are then made as in a fresh run)
                    "options_changed": saved.get(CORPUS_RESULTS) != self.chains[st.name]})
                bar = self.bar(f"{st.name} (corpus)", len(members))
                release_free_memory()  # memory: what earlier steps freed is not kept beside this one
                res = st.run_corpus(members, state) if members else {}
                mids = members.ids  # memory: the members' id strings, not new ones
                stepped[st.name] = (alive, mids)
                del members
                bar.update(len(alive))
                bar.close()
                walk.states[st.name] = {**state.current, CORPUS_RESULTS: self.chains[st.name]}
                walk.notes.extend(state.notes)
                survivors = []
                make = self.compactor(st.name).make
                keep = make(True, None, "", {}, {})
                compact: dict[str, Any] = {}
                steps = walk.corpus[st.name] = {}  # sha -> the stage's record (its trail step)
                # the contents whose result this run computed (to store)
                new_rows: list[str] = []
                for sha, mid in zip(alive, mids):
                    r = res.pop(mid, None)  # memory: the stage's result goes once compacted
                    if r is not None and last is not None and r is last.get(mid):
                        # the last run's record, returned as it is
                        rec = r
                    else:
                        rec = keep if r is None else make(r.kept, r.reason, r.detail, r.values, r.thresholds)
                        new_rows.append(sha)
                    if r is not None:
                        compact[mid] = rec
                    steps[sha] = rec
                    if rec.kept:
                        survivors.append(sha)
                    else:
                        walk.mark_dropped(sha, st.name, rec.reason)
                # memory: later stages read this stage's verdicts as the compact records (same
                # attributes as StageResult), and a dropped file's artifact rows are forgotten
                upstream[st.name] = compact
                # all rows anew, or (when some were reused) only the new ones
                walk.corpus_rows[st.name] = (len(new_rows) == len(alive), new_rows)
                del res
                gone = set(alive) - set(survivors)
                for arts_of in walk.artifacts.values():
                    arts_of.discard(gone)
                ids = _ids_of(survivors, alive, mids)
                alive = survivors
            walk.stages_done += 1
            timings[f"stage:{st.name}"] = time.perf_counter() - t
        walk.artifacts.clear()  # memory: signatures and shingles are not needed after the walk
        release_free_memory()  # memory: the last search's freed heap is not kept beside the outputs
        for sha in alive:
            walk.status[sha] = None
        walk.byte_copy_judge = next((st for st in self.stages if st.judges_byte_copies), None)
        return walk

    def _source_verdict(self, st: Stage, kept: Any, walk: "Walk", sha: str, source: str) -> Any:
        """The stage's drop for the source's own fields (metadata, title), or None; a drop
        replaces the content's kept result in this run's trail only (it is never stored as the
        content's result: another path may hold the same bytes)."""
        file_title = ContentValues(walk, sha).get("file_title")
        drop = st.source_verdict(source_fields(source, file_title, self.metadata))
        if drop is None:
            return None
        values = {**kept.values, **drop.values}
        return self.compactor(st.name).make(False, drop.reason, drop.detail, values,
                                             {**kept.thresholds, **drop.thresholds})


def _member_sources(step: tuple[list[str], list[str]] | None,
                    rep: Mapping[str, str]) -> Iterator[tuple[str, str]]:
    """(member id, first source path) of each member of an earlier corpus step (``step``: its
    contents and member ids; None: the stage did not run): a later stage may judge the layout
    of every file that step saw, those it dropped included."""
    if step is None:
        return iter(())
    alive, mids = step
    return ((mid, rep[sha]) for sha, mid in zip(alive, mids))


def _later_drops(stages: list[Stage], stage: Stage, cache: dict, index: Mapping[str, int]
                 ) -> Callable[[str], tuple[str, str] | None]:
    """``(stage, reason)`` of the first per-file stage after ``stage`` whose verdict drops a
    content (by sha256), else None: every file's per-file verdicts are known before the corpus
    steps, so dedup can keep, of a cluster, a file that the stages after it keep too."""
    later = [(st.name, cache[st.name]) for st in stages[stages.index(stage) + 1:]
             if st.kind == "file" and st.name in cache]

    def dropped_later(sha: str) -> tuple[str, str] | None:
        i = index[sha]
        for name, verdicts in later:
            if verdicts.state[i] == verdicts.DROPPED:
                return name, verdicts.record(i).reason
        return None
    return dropped_later


def _ids_of(survivors: list[str], alive: list[str], ids: list[str] | None) -> list[str] | None:
    """The ids of ``survivors`` (``alive`` in order, some left out), ``ids`` being those of
    ``alive`` (memory: a later corpus step's members share the earlier step's id texts)."""
    if ids is None:
        return None
    pairs = zip(alive, ids)
    return [next(i for sha, i in pairs if sha == kept) for kept in survivors]


#: Key of a corpus stage's saved state: the fingerprints (its own and those of the stages
#: before it) under which its results of the last run were stored.
CORPUS_RESULTS = "_results"


def last_run_fingerprint(fp: str) -> str:
    """Ledger key of a corpus stage's stored results of the last run (beside per-file results)."""
    return f"{fp}:last-run"


def _last_results(ledger: Ledger, stage: str, fingerprint: str, compactor: Compactor) -> dict[str, Any]:
    """A corpus stage's results of the last run, by member id (values stay JSON text until
    read). A stage returns such a record as it is for a member whose result did not change;
    the runner then neither compacts nor stores it again. Read when the stage starts: a stage
    given them looks up nearly every member."""
    rows = ledger.results_for(stage, last_run_fingerprint(fingerprint), compactor.make_stored,
                              values_as_text=True)
    return {sha[:16]: r for sha, r in rows.items()}



@dataclass
class Walk:
    """The outcome of the stage walk, per content (sha256).

    A content's trail lists its results (``pipeline.store.records.Result``: ``kept``,
    ``reason``, ``detail``, ``values``, ``thresholds``) in stage order, one per stage it
    reached (``stage_names`` names them): ``trail(sha)`` makes it, ``step(i, sha)`` one step.
    The per-file steps are read from the stages' verdict columns (``verdicts``, by content
    index; ``replaced`` holds this run's own verdicts: a drop for a source's fields, a missing
    result), the corpus steps are ``corpus[stage][sha]``; a content reached every stage up to
    the one that dropped it (``status``)."""

    staged: dict[str, tuple[str, ...]] = field(default_factory=dict)  # sha -> staged suffixes
    #: corpus stage -> (replace all stored rows, [sha] whose record this run computed: the
    #: stage's step of the content's trail, ``corpus_record``)
    corpus_rows: dict[str, tuple[bool, list]] = field(default_factory=dict)
    status: dict[str, tuple[str, str] | None] = field(default_factory=dict)
    index: dict[str, int] = field(default_factory=dict)  # sha256 -> content index
    verdicts: dict[str, Any] = field(default_factory=dict)  # per-file stage -> records.Verdicts
    replaced: dict[tuple[str, str], Any] = field(default_factory=dict)  # (stage, sha) -> record
    corpus: dict[str, dict[str, Any]] = field(default_factory=dict)  # corpus stage -> sha -> record
    stages_done: int = 0  # stages walked so far (a content still alive reached them all)
    artifacts: dict[str, ContentRows] = field(default_factory=dict)  # corpus stage -> its rows
    states: dict[str, dict] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    #: the stage that judges byte-identical copies (``Stage.judges_byte_copies``), if any
    byte_copy_judge: Any = None
    rep: Mapping[str, str] = field(default_factory=dict)  # sha256 -> first source (``sources.Contents``)
    metadata: Any = None  # the config's metadata table (``pipeline.metadata``)
    stage_names: list[str] = field(default_factory=list)
    #: the distinct (stage, reason) statuses, one tuple each (memory: not a tuple per content)
    _statuses: dict[tuple[str, str], tuple[str, str]] = field(default_factory=dict, repr=False)

    def mark_dropped(self, sha: str, stage: str, reason: str) -> None:
        """Record that ``stage`` dropped the content for ``reason`` (its ``status``)."""
        pair = (stage, reason)
        self.status[sha] = self._statuses.setdefault(pair, pair)

    @property
    def byte_copy_stage(self) -> str | None:
        return self.byte_copy_judge.name if self.byte_copy_judge is not None else None

    def is_byte_copy(self, rel: str, sha: str) -> bool:
        """A source whose bytes equal an earlier source's (it is not the representative)."""
        return self.rep.get(sha) != rel

    def reached(self, sha: str) -> int:
        """How many stages the content's trail has a step for (0 for an unknown content)."""
        if sha not in self.index:
            return 0
        status = self.status.get(sha, ())
        if status is None or status == ():  # kept, or still alive during the walk
            return self.stages_done
        return self.stage_names.index(status[0]) + 1

    def step(self, i: int, sha: str) -> Any:
        """The content's record of stage ``i`` (it must have reached it)."""
        name = self.stage_names[i]
        steps = self.corpus.get(name)
        if steps is not None:
            return steps[sha]
        r = self.replaced.get((name, sha))
        return r if r is not None else self.verdicts[name].record(self.index[sha])

    def trail(self, sha: str) -> list:
        """The content's records in stage order (made on each call)."""
        return [self.step(i, sha) for i in range(self.reached(sha))]

    def corpus_record(self, stage: str, sha: str) -> Any:
        """The record a corpus stage gave a content in this run (its step of the trail)."""
        return self.corpus[stage][sha]

    def value_of(self, sha: str, key: str, default: Any = None) -> Any:
        """One value of a content's trail (the latest stage that set it), as
        ``ContentValues(self, sha).get(key, default)`` reads it (speed: placing the outputs
        reads the split's part of every kept content)."""
        for i in range(self.reached(sha) - 1, -1, -1):
            v = self.step(i, sha).value(key, _MISSING)
            if v is not _MISSING:
                return v
        return default

    def _reached(self, sha: str, stage: str) -> int | None:
        """Position of ``stage`` in the content's trail, or None when it did not reach it."""
        try:
            i = self.stage_names.index(stage)
        except ValueError:
            return None
        return i if i < self.reached(sha) else None

    def trail_of(self, rel: str, sha: str) -> list:
        """The trail of one source, each step with its ``stage`` name: its content's, cut at
        dedup for a byte-identical copy."""
        trail = [{"stage": name, "kept": r.kept, "reason": r.reason, "detail": r.detail,
                  "values": r.values, "thresholds": r.thresholds}
                 for name, r in zip(self.stage_names, self.trail(sha))]
        if self.byte_copy_stage and self.is_byte_copy(rel, sha):
            idx = self._reached(sha, self.byte_copy_stage)
            if idx is not None:
                trail = trail[:idx] + [self.byte_copy_judge.byte_copy_verdict(self.rep[sha], sha, trail[idx])]
        return trail

    def trail_json(self, rel: str, sha: str) -> str:
        """``trail_of`` as the ledger stores it (``codec.canonical_json``), assembled from the
        records' stored texts: no values are parsed or serialised again (a byte-identical
        copy's trail, whose dedup step is rewritten, goes through the json module)."""
        if self.byte_copy_stage and self.is_byte_copy(rel, sha) and \
                self._reached(sha, self.byte_copy_stage) is not None:
            return canonical_json(self.trail_of(rel, sha))
        esc = _json_string
        steps = [
            # the keys in sorted order, as canonical_json writes them
            '{"detail":' + ("null" if r.detail is None else esc(r.detail))
            + ',"kept":' + ("true" if r.kept else "false")
            + ',"reason":' + ("null" if r.reason is None else esc(r.reason))
            + ',"stage":' + esc(name) + ',"thresholds":' + thresholds_json(r.thresholds)
            + ',"values":' + r.values_json() + "}"
            for name, r in zip(self.stage_names, self.trail(sha))]
        return "[" + ",".join(steps) + "]"

    def final(self, rel: str, sha: str) -> tuple[str, str] | None:
        """(stage, reason) that dropped this source, or None when kept. A byte-identical copy
        that reached the judging stage ends there, with its ``byte_copy_verdict``."""
        if self.byte_copy_stage and self.is_byte_copy(rel, sha):
            idx = self._reached(sha, self.byte_copy_stage)
            if idx is not None:
                # the judging step of ``trail_of`` alone (speed: the other steps' values may be
                # read back from the ledger)
                r = self.step(idx, sha)
                step = self.byte_copy_judge.byte_copy_verdict(self.rep[sha], sha, {
                    "stage": self.stage_names[idx], "kept": r.kept, "reason": r.reason,
                    "detail": r.detail, "values": r.values, "thresholds": r.thresholds})
                return (step["stage"], step["reason"])
        return self.status.get(sha)


class ContentValues(Mapping):
    """The values of a content's trail as one read-only mapping, later stages winning (what a
    corpus stage's ``Member.values`` reads): each read makes the records it looks through,
    latest first (memory: no record is held per member)."""

    __slots__ = ("_walk", "_sha")

    def __init__(self, walk: Walk, sha: str):
        self._walk, self._sha = walk, sha

    def __getitem__(self, name: str) -> Any:
        walk, sha = self._walk, self._sha
        for i in range(walk.reached(sha) - 1, -1, -1):
            v = walk.step(i, sha).value(name, _MISSING)
            if v is not _MISSING:
                return v
        raise KeyError(name)

    def __iter__(self) -> Iterator[str]:
        return iter(TrailValues(self._walk.trail(self._sha)))

    def __len__(self) -> int:
        return len(TrailValues(self._walk.trail(self._sha)))


class MemberArtifacts(MutableMapping):
    """A walk member's artifacts (``Member.artifacts``): corpus stage -> its row of artifacts,
    read and written like the dict ``{stage: row}`` it stands for, made on each read of it
    (``StepMembers.artifacts``; the stage names are one tuple shared by the members)."""

    __slots__ = ("_names", "_first", "_more")

    def __init__(self, name: str, row: Any):
        self._names: tuple[str, ...] = _NAMES.setdefault((name,), (name,))
        self._first: Any = row
        self._more: tuple = ()  # the rows of the names after the first (one shared empty tuple)

    def _put(self, names: tuple[str, ...], rows: tuple) -> None:
        self._names = _NAMES.setdefault(names, names)
        self._first, self._more = (rows[0], rows[1:]) if rows else (None, ())

    def __getitem__(self, name: str) -> Any:
        try:
            i = self._names.index(name)
        except ValueError:
            raise KeyError(name) from None
        return self._first if i == 0 else self._more[i - 1]

    def __setitem__(self, name: str, row: Any) -> None:
        rows = (self._first, *self._more) if self._names else ()
        if name in self._names:
            i = self._names.index(name)
            self._put(self._names, rows[:i] + (row,) + rows[i + 1:])
        else:
            self._put(self._names + (name,), rows + (row,))

    def __delitem__(self, name: str) -> None:
        if name not in self._names:
            raise KeyError(name)
        i = self._names.index(name)
        rows = (self._first, *self._more)
        self._put(self._names[:i] + self._names[i + 1:], rows[:i] + rows[i + 1:])

    def __iter__(self) -> Iterator[str]:
        return iter(self._names)

    def __len__(self) -> int:
        return len(self._names)

    def __repr__(self) -> str:
        return f"MemberArtifacts({dict(self.items())!r})"


class ContentRows:
    """A corpus stage's artifacts by content (``Walk.artifacts[stage]``): sha256 -> the row of
    the stage's columns (``columns.ArtifactRow``), made when read (memory: a row number per
    content of the run, no dict entry or row object per member)."""

    def __init__(self, cols: Any, alive: list[str], index: Mapping[str, int]):
        """``cols``: the stage's ``ArtifactColumns``, row ``k`` for ``alive[k]``; ``index``: the
        run's content index (sha256 -> position)."""
        self._cols, self._index = cols, index
        self._at = array("q", [-1]) * len(index)  # content index -> row, -1 for none
        for k, sha in enumerate(alive):
            self._at[index[sha]] = k

    def get(self, sha: str, default: Any = None) -> Any:
        i = self._index.get(sha)
        k = -1 if i is None else self._at[i]
        return default if k < 0 else self._cols.row(k)

    def discard(self, shas: Iterable[str]) -> None:
        """Forget the rows of ``shas`` (contents that left the walk)."""
        for sha in shas:
            self._at[self._index[sha]] = -1


class StepMembers(Sequence):
    """The members of one corpus step of the walk (``Stage.run_corpus``'s ``members``), the
    contents ``alive`` in order: member ``i`` is made when read (memory: nothing is held per
    member but its id text; a stage that keeps members holds the ones it keeps)."""

    def __init__(self, walk: "Walk", stage: Stage, alive: list[str], metadata: Metadata | None,
                 ids: list[str] | None = None):
        """``ids``: the members' ids when an earlier step made them (``sha256[:16]``)."""
        self.walk, self.stage, self.alive, self.metadata = walk, stage, alive, metadata
        self.ids = [sha[:16] for sha in alive] if ids is None else ids
        self.reads = tuple(stage.reads_from())  # the earlier corpus stages' artifacts it reads

    def __len__(self) -> int:
        return len(self.alive)

    def __getitem__(self, i: int | slice) -> "WalkMember | list[WalkMember]":  # type: ignore[override]
        if isinstance(i, slice):
            return [WalkMember(self, k) for k in range(*i.indices(len(self.alive)))]
        if not -len(self.alive) <= i < len(self.alive):
            raise IndexError(i)
        return WalkMember(self, i % len(self.alive))

    def __iter__(self) -> Iterator["WalkMember"]:
        return (WalkMember(self, i) for i in range(len(self.alive)))

    def artifacts(self, sha: str) -> MemberArtifacts:
        """The content's artifacts: the stage's own row first (an empty mapping for a stage
        without a ``prepare``), then those of the earlier stages it reads that hold one."""
        walk = self.walk
        own = walk.artifacts.get(self.stage.name)
        arts = MemberArtifacts(self.stage.name, own.get(sha, _NOTHING) if own is not None else _NOTHING)
        for prev in self.reads:
            res = walk.artifacts.get(prev)
            row = res.get(sha) if res is not None else None
            if row is not None:
                arts[prev] = row
        return arts

    def meta(self, sha: str) -> Mapping[str, Any]:
        """The source's own fields, for a stage that reads them (else an empty mapping)."""
        if not self.stage.uses_source_fields:
            return _NOTHING
        walk = self.walk
        return source_fields(walk.rep[sha], ContentValues(walk, sha).get("file_title"), self.metadata)

    def copies(self, sha: str) -> tuple[tuple[str, Mapping[str, Any]], ...]:
        """The content's other sources (byte-identical copies), each with its own fields when
        the stage reads them."""
        copies = getattr(self.walk.rep, "copies", None)  # a plain mapping has no copies
        rels = copies(sha) if copies is not None else ()
        if not rels:
            return ()
        if not self.stage.uses_source_fields:
            return tuple((rel, _NOTHING) for rel in rels)
        title = ContentValues(self.walk, sha).get("file_title")
        return tuple((rel, source_fields(rel, title, self.metadata)) for rel in rels)


class WalkMember(Member):
    """Member ``i`` of a corpus step (``StepMembers``): its ``id`` and ``sha256`` are the
    step's texts; ``artifacts``, ``meta``, ``values`` (a ``ContentValues``, read-only) and
    ``source`` (the content's first source, ``Walk.rep``) are made on each read, not held."""

    __slots__ = ("_members",)

    def __init__(self, members: StepMembers, i: int):
        self.id, self.sha256, self._members = members.ids[i], members.alive[i], members
        self.outputs = ()  # a walk's member has no outputs

    @property
    def source(self) -> str:  # type: ignore[override]
        return self._members.walk.rep[self.sha256]

    @property
    def values(self) -> Mapping[str, Any]:  # type: ignore[override]
        return ContentValues(self._members.walk, self.sha256)

    @property
    def artifacts(self) -> MutableMapping:  # type: ignore[override]
        return self._members.artifacts(self.sha256)

    @property
    def meta(self) -> Mapping[str, Any]:  # type: ignore[override]
        return self._members.meta(self.sha256)

    @property
    def copies(self) -> tuple[tuple[str, Mapping[str, Any]], ...]:  # type: ignore[override]
        return self._members.copies(self.sha256)


_NAMES: dict[tuple[str, ...], tuple[str, ...]] = {}  # the distinct name tuples, shared
_MISSING = object()
_NOTHING: Mapping[str, Any] = MappingProxyType({})  # one read-only empty mapping, shared
