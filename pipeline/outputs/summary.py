"""summary.json: counts per stage and reason, split counts and ratios, timings, options
fingerprints, warnings."""
from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from ..store.codec import json_default
from ..store.atomic import write_atomic
from .files import DEFAULT_PART, Placed

def configured_parts(stages: list) -> list[str]:
    """The parts a run writes, in the config's order: those of the stage that assigns parts
    (``Stage.parts``: the split's ratios), or the one ``DEFAULT_PART`` without one."""
    for s in stages:
        parts = s.parts()
        if parts is not None:
            return parts
    return [DEFAULT_PART]


def run_warnings(files: int, kept: int, part_files: dict[str, int], parts: list[str]) -> list[str]:
    """What a user must not miss although the run succeeded (exit 0): nothing in, nothing
    kept, a configured part left empty."""
    if files == 0:
        return ["the input folder holds no .mid, .midi, .kar or .rmi file: nothing was done"]
    if kept == 0:
        return ["no file was kept: every file was dropped (see the table above, or summary.json)"]
    return [f"part '{p}' is empty: no kept file was placed in it (too few groups for its ratio?)"
            for p in parts if not part_files.get(p)]


def build_summary(facts: Any, contents: int, walk: Any, stages: list, timings: dict, computed: int,
                  reused: int, placed: Placed, cfg: Any) -> dict[str, Any]:
    """summary.json: counts per stage and reason, split counts and ratios, timings, fingerprints
    (``facts``: the counts of the manifest's rows, ``page.Facts``; ``contents``: distinct
    contents among the files)."""
    per_stage: dict[str, dict[str, Any]] = {}
    for s in stages:
        per_stage[s.name] = {"reached": facts.reached.get(s.name, 0), "dropped": {}}
    for (stage, reason), n in sorted(facts.dropped_by.items()):
        d = per_stage.setdefault(stage, {"reached": 0, "dropped": {}})["dropped"]
        d[reason] = d.get(reason, 0) + n
    configured = configured_parts(stages)
    every_part = sorted({*configured, *facts.parts, *placed.parts})
    part_counts = {p: facts.parts.get(p, 0) for p in every_part}  # an empty part counts 0
    total_kept = max(1, facts.kept)
    split_info = {"files": part_counts,
                  "outputs": {p: len(placed.parts.get(p, ())) for p in every_part},
                  "ratios": {p: round(n / total_kept, 6) for p, n in sorted(part_counts.items())}}
    counts = {"files": facts.files, "kept": facts.kept, "dropped": facts.files - facts.kept,
              "contents": contents, "computed": computed, "reused": reused}
    summary = {
        "counts": counts,
        "warnings": run_warnings(facts.files, facts.kept, part_counts, configured),
        "stages": per_stage,
        "split": split_info,
        "notes": walk.notes,
        "timings_s": {k: round(v, 4) for k, v in timings.items()},
        "fingerprints": {s.name: s.fingerprint for s in stages},
        "options": {s.name: s.opts for s in stages},
        "input": str(cfg.input), "output": str(cfg.output),
    }
    for s in stages:
        s.add_to_summary(summary, walk.states.get(s.name, {}))
    return summary


#: Most skipped input entries summary.json names (all are counted; the ledger keeps every one,
#: for ``explain``).
SKIPPED_LISTED = 1000


def skipped_summary(skipped: list[tuple[str, str]]) -> dict[str, Any]:
    """summary.json's ``skipped``: the entries the listing of the input left out
    (``SourceTable.skipped``: path, why), counted, the first ``SKIPPED_LISTED`` named."""
    return {"count": len(skipped),
            "listed": [{"source": rel, "why": why} for rel, why in skipped[:SKIPPED_LISTED]]}


def write_summary(out_dir: Path, summary: dict, *, fsync: bool = True) -> None:
    """Write summary.json (atomically; ``fsync=False`` where losing it to a power cut loses
    nothing but fresh timings)."""
    write_atomic(out_dir / "summary.json", json.dumps(summary, indent=2, sort_keys=True, default=json_default) + "\n",
                 fsync=fsync)
