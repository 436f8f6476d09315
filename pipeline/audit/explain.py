"""``midisift explain``: the whole decision trail of one file, from the ledger of an output folder."""
from __future__ import annotations

import json
import os
import re
from pathlib import Path
from typing import Any

from ..engine.sources import MIDI_SUFFIXES
from ..errors import UsageError
from ..outputs.table import folder_rule_text
from ..printed import digits_apart, number
from ..store.ledger import Ledger


#: Significant digits of a value printed on its own.
DIGITS = 4


def _fmt(value: Any, digits: int = DIGITS) -> str:
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_fmt(v, digits) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k}: {_fmt(v, digits)}" for k, v in value.items()) + "}"
    return "null" if value is None else number(value, digits)


def _limit_numbers(limit: Any) -> list[Any]:
    """The numbers a value is held against in one of ``_threshold_text``'s limits."""
    if isinstance(limit, dict):
        return list(limit.values())
    return list(limit) if isinstance(limit, (list, tuple)) else [limit]


def _threshold_text(limit: Any, digits: int = DIGITS) -> str:
    if isinstance(limit, dict):
        words = {"min": ">=", "low": ">=", "gt": ">", "max": "<=", "high": "<=", "lt": "<"}
        order = sorted(limit, key=lambda k: (list(words).index(k) if k in words else len(words), k))
        parts = [f"{words.get(k, k)} {_fmt(limit[k], digits)}" for k in order if limit[k] is not None]
        return ", ".join(parts) if parts else "no limit"
    if isinstance(limit, (list, tuple)) and len(limit) == 2:
        return f"within [{_fmt(limit[0], digits)}, {_fmt(limit[1], digits)}]"
    return _fmt(limit, digits)


def resolve(ledger: Ledger, query: str, input_dir: Path | None) -> list[tuple[str, str | None, list]]:
    """Find the decisions matching a source path (as given, or relative to the input folder) or an id."""
    hit = ledger.decision(query)
    if hit is not None:
        return [(query, *hit)]
    for c in _candidates(query, input_dir):
        hit = ledger.decision(c)
        if hit is not None:
            return [(c, *hit)]
    if re.fullmatch(r"[0-9a-fA-F]{6,64}", query):
        return ledger.decisions_by_sha_prefix(query.lower())
    return []


def _candidates(query: str, input_dir: Path | None) -> list[str]:
    """The source paths a query may name besides itself: relative to the input folder, as given."""
    candidates = []
    p = Path(query)
    if input_dir is not None:
        top = input_dir.resolve()
        # links resolved, then as written (a path through a link the run did not follow)
        for full in (p.resolve(), Path(os.path.abspath(p))):
            try:
                candidates.append(full.relative_to(top).as_posix())
            except ValueError:
                pass
        candidates.append(p.as_posix())
    return list(dict.fromkeys(candidates))


def skipped(ledger: Ledger, query: str, input_dir: Path | None) -> tuple[str, str] | None:
    """(path, why) when the last run left the queried path, or a folder holding it, out as it
    listed the input (``Ledger.skipped_why``), else None."""
    for c in dict.fromkeys([query, *_candidates(query, input_dir)]):
        c = c.rstrip("/")
        for path in [c, *(f"{parent.as_posix()}" for parent in Path(c).parents if parent.as_posix() != ".")]:
            for key in (path, path + "/"):
                why = ledger.skipped_why(key)
                if why is not None:
                    return key, why
    return None


def in_input(query: str, input_dir: Path | None) -> tuple[str, Path] | None:
    """(path relative to the input folder, full path) of the entry the query names there now,
    or None (no input folder known, or nothing there by that name)."""
    if input_dir is None or not input_dir.is_dir():
        return None
    for c in _candidates(query, input_dir):
        full = input_dir / c
        if not Path(c).is_absolute() and ".." not in Path(c).parts and (full.exists() or full.is_symlink()):
            return c, full
    return None


def not_found(query: str, input_dir: Path | None, out_dir: Path) -> str:
    """Why the last run has no trail of what ``query`` names, from what the input folder holds
    now: a file not listed because of its name (an audit found it told, as a path that does not
    exist, "no such file in the last run"), one added since, a folder, or nothing at all."""
    where = in_input(query, input_dir)
    listed = " ".join(MIDI_SUFFIXES)
    if where is not None:
        rel, full = where
        if out_dir.resolve() in full.resolve().parents:
            return f"in the output folder {out_dir}, which the run does not read"
        if full.is_dir():
            return (f"a folder of the input ({rel}/): explain takes one of its files (the manifest's "
                    "'source' column lists them)")
        if not rel.lower().endswith(MIDI_SUFFIXES):
            suffix = Path(rel).suffix
            return (f"not read: the run lists only the files named {listed} (in any case), and this "
                    f"one {f'ends in {suffix}' if suffix else 'has no extension'}; rename it to have it read")
        return ("not in the last run, though it is in the input folder now: it was added or renamed "
                "since (run again to have it judged)")
    hint = ("give the path as in the manifest's 'source', a path under the input folder, or an id "
            "of at least 6 hex digits")
    if input_dir is not None and input_dir.is_dir() and not re.fullmatch(r"[0-9a-fA-F]{6,64}", query):
        return (f"no such file in the last run, nor in its input folder now (a file removed before "
                f"the last run is not known to it: its ledger keeps the files of that run only; {hint})")
    return f"no such file in the last run ({hint})"


def _mates(out_dir: Path, wanted: dict[str, Any]) -> dict[str, list[dict]]:
    """For each field of ``wanted`` (``cluster``: a dedup cluster, ``group``: a split group),
    the manifest rows holding its value; the manifest read once."""
    manifest = out_dir / "manifest.jsonl"
    wanted = {k: v for k, v in wanted.items() if v is not None}
    found: dict[str, list[dict]] = {k: [] for k in wanted}
    if not wanted or not manifest.is_file():
        return found
    # speed: a line is parsed only when it holds one of the values as JSON writes it (a scale
    # audit: every line parsed, each explain took a third of a second at 26,505 files)
    needles = [json.dumps(v, ensure_ascii=False) for v in wanted.values()]
    with open(manifest, encoding="utf-8") as fh:
        for line in fh:
            if not any(n in line for n in needles):
                continue
            row = json.loads(line)
            for field, value in wanted.items():
                if row.get(field) == value:
                    found[field].append(row)
    return found


def _folder_rule(out_dir: Path) -> str | None:
    """How the split read the input's folders in the last run (summary.json), when it tied
    files by folder; None otherwise."""
    try:
        rule = json.loads((out_dir / "summary.json").read_text(encoding="utf-8"))["split"]["stage"]["group_by_folder"]
    except (OSError, ValueError, KeyError, TypeError):
        return None
    return folder_rule_text(rule)


def explain(out_dir: Path, query: str, *, as_json: bool = False) -> str:
    """The printable trail (or, ``as_json``, the same trail as a JSON list: one object per
    matching source with ``source``, ``id``, ``sha256``, ``status``, ``stage``, ``reason`` and
    its ``trail`` of stage steps); raises UsageError (exit 2) for a folder without a run's
    ledger or a file that is not in it."""
    db = out_dir / "state.sqlite"
    if not db.is_file():
        raise UsageError("no state.sqlite here: run 'midisift run CONFIG' first or pass --output",
                            file=str(out_dir))
    with Ledger(db, read_only=True) as ledger:
        last = ledger.last_run()
        input_dir = None
        if last is not None:
            raw = last["config"].get("config", {})
            if isinstance(raw, dict) and raw.get("input"):
                input_dir = Path(raw["input"])
        hits = resolve(ledger, query, input_dir)
        left_out = None if hits else skipped(ledger, query, input_dir)
    if left_out is not None:
        path, why = left_out
        if as_json:
            return json.dumps([{"source": path, "status": "skipped", "why": why}], indent=1,
                              ensure_ascii=False)
        inside = (f" (it lies in {path})" if path.endswith("/") and
                  not query.rstrip("/").endswith(path.rstrip("/")) else "")
        return (f"{query}{inside}: skipped when the last run listed the input folder, so it has "
                f"no manifest row: {why}")
    if not hits:
        raise UsageError(not_found(query, input_dir, out_dir), file=query)
    if as_json:
        return json.dumps([_as_data(src, sha, trail) for src, sha, trail in hits], indent=1,
                          ensure_ascii=False)
    return "\n\n".join(_one(out_dir, src, sha, trail, input_dir) for src, sha, trail in hits)


def _as_data(source: str, sha: str | None, trail: list) -> dict:
    """One source's trail as data: the same steps the text shows, and its verdict."""
    final = next((s for s in trail if not s["kept"]), None)
    return {"source": source, "id": (sha or "")[:16], "sha256": sha,
            "status": "kept" if final is None else "dropped",
            "stage": final and final["stage"], "reason": final and final["reason"],
            "trail": trail}


#: The stage whose step names a file's mates by each field (``_mates``).
_MATES_OF = {"cluster": "dedup", "group": "split"}


def _one(out_dir: Path, source: str, sha: str | None, trail: list, input_dir: Path | None = None) -> str:
    lines = [f"source   {source}", f"id       {(sha or '')[:16]}", f"sha256   {sha}"]
    if input_dir is not None and input_dir.is_dir() and not (input_dir / source).exists():
        lines.append("note     no longer in the input folder (removed or renamed since the last run): "
                     "this is that run's verdict")
    final = next((s for s in trail if not s["kept"]), None)
    if final is None:
        split = next((s["values"].get("split") for s in trail if s["stage"] == "split"), None)
        lines.append(f"status   kept{' in ' + split if split else ''}")
    else:
        lines.append(f"status   dropped by {final['stage']}: {final['reason']}")
        lines.append(f"why      {final['detail']}")
    mates = _mates(out_dir, {field: step.get("values", {}).get(field) for step in trail
                             for field in ("cluster", "group") if step["stage"] == _MATES_OF[field]})
    for step in trail:
        verdict = "kept" if step["kept"] else f"DROPPED ({step['reason']})"
        lines.append("")
        lines.append(f"[{step['stage']}] {verdict}")
        if step.get("detail"):
            lines.append(f"    {step['detail']}")
        thresholds = step.get("thresholds", {}) or {}
        for key, value in step.get("values", {}).items():
            limit = ""
            digits = DIGITS
            if key in thresholds:  # a value printed apart from each limit it is held against
                digits = digits_apart(value, _limit_numbers(thresholds[key]), DIGITS)
                limit = f"   (limit: {_threshold_text(thresholds[key], digits)})"
            lines.append(f"    {key:<20} {_fmt(value, digits)}{limit}")
        if step["stage"] == "split":
            members = mates.get("group", [])
            if len(members) > 1:
                contents = len({m["id"] for m in members})
                counted = (f"{len(members)} files, {contents} contents: byte-identical files share "
                           "an id and count once in group_size" if contents < len(members)
                           else f"{len(members)}")
                lines.append(f"    group members ({counted}): near-duplicates at the group "
                             "threshold, dedup cluster-mates and the ties the split was given")
                for m in members:
                    lines.append(f"      {m['id']}  {m['source']}  ({m.get('split')})")
            rule = _folder_rule(out_dir)
            if rule:
                lines.append(f"    {rule}")
        if step["stage"] == "dedup":
            members = mates.get("cluster", [])
            if len(members) > 1:
                contents = len({m["id"] for m in members})
                counted = (f"{len(members)} files, {contents} contents: byte-identical files share "
                           "an id and count once in cluster_size" if contents < len(members)
                           else f"{len(members)}")
                lines.append(f"    cluster members ({counted}):")
                for m in members:
                    role = "kept" if m["status"] == "kept" or m.get("stage") != "dedup" else \
                        f"dropped, similarity {_fmt(m.get('similarity'))}"
                    if m["status"] == "dropped" and m.get("stage") != "dedup":
                        role = f"dropped later by {m['stage']}"
                    lines.append(f"      {m['id']}  {m['source']}  ({role})")
    return "\n".join(lines)
