"""The README's config reference and reason-code table are the code's own tables."""
from __future__ import annotations

import re
from pathlib import Path

from pipeline.tools.docs import config_reference, reason_table
from pipeline.reasons import REASONS

ROOT = Path(__file__).resolve().parents[1]


def test_readme_holds_the_generated_config_reference():
    assert config_reference() in (ROOT / "README.md").read_text(encoding="utf-8"), \
        "README is out of date: paste the output of 'python -m pipeline.tools.docs'"


def test_readme_holds_the_generated_reason_table():
    assert reason_table() in (ROOT / "README.md").read_text(encoding="utf-8")


def test_every_reason_code_in_the_code_is_documented():
    found = set()
    patterns = [r'DecodeError\(\s*"([a-z_]+)"', r'\.drop\(\s*"([a-z_]+)"', r'Rule\(\s*"([a-z_]+)"',
                r'"reason":\s*"([a-z_]+)"', r'_failure\(\s*"([a-z_]+)"', r'reason\s*=\s*"([a-z_]+)"']
    for path in (ROOT / "pipeline").rglob("*.py"):
        text = path.read_text(encoding="utf-8")
        for pat in patterns:
            found.update(re.findall(pat, text))
    assert found, "the scan found no reason codes at all"
    missing = sorted(found - set(REASONS))
    assert not missing, f"reason codes used but not in pipeline/reasons.py: {missing}"
