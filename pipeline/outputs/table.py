"""What a run did, as the table ``midisift run`` prints (no numpy: the nothing-changed check
prints it too)."""
from __future__ import annotations

import os
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable

from ..similarity.grouping import FOLDER_MIN, FOLDER_SHARE, folders_mostly_pieces


def stdout_gone() -> None:
    """Standard output's reader stopped reading (``| head``): not an error. The descriptor is
    pointed at /dev/null, so nothing written later, the interpreter's last flush included,
    fails on it."""
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, sys.stdout.fileno())
    os.close(devnull)


def in_part_order(counts: dict[str, int], configured: Iterable[str] | None) -> dict[str, int]:
    """Per-part counts in the order the config names the parts (others after, sorted), so a
    run and the nothing-changed check that follows it print the parts alike."""
    order = [p for p in (configured or ()) if p in counts]
    return {p: counts[p] for p in order + sorted(p for p in counts if p not in order)}


#: The table's line for a split that did not group near-duplicates.
GROUPING_OFF = ("split  near-duplicate grouping OFF (group_threshold: null): near-duplicates "
                "may sit in different parts")


def split_lines(split_summary: dict | None) -> list[str]:
    """The table's lines on how the split grouped files, read from its summary (summary.json's
    ``split.stage``): near-duplicate grouping turned off (``group_threshold: null``), files
    tied by folder (``group_by_folder``, and what ``auto`` found)."""
    if not split_summary:
        return []
    lines = [GROUPING_OFF] if split_summary.get("near_duplicate_grouping") is False else []
    rule = folder_rule_text(split_summary.get("group_by_folder"))
    if rule:
        lines.append(f"split  {rule}")
    return lines


def folder_rule_text(rule: dict | None) -> str | None:
    """What the split's ``group_by_folder`` did (summary.json's ``split.stage.group_by_folder``),
    as a sentence; None when it tied no files by folder and ``auto`` did not judge the layout
    (another option, grouping by the notes off)."""
    applied = (rule or {}).get("applied")
    if isinstance(applied, dict):  # per top-level folder (grouping.FolderLayout.collections)
        found = rule.get("collections", {})
        each = "; ".join(f"{top}/ at depth {d} ({found.get(top, {}).get('share', 0):.1%} of the files in "
                         f"{found.get(top, {}).get('folders')} folders)" for top, d in sorted(applied.items()))
        return (f"files under the same folder share a part within {len(applied)} top-level "
                f"folder{'s' if len(applied) != 1 else ''} laid out one folder per piece (group_by_folder: "
                f"auto: not the input as a whole, at best {rule.get('share', 0):.1%} of its files in their "
                f"folder's largest near-duplicate group; {each})")
    if not applied:
        if (rule or {}).get("option") != "auto" or rule.get("judged_depth") is None:
            return None
        if rule.get("folders", 0) < FOLDER_MIN:
            why = f"fewer than {FOLDER_MIN} folders hold two or more files"
        else:
            why = (f"at best {rule.get('share', 0):.1%} of the files in {rule.get('folders')} folders "
                   f"of two or more lie in their folder's largest near-duplicate group, below "
                   f"{FOLDER_SHARE:.0%}")
            if folders_mostly_pieces(rule):
                why += (f"; yet {rule['alike']} of those {rule['folders']} folders hold one piece "
                        "each: see the warning")
        return f"folders are not taken as pieces (group_by_folder: auto: {why})"
    where = ("the same folder" if applied is True else "the same top-level folder" if applied == 1
             else f"the same first {applied} folder levels")
    if rule.get("option") == "auto":
        return (f"files under {where} share a part (group_by_folder: auto: {rule.get('share', 0):.1%} "
                f"of the files in {rule.get('folders')} folders of two or more lie in their folder's "
                "largest near-duplicate group)")
    return f"files under {where} share a part (group_by_folder: {applied})"


@dataclass
class RunReport:
    """What a run did: counts per stage and reason, timings, where outputs went."""

    output: Path
    files: int
    kept: int
    dropped: dict[tuple[str, str], int]
    timings: dict[str, float]
    computed: int
    cached: int
    parts: dict[str, int]
    notes: list[str]
    warnings: list[str] = field(default_factory=list)
    split_lines: list[str] = field(default_factory=list)  # ``split_lines``

    def table(self) -> str:
        drops = [(f"dropped  {stage} / {reason}", n)
                 for (stage, reason), n in sorted(self.dropped.items(), key=lambda kv: (-kv[1], kv[0]))]
        parts = [(f"split  {part}", n) for part, n in self.parts.items()]
        # the label column fits the longest label (a long reason code or part name)
        w = max([34] + [len(label) + 2 for label, _ in drops + parts])
        lines = [f"{'files in':<{w}}{self.files:>8}", f"{'kept':<{w}}{self.kept:>8}"]
        lines += [f"{label:<{w}}{n:>8}" for label, n in drops + parts]
        lines.extend(self.split_lines)
        lines.append(f"{'contents decoded / reused':<{w}}{self.computed:>8} / {self.cached}")
        lines.append(f"{'seconds':<{w}}{self.timings.get('total', 0.0):>8.2f}")
        lines.append(f"output: {self.output}")
        lines.extend(f"warning: {w}" for w in self.warnings)
        lines.extend(self.notes)
        return "\n".join(lines)
