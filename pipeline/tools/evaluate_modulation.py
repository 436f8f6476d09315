"""Score the windowed key estimate's modulation flag (``key_modulates``) against notated or
annotated key changes, per set (README, Key detection: modulation).

    python -m pipeline.tools.evaluate_modulation [--pop ../shared/data/pop909-dev]

Truth per set (``eval_sets``): pop, the annotation's ``n_keys > 1`` (key segments annotated
from the recording); folk, a body ``K:`` field naming another key signature than the header's;
chorales and classical, a key-signature change in the first part. The notated sets' truth is
one-sided: a signature change is a key change, but a piece may modulate (to the dominant, say)
without one, so "flagged without a change" there is not necessarily an error. Relative
major/minor changes share a signature and are not flagged by design; the pop table counts them
apart. It also runs inside ``evaluate_key``.
"""
from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

import numpy as np

from . import eval_sets
from ..analysis import key as keymod
from ..analysis import modulation


def key_index(tonic_pc: int, mode: str) -> int:
    return tonic_pc + (12 if mode == "minor" else 0)


def pop_annotated_keys(folder: str | Path) -> dict[str, list[int]]:
    """The annotated key segments of each pop file as key indexes, by file path."""
    labels = json.loads((Path(folder) / "labels.json").read_text(encoding="utf-8"))["files"]
    out = {}
    for rel, lab in labels.items():
        keys = []
        for _start, _end, label in lab.get("keys", []):
            tonic, mode = label.split(":")
            keys.append(key_index(keymod.note_name_to_pc(tonic), "minor" if mode == "min" else "major"))
        out[rel] = keys
    return out


def truths(name: str, works: list[dict]) -> dict[str, bool | None]:
    """The set's modulation truth by work name (see the module docstring)."""
    if name == "pop":
        return {w["name"]: w["modulates"] for w in works}
    if name == "folk":
        changes = eval_sets.folk_key_changes()
        return {w["name"]: changes.get(w["name"]) for w in works}
    return eval_sets.signature_changes(works)


def modulation_report(name: str, works: list[dict], truth: dict[str, bool | None],
                      annotated: dict[str, list[int]] | None = None) -> dict[str, Any]:
    """Precision, recall and flag rate of ``key_regions(...).modulates`` on the works with a
    truth; for pop (``annotated`` key segments) also the true modulations that stay within one
    key signature (relative major/minor) and how often ``key_second`` is an annotated key."""
    from .eval_midi import decode
    flags, right, second_hits, relative_only = [], [], 0, 0
    for w in works:
        t = truth.get(w["name"])
        if t is None:
            continue
        piece = decode(w["midi"])
        est = keymod.estimate_key_learned(piece)
        regions = modulation.key_regions(piece, key_index(est.tonic_pc, est.mode))
        flags.append(regions.modulates)
        right.append(bool(t))
        keys = (annotated or {}).get(w["name"], [])
        if t and keys and len({modulation.signature_of(k) for k in keys}) == 1:
            relative_only += 1
        if t and regions.modulates and regions.second in keys:
            second_hits += 1
    f, r = np.array(flags, dtype=bool), np.array(right, dtype=bool)
    tp = int((f & r).sum())
    return {"name": name, "n": len(f), "changes": int(r.sum()), "flagged": int(f.sum()),
            "true_flags": tp,
            "precision": tp / f.sum() if f.sum() else float("nan"),
            "recall": tp / r.sum() if r.sum() else float("nan"),
            "flagged_without_change": float(f[~r].mean()) if (~r).any() else float("nan"),
            "relative_only": relative_only if annotated else None,
            "second_key_annotated": second_hits if annotated else None}


def print_modulation(r: dict[str, Any]) -> None:
    line = (f"modulation ({r['name']}): {r['n']} pieces, {r['changes']} with a key change; "
            f"flagged {r['flagged']} ({r['true_flags']} right): precision {r['precision']:.3f}, "
            f"recall {r['recall']:.3f}; flagged among pieces without a change "
            f"{r['flagged_without_change']:.3f}")
    if r["relative_only"] is not None:
        line += (f"; {r['relative_only']} of the changes stay within one signature (relative "
                 f"major/minor, not flagged by design); key_second is an annotated key in "
                 f"{r['second_key_annotated']} of {r['true_flags']} right flags")
    print(line)


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pop", help="POP909-style folder with labels.json")
    ap.add_argument("--folk", type=int, default=600, help="folk tunes (-1 = all, 0 = skip)")
    ap.add_argument("--chorales", type=int, default=100, help="Bach chorales (0 = skip)")
    ap.add_argument("--classical", type=int, default=-1, help="classical pieces (-1 = all)")
    args = ap.parse_args(argv)
    sets = eval_sets.key_sets(args.chorales, args.folk, args.classical, args.pop)
    annotated = pop_annotated_keys(args.pop) if args.pop else None
    for name, works in sets.items():
        print_modulation(modulation_report(name, works, truths(name, works),
                                           annotated if name == "pop" else None))


if __name__ == "__main__":
    main()
