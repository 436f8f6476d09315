"""YAML config -> typed, validated ``Config``. Every error names its key path.

The file is loaded with ``settings.read_config`` (PyYAML's safe loader, no object construction,
refusing a key given twice). Relative ``input`` and
``output`` paths are taken relative to the current directory, as the README's commands run from
the repository root. Stage options are checked against each stage's ``options`` table: unknown
names get a "did you mean" suggestion, wrong types and out-of-range values state the rule.
"""
from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import ConfigError, ConfigErrors
from .metadata import Metadata, load_metadata
from .settings import check_overrides, parse_executor, parse_workers, read_config, with_overrides
from .stages import Stage, known_stages, stage_class

TOP_KEYS = ("input", "output", "workers", "executor", "metadata", "stages")


@dataclass
class StageConfig:
    """One entry of ``stages:``: its name, validated options and position."""

    name: str
    options: dict[str, Any]
    index: int

    def build(self) -> Stage:
        return stage_class(self.name)(self.options)


@dataclass
class Config:
    """A validated run configuration."""

    input: Path
    output: Path
    workers: int
    stages: list[StageConfig]
    path: Path | None = None
    raw: dict[str, Any] = field(default_factory=dict)
    metadata: Metadata = field(default_factory=Metadata)
    executor: str = "local"  # or a Dask scheduler's address, tcp://HOST:PORT

    def stage(self, name: str) -> StageConfig | None:
        return next((s for s in self.stages if s.name == name), None)


def suggest(name: str, valid: list[str] | tuple[str, ...]) -> str:
    """A ' (did you mean X?)' suffix for the nearest valid name, or a list of valid names."""
    close = difflib.get_close_matches(name, list(valid), n=1, cutoff=0.5)
    if close:
        return f"; did you mean '{close[0]}'?"
    return f"; valid names are: {', '.join(valid)}"


def _type_name(kind: type | tuple[type, ...]) -> str:
    kinds = kind if isinstance(kind, tuple) else (kind,)
    names = {int: "an integer", float: "a number", bool: "true or false", str: "a string",
             list: "a list", dict: "a mapping", type(None): "null"}
    return " or ".join(names.get(k, k.__name__) for k in kinds)


def check_type(value: Any, kind: type | tuple[type, ...]) -> bool:
    """YAML-aware type check: bools are not numbers, ints are acceptable floats."""
    kinds = kind if isinstance(kind, tuple) else (kind,)
    for k in kinds:
        if k is bool and isinstance(value, bool):
            return True
        if k is int and isinstance(value, int) and not isinstance(value, bool):
            return True
        if k is float and isinstance(value, (int, float)) and not isinstance(value, bool):
            return True
        if k not in (bool, int, float) and isinstance(value, k):
            return True
    return False


def non_finite(value: Any) -> tuple[str, float] | None:
    """The first NaN or infinity in an option's value, with its place below the option
    (``''``, ``'.train'``, ``'[1]'``), else None: YAML's ``.nan`` and ``.inf`` are floats that
    pass every ``x < limit`` check, so each number option is checked here, once for all."""
    if isinstance(value, float) and not math.isfinite(value):
        return "", value
    items = value.items() if isinstance(value, dict) else enumerate(value) if isinstance(value, (list, tuple)) else ()
    for key, item in items:
        bad = non_finite(item)
        if bad is not None:
            return (f"[{key}]" if isinstance(key, int) else f".{key}") + bad[0], bad[1]
    return None


def _stage_entry(entry: Any, path: str) -> tuple[str, Any]:
    if isinstance(entry, str):
        return entry, {}
    if isinstance(entry, dict) and len(entry) == 1:
        (name, opts), = entry.items()
        return str(name), opts
    raise ConfigError(
        f"each stage must be a name or a one-key mapping like '- filter: {{min_seconds: 8}}', got {entry!r}",
        location=path)


def validate_stage_options(name: str, opts: Any, path: str) -> dict[str, Any]:
    """Check one stage's options against its table; return them with defaults filled in.
    Raises the first problem (``stage_option_problems`` lists them all)."""
    merged, problems = stage_option_problems(name, opts, path)
    if problems:
        raise problems[0]
    return merged


def stage_option_problems(name: str, opts: Any, path: str) -> tuple[dict[str, Any], list[ConfigError]]:
    """Every problem of one stage's options (unknown names, types, ranges, then the stage's
    cross-option rules when each option alone is fine), and the options with defaults."""
    cls = stage_class(name)
    if opts is None:
        opts = {}
    if not isinstance(opts, dict):
        return {}, [ConfigError(f"options of stage '{name}' must be a mapping, got {opts!r}", location=path)]
    table = {o.name: o for o in cls.options}
    out: dict[str, Any] = {}
    problems: list[ConfigError] = []
    for key, value in opts.items():
        kpath = f"{path}.{key}"
        if key not in table:
            problems.append(ConfigError(
                f"unknown option '{key}' for stage '{name}'{suggest(str(key), list(table))}", location=kpath))
            continue
        opt = table[key]
        if not check_type(value, opt.kind):
            problems.append(ConfigError(f"expected {_type_name(opt.kind)}, got {value!r}", location=kpath))
            continue
        if isinstance(value, int) and not isinstance(value, bool) and opt.kind is float:
            value = float(value)
        bad = non_finite(value)
        if bad is not None:
            where, number = bad
            problems.append(ConfigError(
                f"must be a finite number, got {number!r} (NaN fails every comparison and an "
                "infinity bounds nothing: the rule would silently be off or take every file); "
                "give a number"
                + (" (null switches it off)" if check_type(None, opt.kind) else ""),
                location=kpath + where))
            continue
        if opt.check is not None:
            problem = opt.check(value)
            if problem:
                problems.append(ConfigError(f"{problem} (got {value!r})", location=kpath))
                continue
        out[key] = value
    merged = {o.name: o.default for o in cls.options}
    merged.update(out)
    check_all = getattr(cls, "check_options", None)
    if check_all is not None and not problems:
        problem = check_all(merged)
        if problem:
            problems.append(ConfigError(problem, location=path))
    return merged, problems


def parse_config(raw: Any, *, source: str | None = None) -> Config:
    """Validate a loaded YAML mapping (see module docstring). Every problem is collected and
    raised together (``ConfigErrors`` when there are several)."""
    if raw is None:
        raise ConfigError("the config file is empty; it needs at least 'input', 'output' and "
                          "'stages' (see configs/default.yaml)", file=source)
    if not isinstance(raw, dict):
        raise ConfigError(f"the config must be a mapping with keys {', '.join(TOP_KEYS)}, "
                          f"got {type(raw).__name__}", file=source)
    problems: list[ConfigError] = []
    for key in raw:
        if key not in TOP_KEYS:
            problems.append(ConfigError(f"unknown key '{key}'{suggest(str(key), TOP_KEYS)}", location=str(key)))
    for key in ("input", "output"):
        if not isinstance(raw.get(key), str) or not raw.get(key):
            problems.append(ConfigError(f"'{key}' must be a folder path (a string), got {raw.get(key)!r}",
                                        location=key))
    workers = 1
    try:
        workers = parse_workers(raw.get("workers", "auto"))
    except ConfigError as e:
        problems.append(e)
    executor = "local"
    try:
        executor = parse_executor(raw.get("executor", "local"))
    except ConfigError as e:
        problems.append(e)
    stages = _parse_stages(raw.get("stages"), problems)
    metadata = Metadata()
    table_read = True  # else its columns are unknown: names are not checked against them (an
    # audit: one mistake in the table also gave a false "not a column" error)
    if raw.get("metadata") is not None:
        if not isinstance(raw["metadata"], str) or not raw["metadata"]:
            problems.append(ConfigError(f"'metadata' must be the path of a CSV table, got "
                                        f"{raw['metadata']!r}", location="metadata"))
            table_read = False
        else:
            try:
                metadata = load_metadata(raw["metadata"])
            except ConfigError as e:
                problems.append(e)
                table_read = False
    if table_read:
        problems.extend(_check_field_names(stages, metadata))
    for p in problems:
        p.file = p.file or source
    if len(problems) == 1:
        raise problems[0]
    if problems:
        raise ConfigErrors(problems, file=source)
    return Config(input=Path(raw["input"]), output=Path(raw["output"]), workers=workers,
                  stages=stages, path=Path(source) if source else None, raw=raw, metadata=metadata,
                  executor=executor)


def _check_field_names(stages: list[StageConfig], metadata: Metadata) -> list[ConfigError]:
    """``split.group_fields`` must name a manifest field or a metadata column, and
    ``filter.metadata_exclude`` a metadata column: a misspelt name would silently do nothing."""
    from .outputs.manifest import CONTRACT_FIELDS
    problems = []
    filt = next((s for s in stages if s.name == "filter"), None)
    columns = _once("title", *metadata.columns)  # a table may have a title column of its own
    for column in (filt.options.get("metadata_exclude") or {}) if filt else ():
        if column not in columns:
            problems.append(ConfigError(
                f"'{column}' is not a column of the metadata table{suggest(str(column), columns)}",
                location=f"stages[{filt.index}].filter.metadata_exclude"))
    split = next((s for s in stages if s.name == "split"), None)
    if split is None:
        return problems
    known = _once(*(f for f in CONTRACT_FIELDS if f not in SPLIT_WRITES), *columns)
    where = f"stages[{split.index}].split.group_fields"
    hint = "" if metadata.columns else " (add a 'metadata: TABLE.csv' with such a column)"
    for f in split.options.get("group_fields", []):
        if f in SPLIT_WRITES and f not in columns:
            problems.append(ConfigError(
                f"'{f}' is written by the split itself (or after it), so it cannot tie files "
                "before they are placed; name a field measured before the split (e.g. title) or "
                "a metadata column", location=where))
        elif f not in known:
            problems.append(ConfigError(f"'{f}' is neither a manifest field nor a metadata "
                                        f"column{suggest(str(f), known)}{hint}", location=where))
    return problems


#: Manifest fields the split writes (or the output step after it): ``group_fields`` cannot
#: name them (an audit: ``[split]`` grouped nothing, ``[group]`` was refused with a hint to
#: ``output``).
SPLIT_WRITES = ("split", "group", "group_size", "moved_from", "output")


def _once(*names: str) -> list[str]:
    """``names`` in their order, each once (the manifest's fields include ``title``)."""
    return list(dict.fromkeys(names))


def _parse_stages(entries: Any, problems: list[ConfigError]) -> list[StageConfig]:
    """The ``stages:`` list; problems are appended, not raised."""
    if not isinstance(entries, list) or not entries:
        problems.append(ConfigError("'stages' must be a non-empty list, e.g. '- validate: {}'", location="stages"))
        return []
    stages: list[StageConfig] = []
    seen: set[str] = set()
    known = known_stages()
    for i, entry in enumerate(entries):
        try:
            name, opts = _stage_entry(entry, f"stages[{i}]")
        except ConfigError as e:
            problems.append(e)
            continue
        path = f"stages[{i}].{name}"
        if name not in known:
            problems.append(ConfigError(f"unknown stage '{name}'{suggest(name, known)}", location=f"stages[{i}]"))
            continue
        if name in seen:
            problems.append(ConfigError(f"stage '{name}' appears twice; list each stage once", location=path))
            continue
        seen.add(name)
        options, found = stage_option_problems(name, opts, path)
        problems.extend(found)
        stages.append(StageConfig(name, options, i))
    if stages and stages[0].name in known_stages() and not stage_class(stages[0].name).reads_bytes:
        problems.append(ConfigError(f"the first stage must be 'validate' (it decodes the files), got "
                                    f"'{stages[0].name}'", location=f"stages[{stages[0].index}]"))
    if "split" in seen and stages[-1].name != "split":
        at = next(s.index for s in stages if s.name == "split")
        problems.append(ConfigError("'split' must be the last stage (it places the files that "
                                    "survived every other stage)", location=f"stages[{at}]"))
    return stages


def load_config(path: str | Path, *, input: str | None = None, output: str | None = None,
                workers: str | int | None = None, executor: str | None = None) -> Config:
    """Read a YAML config file, apply CLI overrides, validate everything."""
    p = Path(path)
    check_overrides(workers=workers, executor=executor)
    raw = read_config(p)
    if isinstance(raw, dict):
        raw = with_overrides(raw, input=input, output=output, workers=workers, executor=executor)
    return parse_config(raw, source=str(p))
