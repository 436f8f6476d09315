"""Generates the README's config reference and reason-code table from the code's own tables.

``python -m pipeline.tools.docs`` prints both (``--write`` updates README.md); tests/test_docs.py checks that the README holds
exactly this text, so the README cannot drift from the option tables.
"""
from __future__ import annotations

import json
from typing import Any

from ..reasons import REASONS
from ..stages import STAGE_MODULES, stage_class

BEGIN_CONFIG, END_CONFIG = "<!-- config-reference:begin -->", "<!-- config-reference:end -->"
BEGIN_REASONS, END_REASONS = "<!-- reason-codes:begin -->", "<!-- reason-codes:end -->"


def _default(value: Any) -> str:
    return json.dumps(value) if not isinstance(value, str) else value


def config_reference() -> str:
    """Markdown: one table of options per stage, in the contract's order."""
    out = [BEGIN_CONFIG]
    for name in STAGE_MODULES:
        cls = stage_class(name)
        first = " ".join((cls.doc or cls.__doc__ or "").split())
        out += ["", f"### `{name}` ({cls.kind} stage)", "", first, "",
                "| option | default | meaning |", "|---|---|---|"]
        for o in cls.options:
            doc = " ".join(o.doc.split()).replace("|", "\\|")
            out.append(f"| `{o.name}` | `{_default(o.default)}` | {doc} |")
    out.append(END_CONFIG)
    return "\n".join(out)


def reason_table() -> str:
    """Markdown: every reason code with its stage and meaning."""
    out = [BEGIN_REASONS, "| code | stage | meaning |", "|---|---|---|"]
    out += [f"| `{code}` | {stage} | {meaning} |" for code, (stage, meaning) in REASONS.items()]
    out.append(END_REASONS)
    return "\n".join(out)


def splice(text: str, begin: str, end: str, body: str) -> str:
    """Replace the marked block in ``text`` by ``body`` (which carries the markers)."""
    head, rest = text.split(begin, 1)
    _, tail = rest.split(end, 1)
    return head + body + tail


def refresh_readme(path: str = "README.md") -> None:
    """Rewrite the two generated blocks of the README in place."""
    from pathlib import Path
    p = Path(path)
    text = p.read_text(encoding="utf-8")
    text = splice(text, BEGIN_CONFIG, END_CONFIG, config_reference())
    text = splice(text, BEGIN_REASONS, END_REASONS, reason_table())
    p.write_text(text, encoding="utf-8")


if __name__ == "__main__":  # pragma: no cover
    import sys
    if "--write" in sys.argv:
        refresh_readme()
    else:
        print(config_reference())
        print()
        print(reason_table())
