"""The default pipeline as the developer tools use it (bench, fuzz, the split benchmark).

The tools run from an installed package too, where the repository's configs/ folder is not at
hand, so the default config's text is kept here once; tests/test_config.py checks that it is
configs/default.yaml to the byte.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml

DEFAULT_CONFIG = """\
# The default run: the demo corpus in, out/demo out. Paths are relative to the current folder.
input: sample_corpus
output: out/demo
workers: auto
stages:                       # run in this order
  - validate:   {max_bytes: 16000000, max_events: 2000000}
  - transpose:  {major_to: C, minor_to: A}
  - key_meter:  {}
  - dedup:      {}
  - filter:     {min_seconds: 8, max_seconds: 1200, min_notes: 32}
  - split:      {ratios: {train: 0.8, valid: 0.1, test: 0.1}, seed: 0}
"""


def default_stages() -> list[dict[str, Any]]:
    """The default config's stage list, one ``{name: options}`` per stage, in order."""
    return yaml.safe_load(DEFAULT_CONFIG)["stages"]


def write_default_config(folder: Path) -> Path:
    """The default config written into ``folder`` (``default.yaml``); returns its path."""
    path = Path(folder) / "default.yaml"
    path.write_text(DEFAULT_CONFIG, encoding="utf-8")
    return path
