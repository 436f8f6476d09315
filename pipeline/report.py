"""What a run did, as the table ``midisift run`` prints (no numpy: the nothing-changed check
prints it too)."""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path


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

    def table(self) -> str:
        lines = [f"{'files in':<34}{self.files:>8}", f"{'kept':<34}{self.kept:>8}"]
        for (stage, reason), n in sorted(self.dropped.items(), key=lambda kv: (-kv[1], kv[0])):
            lines.append(f"{'dropped  ' + stage + ' / ' + reason:<34}{n:>8}")
        for part, n in self.parts.items():
            lines.append(f"{'split  ' + part:<34}{n:>8}")
        lines.append(f"{'contents decoded / reused':<34}{self.computed:>8} / {self.cached}")
        lines.append(f"{'seconds':<34}{self.timings.get('total', 0.0):>8.2f}")
        lines.append(f"output: {self.output}")
        lines.extend(self.notes)
        return "\n".join(lines)
