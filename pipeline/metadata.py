"""The user's metadata table (``metadata: PATH`` in the config): a CSV keyed by source path.

Its free columns (composer, licence, source, collection ...) are copied into each file's
manifest row and can tie files together in the split (``group_fields``). The first column
named ``source`` holds the path as the manifest's ``source`` writes it (relative to the input
folder, "/"-separated). A ``title`` column overrides the title read from the file.

Strict where a mistake would silently change a split: a missing ``source`` column, a row
naming a path twice, or a malformed CSV is a config error naming the row; rows naming no
input file are reported as a warning (the table may cover a larger collection).
No numpy here: the nothing-changed check hashes the table.
"""
from __future__ import annotations

import csv
import hashlib
from dataclasses import dataclass, field
from collections.abc import Container
from pathlib import Path

from .errors import ConfigError

#: The column holding the source path.
KEY = "source"
#: Manifest fields a column may not replace (the record of what the run did).
RESERVED = frozenset({
    "id", "sha256", "status", "stage", "reason", "detail", "tonic", "tonic_pc", "mode",
    "key_confidence", "meter", "meter_source", "transpose", "duration_s", "notes", "notes_per_s",
    "cluster", "duplicate_of", "similarity", "split", "output", "outputs"})


@dataclass
class Metadata:
    """The table: ``columns`` (without ``source``) and one dict of values per source path."""

    path: Path | None = None
    columns: tuple[str, ...] = ()
    rows: dict[str, dict[str, str]] = field(default_factory=dict)
    digest: str = ""

    def of(self, source: str) -> dict[str, str]:
        """The values of one source (empty when the table has no row for it)."""
        return self.rows.get(source, {})

    def unknown_sources(self, sources: Container[str]) -> list[str]:
        """Rows naming no input file, in table order."""
        return [s for s in self.rows if s not in sources]


def table_digest(path: Path) -> str:
    """Hash of the table's bytes (what the nothing-changed check and row reuse depend on)."""
    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except OSError:
        return "unreadable"


def load_metadata(path: str | Path) -> Metadata:
    """Read and check the table; raises ``ConfigError`` naming the file and row."""
    p = Path(path)
    try:
        data = p.read_bytes()
    except OSError as e:
        raise ConfigError(f"cannot read the metadata table ({e.strerror}); check the path in "
                          "'metadata'", file=str(p), location="metadata") from None
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        raise ConfigError(f"the metadata table is not UTF-8 text (byte {e.start}); save it as "
                          "UTF-8 CSV", file=str(p)) from None
    reader = csv.reader(text.splitlines(), strict=True)
    try:
        header = next(reader, None)
        if not header:
            raise ConfigError("the metadata table is empty; its first line names the columns, "
                              f"one of them '{KEY}'", file=str(p), location="line 1")
        names = [h.strip() for h in header]
        if KEY not in names:
            raise ConfigError(f"the metadata table needs a '{KEY}' column (the path as the "
                              f"manifest writes it); its columns are {', '.join(names)}",
                              file=str(p), location="line 1")
        blank = [i + 1 for i, n in enumerate(names) if not n]
        if blank:
            raise ConfigError(f"column {blank[0]} of the header has no name", file=str(p), location="line 1")
        twice = sorted({n for n in names if names.count(n) > 1})
        if twice:
            raise ConfigError(f"the header names {', '.join(twice)} more than once", file=str(p),
                              location="line 1")
        clash = sorted(set(names) & RESERVED)
        if clash:
            raise ConfigError(f"column(s) {', '.join(clash)} would overwrite what the run records "
                              "in the manifest; rename them (e.g. 'my_notes')", file=str(p),
                              location="line 1")
        k = names.index(KEY)
        columns = tuple(n for n in names if n != KEY)
        rows: dict[str, dict[str, str]] = {}
        first_line: dict[str, int] = {}
        for values in reader:
            line = reader.line_num
            if not any(v.strip() for v in values):
                continue
            if len(values) != len(names):
                raise ConfigError(f"the row has {len(values)} fields but the header has "
                                  f"{len(names)}; quote values that contain commas",
                                  file=str(p), location=f"line {line}")
            source = values[k].strip().replace("\\", "/")
            if not source:
                raise ConfigError(f"the '{KEY}' field is empty", file=str(p), location=f"line {line}")
            if source in rows:
                raise ConfigError(f"'{source}' has a row already (line {first_line[source]}); "
                                  "give each file one row", file=str(p), location=f"line {line}")
            first_line[source] = line
            rows[source] = {n: v.strip() for n, v in zip(names, values) if n != KEY}
    except csv.Error as e:
        raise ConfigError(f"not a valid CSV table: {e}", file=str(p),
                          location=f"line {reader.line_num}") from None
    return Metadata(p, columns, rows, hashlib.sha256(data).hexdigest())
