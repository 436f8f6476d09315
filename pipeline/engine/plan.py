"""Planning the per-file pass: which contents need a worker, and what each must compute.

A content needs a task when a per-file stage's verdict is missing from the result cache (or is
a fault that ``--retry-failed`` retries), when a corpus stage's ``prepare`` artifacts are
missing, or when it will probably be kept and has no normalized output yet. A rerun's known
files need none, and no plan objects are built for them.
"""
from __future__ import annotations

from typing import Any, Container

from ..reasons import is_fault
from ..stages import Stage
from .worker import FileTask, StagePlan


class Everything:
    """The artifact keys of a corpus stage without a prepare step: every content has them."""

    def __contains__(self, sha: object) -> bool:
        return True


class Planner:
    """Builds the tasks of one run. ``cache``: per-file stage -> its cached verdicts
    (``records.Verdicts``);
    ``artifacts``: corpus stage -> the contents whose ``prepare`` artifacts are stored;
    ``has_output``: the contents with a normalized output in place or staged;
    ``last_status``: sha256 -> "kept"/"dropped" in the last run."""

    def __init__(self, stages: list[Stage], cache: dict[str, dict], artifacts: dict[str, Container[str]],
                 has_output: Container[str], last_status: dict[str, str], *, staging: str,
                 output_fp: str, retry_failed: bool):
        self.stages = stages
        self.cache = cache
        # sha256 -> content index of the verdict columns (``records.Verdicts``), shared by them
        self.index = next(iter(cache.values())).index if cache else {}
        self.artifacts = artifacts
        self.has_output = has_output
        self.last_status = last_status
        self.staging = staging
        self.output_fp = output_fp
        self.retry_failed = retry_failed
        # memory: plans without a cached result are the same for every file, so tasks share them
        self._common: dict[tuple[str, bool], StagePlan] = {}

    def _shared(self, st: Stage, compute: bool) -> StagePlan:
        key = (st.name, compute)
        if key not in self._common:
            self._common[key] = StagePlan(st.name, st.opts, st.kind, compute, fingerprint=st.fingerprint)
        return self._common[key]

    def task(self, sha: str, rel: str, path: str) -> FileTask:
        """The task of one content that ``needs_work``."""
        plans: list[StagePlan] = []
        uncertain = False
        fate_known_dropped = False
        for st in self.stages:
            if st.kind == "corpus":
                plans.append(self._shared(st, sha not in self.artifacts[st.name]))
                continue
            cached = self._cached(st, sha)
            if cached is None:
                plans.append(self._shared(st, True))
                uncertain = True
                continue
            plans.append(StagePlan(st.name, st.opts, st.kind, False, cached, st.fingerprint))
            if not cached["kept"] and not uncertain:
                fate_known_dropped = True
                break
        # render the normalized output now when the file will probably be kept
        render = None
        if not fate_known_dropped and self._wants_output(sha):
            render = self.staging
        return FileTask(sha, str(path), rel, plans, render, self.output_fp)

    def needs_work(self, sha: str) -> bool:
        """Whether this content needs a task (see the module docstring)."""
        for st in self.stages:
            if st.kind == "corpus":
                if sha not in self.artifacts[st.name]:
                    return True
                continue
            kept = self.cache[st.name].kept_at(self.index[sha])  # speed: no record made
            if kept is None or (self.retry_failed and not kept and self._cached(st, sha) is None):
                return True
            if not kept:
                return False  # dropped by a cached verdict: nothing after it is needed
        return self._wants_output(sha)

    def render_task(self, sha: str, rel: str, path: str) -> FileTask:
        """A task that only renders a kept content's outputs (every verdict cached)."""
        plans = [StagePlan(st.name, st.opts, st.kind, False, self.cache.get(st.name, {}).get(sha),
                           st.fingerprint) for st in self.stages]
        return FileTask(sha, str(path), rel, plans, self.staging, self.output_fp)

    def _cached(self, st: Stage, sha: str) -> Any:
        cached = self.cache[st.name].get(sha)
        if cached is not None and self.retry_failed and is_fault(cached):
            return None
        return cached

    def _wants_output(self, sha: str) -> bool:
        return sha not in self.has_output and self.last_status.get(sha, "kept") == "kept"
