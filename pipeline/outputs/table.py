"""What a run did, as the table ``midisift run`` prints (no numpy: the nothing-changed check
prints it too)."""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable


def in_part_order(counts: dict[str, int], configured: Iterable[str] | None) -> dict[str, int]:
    """Per-part counts in the order the config names the parts (others after, sorted), so a
    run and the nothing-changed check that follows it print the parts alike."""
    order = [p for p in (configured or ()) if p in counts]
    return {p: counts[p] for p in order + sorted(p for p in counts if p not in order)}


def grouping_off(split_summary: dict | None) -> bool:
    """Whether the split of a run did not group near-duplicates (``group_threshold: null``),
    read from its summary (summary.json's ``split.stage``)."""
    return bool(split_summary) and split_summary.get("near_duplicate_grouping") is False


#: The table's line for a split that did not group near-duplicates.
GROUPING_OFF = ("split  near-duplicate grouping OFF (group_threshold: null): near-duplicates "
                "may sit in different parts")


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
    grouping_off: bool = False

    def table(self) -> str:
        drops = [(f"dropped  {stage} / {reason}", n)
                 for (stage, reason), n in sorted(self.dropped.items(), key=lambda kv: (-kv[1], kv[0]))]
        parts = [(f"split  {part}", n) for part, n in self.parts.items()]
        # the label column fits the longest label (a long reason code or part name)
        w = max([34] + [len(label) + 2 for label, _ in drops + parts])
        lines = [f"{'files in':<{w}}{self.files:>8}", f"{'kept':<{w}}{self.kept:>8}"]
        lines += [f"{label:<{w}}{n:>8}" for label, n in drops + parts]
        if self.grouping_off:
            lines.append(GROUPING_OFF)
        lines.append(f"{'contents decoded / reused':<{w}}{self.computed:>8} / {self.cached}")
        lines.append(f"{'seconds':<{w}}{self.timings.get('total', 0.0):>8.2f}")
        lines.append(f"output: {self.output}")
        lines.extend(f"warning: {w}" for w in self.warnings)
        lines.extend(self.notes)
        return "\n".join(lines)
