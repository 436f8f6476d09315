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
from dataclasses import dataclass, field
from json.encoder import encode_basestring_ascii as _json_string
from typing import Any, Callable

from ..metadata import Metadata
from ..outputs.manifest import source_fields
from ..stages import CorpusState, Member, Stage
from ..store.codec import canonical_json, thresholds_json
from ..store.ledger import Ledger
from ..store.records import Compactor, TrailValues


class StageWalk:
    """One run's stage walk; ``run`` does it. ``compactor(stage)`` gives the stage's maker of
    compact records, ``bar(label, total)`` a progress bar, ``chains[stage]`` the fingerprint of
    the stage and every stage before it (the key of its stored last-run results)."""

    def __init__(self, stages: list[Stage], metadata: Metadata | None, compactor: Callable[[str], Compactor],
                 bar: Callable[..., Any], chains: dict[str, str], *, fresh: bool, reassign: bool):
        self.stages = stages
        self.metadata = metadata
        self.compactor = compactor
        self.bar = bar
        self.chains = chains
        self.fresh = fresh
        self.reassign = reassign

    def run(self, ledger: Ledger, rep: dict[str, str], cache: dict, timings: dict,
            staged: dict[str, tuple[str, ...]]) -> "Walk":
        """Apply the stages in order to the contents ``rep`` (sha256 -> first source): per-file
        verdicts from ``cache`` (stage -> sha256 -> record), corpus stages run here."""
        names = [st.name for st in self.stages]
        walk = Walk(staged=staged, stage_names=names, metadata=self.metadata)
        alive = list(rep)  # contents in first-source order (sorted paths)
        # memory: a trail holds the cached result records themselves (no copies, no merged
        # values dict per file); trail_of and value_of build what a reader needs one file at a time
        trails: dict[str, list] = {sha: [] for sha in rep}
        upstream: dict[str, dict[str, Any]] = {}  # stage -> id -> Result (reads like StageResult)
        for st in self.stages:
            t = time.perf_counter()
            if st.kind == "file":
                survivors = []
                stage_cache = cache[st.name]
                for sha in alive:
                    r = stage_cache.get(sha)
                    if r is None:  # cannot happen unless a worker died; keep the file's trail honest
                        r = self.compactor(st.name).make(
                            False, "decoder_crash", "the worker processing this file did not "
                            "return a result", {}, {})
                    elif st.uses_source_fields and r["kept"]:
                        r = self._source_verdict(st, r, trails[sha], rep[sha])
                    trails[sha].append(r)
                    if r["kept"]:
                        survivors.append(sha)
                    else:
                        walk.status[sha] = (st.name, r["reason"])
                alive = survivors
            else:
                # speed, memory: the large per-file arrays a stage compares only in pairs stay
                # in the ledger until compared (Stage.deferred_artifacts); the others are held
                # as columns, each member's artifacts a row of them
                arts = (ledger.artifact_columns(st.name, st.artifact_fingerprint, alive,
                                                defer=st.deferred_artifacts)
                        if st.has_prepare() else None)
                members = []
                for i, sha in enumerate(alive):
                    values = TrailValues(trails[sha])
                    meta = (source_fields(rep[sha], values.get("file_title"), self.metadata)
                            if st.uses_source_fields else {})
                    members.append(Member(sha[:16], sha, rep[sha], values,
                                          {st.name: arts.row(i) if arts is not None else {}}, meta=meta))
                del arts
                for prev in st.reads_from():  # the earlier corpus stages' artifacts it reads
                    res = walk.artifacts.get(prev, {})
                    for m in members:
                        if m.sha256 in res:
                            m.artifacts[prev] = res[m.sha256]
                walk.artifacts[st.name] = {m.sha256: m.artifacts[st.name] for m in members}
                saved = ledger.state_for(st.name)
                last = None  # the last run's results of this stage, when it stored them
                if not self.fresh and saved.get(CORPUS_RESULTS) == self.chains[st.name]:
                    last = _last_results(ledger, st.name, st.fingerprint, self.compactor(st.name))
                state = CorpusState(saved, upstream, {"fresh": self.fresh, "reassign": self.reassign,
                                                      "previous_results": last})
                bar = self.bar(f"{st.name} (corpus)", len(members))
                res = st.run_corpus(members, state) if members else {}
                mids = [m.id for m in members]  # memory: the members' id strings, not new ones
                del members
                bar.update(len(alive))
                bar.close()
                walk.states[st.name] = {**state.current, CORPUS_RESULTS: self.chains[st.name]}
                walk.notes.extend(state.notes)
                survivors = []
                make = self.compactor(st.name).make
                keep = make(True, None, "", {}, {})
                compact: dict[str, Any] = {}
                # the contents whose result this run computed (to store; the record is the
                # last of the content's trail: memory, no (sha, record) pair per file)
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
                    trails[sha].append(rec)
                    if rec.kept:
                        survivors.append(sha)
                    else:
                        walk.status[sha] = (st.name, rec.reason)
                # memory: later stages read this stage's verdicts as the compact records (same
                # attributes as StageResult), and a dropped file's artifacts are let go
                upstream[st.name] = compact
                # all rows anew, or (when some were reused) only the new ones
                walk.corpus_rows[st.name] = (len(new_rows) == len(alive), new_rows)
                del res, mids
                gone = set(alive) - set(survivors)
                for arts_of in walk.artifacts.values():
                    for sha in gone:
                        arts_of.pop(sha, None)
                alive = survivors
            timings[f"stage:{st.name}"] = time.perf_counter() - t
        walk.artifacts.clear()  # memory: signatures and shingles are not needed after the walk
        for sha in alive:
            walk.status[sha] = None
        walk.trails = trails
        walk.byte_copy_judge = next((st for st in self.stages if st.judges_byte_copies), None)
        walk.rep = rep
        return walk

    def _source_verdict(self, st: Stage, kept: Any, trail: list, source: str) -> Any:
        """The stage's verdict on the source's own fields (metadata, title); a drop replaces
        the content's kept result in this run's trail only (it is never stored as the
        content's result: another path may hold the same bytes)."""
        file_title = TrailValues(trail).get("file_title")
        drop = st.source_verdict(source_fields(source, file_title, self.metadata))
        if drop is None:
            return kept
        values = {**kept.values, **drop.values}
        return self.compactor(st.name).make(False, drop.reason, drop.detail, values,
                                             {**kept.thresholds, **drop.thresholds})



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

    ``trails[sha]`` lists the content's results (``pipeline.store.records.Result``: ``kept``,
    ``reason``, ``detail``, ``values``, ``thresholds``) in stage order, one per stage it
    reached; ``stage_names`` names them. They are the result cache's own records."""

    staged: dict[str, tuple[str, ...]] = field(default_factory=dict)  # sha -> staged suffixes
    #: corpus stage -> (replace all stored rows, [sha] whose record this run computed: the
    #: stage's step of the content's trail, ``corpus_record``)
    corpus_rows: dict[str, tuple[bool, list]] = field(default_factory=dict)
    status: dict[str, tuple[str, str] | None] = field(default_factory=dict)
    trails: dict[str, list] = field(default_factory=dict)
    artifacts: dict[str, dict[str, dict]] = field(default_factory=dict)
    states: dict[str, dict] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    #: the stage that judges byte-identical copies (``Stage.judges_byte_copies``), if any
    byte_copy_judge: Any = None
    rep: dict[str, str] = field(default_factory=dict)
    metadata: Any = None  # the config's metadata table (``pipeline.metadata``)
    stage_names: list[str] = field(default_factory=list)

    @property
    def byte_copy_stage(self) -> str | None:
        return self.byte_copy_judge.name if self.byte_copy_judge is not None else None

    def is_byte_copy(self, rel: str, sha: str) -> bool:
        """A source whose bytes equal an earlier source's (it is not the representative)."""
        return self.rep.get(sha) != rel

    def corpus_record(self, stage: str, sha: str) -> Any:
        """The record a corpus stage gave a content in this run (its step of the trail)."""
        return self.trails[sha][self.stage_names.index(stage)]

    def value_of(self, sha: str, key: str, default: Any = None) -> Any:
        """One value of a content's trail (the latest stage that set it)."""
        return TrailValues(self.trails.get(sha, ())).get(key, default)

    def _reached(self, sha: str, stage: str) -> int | None:
        """Position of ``stage`` in the content's trail, or None when it did not reach it."""
        try:
            i = self.stage_names.index(stage)
        except ValueError:
            return None
        return i if i < len(self.trails.get(sha, ())) else None

    def reached_names(self, rel: str, sha: str) -> list[str]:
        """The stages this source's trail (``trail_of``) has a step for."""
        n = len(self.trails.get(sha, ()))
        if self.byte_copy_stage and self.is_byte_copy(rel, sha):
            idx = self._reached(sha, self.byte_copy_stage)
            if idx is not None:
                n = idx + 1
        return self.stage_names[:n]

    def trail_of(self, rel: str, sha: str) -> list:
        """The trail of one source, each step with its ``stage`` name: its content's, cut at
        dedup for a byte-identical copy."""
        trail = [{"stage": name, "kept": r.kept, "reason": r.reason, "detail": r.detail,
                  "values": r.values, "thresholds": r.thresholds}
                 for name, r in zip(self.stage_names, self.trails.get(sha, ()))]
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
            for name, r in zip(self.stage_names, self.trails.get(sha, ()))]
        return "[" + ",".join(steps) + "]"

    def final(self, rel: str, sha: str) -> tuple[str, str] | None:
        """(stage, reason) that dropped this source, or None when kept. A byte-identical copy
        that reached the judging stage ends there, with its ``byte_copy_verdict``."""
        if self.byte_copy_stage and self.is_byte_copy(rel, sha):
            idx = self._reached(sha, self.byte_copy_stage)
            if idx is not None:
                # the judging step of ``trail_of`` alone (speed: the other steps' values may be
                # read back from the ledger)
                r = self.trails[sha][idx]
                step = self.byte_copy_judge.byte_copy_verdict(self.rep[sha], sha, {
                    "stage": self.stage_names[idx], "kept": r.kept, "reason": r.reason,
                    "detail": r.detail, "values": r.values, "thresholds": r.thresholds})
                return (step["stage"], step["reason"])
        return self.status.get(sha)


