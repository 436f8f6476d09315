"""Render works of music21's bundled corpus to MIDI, one folder per composer, to run the
pipeline on real music of a genre it was never tuned on.

    python -m pipeline.tools.render_works OUT palestrina:3 monteverdi trecento

Each argument is a composer folder of the corpus (``music21.corpus.getComposer``), with
``:N`` to take every Nth of its works (sorted paths); of works in several encodings, the
``.mxl`` alone when there is one (Monteverdi's madrigals come as ``.mxl`` and ``.rntxt``). A
work is written to ``OUT/<composer>/<stem>.mid`` (kept and reused when there); works music21
cannot parse or render are left out. The reserved collections (``eval_sets.RESERVED``) are
refused. Then run, e.g., ``midisift run configs/default.yaml --input OUT --output RUN``.
"""
from __future__ import annotations

import argparse
from pathlib import Path

from .eval_sets import RESERVED, _parallel_map
from .folder_layouts import _render_to


def work_paths(composer: str, step: int = 1) -> list[Path]:
    """The composer's works to render: every ``step``-th of the sorted paths, one encoding a
    stem (``.mxl`` first)."""
    from music21 import corpus
    if composer in RESERVED:
        raise SystemExit(f"render_works: '{composer}' is reserved for independent evaluation")
    by_stem: dict[str, Path] = {}
    for p in sorted(corpus.getComposer(composer)):
        if p.stem not in by_stem or p.suffix == ".mxl":
            by_stem[p.stem] = p
    return sorted(by_stem.values())[::step]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", help="the folder to write OUT/<composer>/<stem>.mid into")
    ap.add_argument("composers", nargs="+", metavar="COMPOSER[:N]")
    a = ap.parse_args(argv)
    items = []
    for arg in a.composers:
        name, _, step = arg.partition(":")
        for p in work_paths(name, int(step or 1)):
            items.append(("score", str(p), str(Path(a.out) / name / (p.stem + ".mid"))))
    done = [d for d in _parallel_map(_render_to, items) if d]
    print(f"{len(done)} of {len(items)} works rendered under {a.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
