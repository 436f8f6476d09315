"""How many of the split's near-duplicate links its LSH search finds (issue 20).

    python -m pipeline.tools.bench_dedup --real ../shared/data/pop909-dev --split-recall
    python -m pipeline.tools.bench_dedup --chorales CACHE --split-recall

The split groups files linked at ``group_threshold`` and must not miss a link (a missed link
can put two versions of one piece into two parts), but it finds candidates by LSH banding
(``grouping.near_links``), which finds a pair with a probability below one. This compares its
links with those of every pair verified exactly (``links.code_similarities``, the same
measure), on the signatures and shingle sets the split itself makes (``signature_of`` at the
split's options): recall, the values of the links it missed, and the groups of all links
that its own links leave apart (what a miss can cost: transitive links often cover it).
"""
from __future__ import annotations

from typing import Any, Callable, Mapping

import numpy as np

from ..similarity.grouping import build_groups, near_links
from ..similarity.links import code_similarities


def split_recall(signed: Mapping[str, tuple[np.ndarray, np.ndarray]], threshold: float,
                 label_of: Callable[[str], str] | None = None,
                 search: Callable[..., list] = near_links) -> dict[str, Any]:
    """``signed``: name -> (signature, shingle set). The split's search (``search``) against
    every pair verified; ``label_of`` (e.g. a song) counts the missed links within a label."""
    keys = sorted(signed)
    n = len(keys)
    found = {(a, b): v for a, b, v in search({k: signed[k][0] for k in keys}, threshold,
                                              {k: signed[k][1] for k in keys})}
    every: dict[tuple[str, str], float] = {}
    i, j = np.triu_indices(n, 1)
    codes = i.astype(np.int64) * n + j
    shingles = {k: signed[k][1] for k in keys}
    for at, val in code_similarities(keys, codes, shingles):
        hit = val >= threshold
        for c, v in zip(codes[at[hit]].tolist(), val[hit].tolist()):
            every[(keys[c // n], keys[c % n])] = v
    missed = {p: v for p, v in every.items() if p not in found}
    ours = build_groups(keys, list(found))
    group_of = {m: g for g, members in ours.items() for m in members}
    apart = [members for members in build_groups(keys, list(every)).values()
             if len({group_of[m] for m in members}) > 1]
    out = {"files": n, "threshold": threshold, "links": len(every), "found": len(found),
           "extra": len(set(found) - set(every)), "missed": sorted(missed.items()),
           "recall": 1.0 - len(missed) / len(every) if every else 1.0,
           "groups": len(build_groups(keys, list(every))), "groups_apart": apart}
    if label_of is not None:
        out["missed_within_label"] = sum(label_of(a) == label_of(b) for a, b in missed)
    return out


def split_recall_of(named_midi: Mapping[str, bytes], split_opts: dict | None = None,
                    label_of: Callable[[str], str] | None = None) -> dict[str, Any]:
    """``split_recall`` of MIDI files (name -> bytes) at the split's ``group_threshold``."""
    from ..stages.split import Split
    threshold = float(Split(split_opts or {}).opts["group_threshold"])
    return split_recall(sign_all(named_midi), threshold, label_of=label_of)


def sign_all(named_midi: Mapping[str, bytes]) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """name -> (signature, shingles) of MIDI bytes, at the split's signature options."""
    from ..midi.decode import decode
    from ..similarity.minhash import signature_of
    from ..stages.split import signature_options
    opts = signature_options()
    out = {}
    for name, data in named_midi.items():
        sig, sh, _ = signature_of(decode(data, source=name), opts)
        out[name] = (np.asarray(sig, dtype=np.uint32), sh)
    return out


def format_recall(what: str, res: dict[str, Any]) -> str:
    """The figures as lines of text."""
    vals = [round(v, 3) for _, v in res["missed"]]
    lines = [f"{what}: {res['files']} files, links at {res['threshold']} by every pair "
             f"{res['links']}, by the split's search {res['found']} (extra {res['extra']}), "
             f"missed {len(res['missed'])}: recall {res['recall']:.4f}",
             f"  missed links' values: {sorted(vals)}"]
    if "missed_within_label" in res:
        lines.append(f"  missed links within one label: {res['missed_within_label']} of {len(vals)}")
    lines.append(f"  groups of all links left apart by the search: {len(res['groups_apart'])} "
                 f"of {res['groups']}")
    for g in res["groups_apart"]:
        lines.append(f"    {', '.join(g)}")
    return "\n".join(lines)
