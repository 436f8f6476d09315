"""The top-level config values read before any stage is built: the command line's overrides
and the checks of ``workers`` and ``executor``. No numpy and no stage here: the nothing-changed
check (``engine/uptodate.py``) applies and checks them too, so a bad value exits 2 whether or not
the outputs are up to date."""
from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import yaml

from .cpus import usable_cpus
from .errors import ConfigError, ConfigErrors


class ConfigLoader(yaml.SafeLoader):
    """PyYAML's safe loader (no object construction) that refuses a key given twice in one
    mapping: plain ``safe_load`` keeps the last value without a word (YAML 1.2, 3.2.1.1: the
    keys of a mapping are unique), so ``input:`` written twice ran over the second folder."""

    source: str | None = None  # the file, named by the errors

    def get_single_data(self) -> Any:
        node = self.get_single_node()
        if node is None:
            return None
        problems: list[ConfigError] = []
        _check_keys(node, "", problems)
        for problem in problems:
            problem.file = self.source
        if len(problems) == 1:
            raise problems[0]
        if problems:
            raise ConfigErrors(problems, file=self.source)
        return self.construct_document(node)


def _check_keys(node: yaml.Node, path: str, problems: list[ConfigError]) -> None:
    """Every key given twice in a mapping under ``node`` (``path`` is its key path)."""
    if isinstance(node, yaml.SequenceNode):
        for i, item in enumerate(node.value):
            _check_keys(item, f"{path}[{i}]", problems)
    elif isinstance(node, yaml.MappingNode):
        seen: dict[str, yaml.Node] = {}
        for key, value in node.value:
            name = key.value if isinstance(key, yaml.ScalarNode) else None
            if name is not None and key.tag != "tag:yaml.org,2002:merge":
                first = seen.setdefault(name, key)
                if first is not key:
                    one, two = first.start_mark, key.start_mark
                    at = ((lambda m: f"line {m.line + 1}, column {m.column + 1}") if one.line == two.line
                          else (lambda m: f"line {m.line + 1}"))
                    problems.append(ConfigError(
                        f"key '{name}' is given twice ({at(one)} and {at(two)}); YAML would keep "
                        "only the last value: delete one of them",
                        location=f"{path}.{name}" if path else name))
            _check_keys(value, f"{path}.{name}" if path else str(name), problems)


def read_config(path: str | Path) -> Any:
    """The config file at ``path`` as loaded YAML (``ConfigLoader``); a file that cannot be read,
    is not UTF-8 text, is not valid YAML or gives a key twice is a ``ConfigError`` naming the
    file and the place. ``config.load_config`` and the nothing-changed check both read it here."""
    p = Path(path)
    try:
        data = p.read_bytes()
    except OSError as e:
        raise ConfigError(f"cannot read the config file ({e.strerror}); check the path", file=str(p)) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        line = data.count(b"\n", 0, e.start) + 1
        raise ConfigError(f"not UTF-8 text (byte {e.start}: 0x{data[e.start]:02x}); save the file as "
                          "UTF-8", file=str(p), location=f"line {line}") from None
    loader = ConfigLoader(text)
    loader.source = str(p)
    try:
        return loader.get_single_data()
    except yaml.YAMLError as e:
        mark = getattr(e, "problem_mark", None)
        where = f"line {mark.line + 1}, column {mark.column + 1}" if mark else None
        raise ConfigError(f"not valid YAML: {getattr(e, 'problem', e)}", file=str(p), location=where) from None
    finally:
        loader.dispose()


def with_overrides(raw: dict[str, Any], **given: Any) -> dict[str, Any]:
    """A copy of the config mapping with each command-line value that was given (not None) in
    place of the config's (``input``, ``output``, ``workers``, ``executor``)."""
    return {**raw, **{key: value for key, value in given.items() if value is not None}}


#: The place a command-line value's error names (its ``file``), instead of the config file.
COMMAND_LINE = "the command line"


def check_overrides(*, workers: Any = None, executor: Any = None) -> None:
    """Check the command line's ``--workers`` and ``--executor`` (those given) before they
    replace the config's: an error names the option on the command line, not the config file
    the value never came from."""
    problems = []
    for value, parse, option in ((workers, parse_workers, "--workers"),
                                 (executor, parse_executor, "--executor")):
        if value is not None:
            try:
                parse(value, location=option)
            except ConfigError as e:
                e.file = COMMAND_LINE
                problems.append(e)
    if len(problems) == 1:
        raise problems[0]
    if problems:
        raise ConfigErrors(problems, file=COMMAND_LINE)


def parse_workers(value: Any, location: str = "workers") -> int:
    """``auto`` (the CPUs this process may use, ``usable_cpus``) or a whole number >= 1."""
    if value is None or value == "auto":
        return usable_cpus()
    if isinstance(value, str) and value.isdigit():
        value = int(value)
    if not isinstance(value, int) or isinstance(value, bool) or value < 1:
        raise ConfigError(f"workers must be 'auto' or a whole number >= 1, got {value!r}", location=location)
    return value


_SCHEDULER = re.compile(r"tcp://(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9][A-Za-z0-9.-]*):([0-9]{1,5})")


def parse_executor(value: Any, location: str = "executor") -> str:
    """``local`` (worker processes on this machine) or a Dask scheduler, ``tcp://HOST:PORT``."""
    if value is None or value == "local":
        return "local"
    m = _SCHEDULER.fullmatch(value) if isinstance(value, str) else None
    if m is None or not 1 <= int(m.group(2)) <= 65535:
        raise ConfigError(f"executor must be 'local' or a Dask scheduler's address "
                          f"'tcp://HOST:PORT' (port 1-65535), got {value!r}", location=location)
    return value
