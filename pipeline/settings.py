"""The top-level config values read before any stage is built: the command line's overrides
and the checks of ``workers`` and ``executor``. No numpy and no stage here: the nothing-changed
check (``engine/uptodate.py``) applies and checks them too, so a bad value exits 2 whether or not
the outputs are up to date."""
from __future__ import annotations

import re
from typing import Any

from .cpus import usable_cpus
from .errors import ConfigError


def with_overrides(raw: dict[str, Any], **given: Any) -> dict[str, Any]:
    """A copy of the config mapping with each command-line value that was given (not None) in
    place of the config's (``input``, ``output``, ``workers``, ``executor``)."""
    return {**raw, **{key: value for key, value in given.items() if value is not None}}


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
