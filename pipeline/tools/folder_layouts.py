"""How the split's ``group_by_folder: auto`` judges real folder layouts.

    python -m pipeline.tools.folder_layouts WORK [--chorales N] [--classical N] [--folk N]
                                                 [--collection FOLDER ...]

Renders works of music21's bundled corpus to MIDI in the corpus's own layout, one folder per
composer (``bach/``, ``mozart/k155/``, ...; folk tunes by book, ``folk/airdsAirs-book1/``), the
shape of a collection gathered by composer or source, and runs the default config's stages over
it; each ``--collection`` folder (e.g. ../shared/data/pop909-dev, one folder per song) is run
the same way. For each it prints the split's decision (``summary.json``,
``split.stage.group_by_folder``) and, at folder depths 1 to 3, the share of the files in folders
of two or more that lie in their folder's largest near-duplicate group (``grouping.piece_folders``
on the manifest's dedup clusters joined by the split's groups), with the folders counted.
The reserved collections (``eval_sets.RESERVED``) are never read (the sets are those of
the key and meter evaluations). Rendering takes a few minutes
on 2 cores; rendered files are kept in WORK and reused.
"""
from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

import yaml

from ..similarity.grouping import piece_folders
from .eval_sets import _parallel_map, _spaced, chorale_paths, classical_paths, folk_tunes_text


def _render_to(item: tuple[str, str, str]) -> str | None:
    """Render one score (a path, or ABC text when ``kind`` is "abc") to ``dest``; None when
    music21 cannot parse or render it."""
    kind, source, dest = item
    out = Path(dest)
    if out.exists():
        return dest
    from music21 import converter, midi
    try:
        score = converter.parse(source, format="abc") if kind == "abc" else converter.parse(source)
        if hasattr(score, "scores"):  # an opus: its first score
            score = score.scores[0]
        data = midi.translate.streamToMidiFile(score).writestr()
    except Exception:  # a few corpus files do not parse or render: left out
        return None
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_suffix(".tmp")
    tmp.write_bytes(data)
    tmp.replace(out)
    return dest


def render_corpus_layout(work: Path, chorales: int, classical: int | None, folk: int) -> Path:
    """The works, rendered under ``work / "by-composer"`` in the corpus's folders: the chorales,
    classical works and folk tunes the key and meter evaluations read (``eval_sets``: one
    encoding per work), evenly spaced subsets."""
    from music21 import corpus
    root = Path(corpus.getWork("bach/bwv66.6")).parent.parent
    out = work / "by-composer"
    items: list[tuple[str, str, str]] = []
    for p in _spaced(chorale_paths(), chorales):
        items.append(("score", str(p), str(out / "bach" / (p.stem + ".mid"))))
    for p in _spaced(classical_paths(), classical):
        items.append(("score", str(p), str(out / p.relative_to(root).with_suffix(".mid"))))
    for name, text in _spaced(folk_tunes_text(), folk):  # name: "book.abc#index"
        book, index = name.rsplit("#", 1)
        dest = out / "folk" / book.replace("/", "-").removesuffix(".abc") / f"tune{int(index):04d}.mid"
        items.append(("abc", text, str(dest)))
    done = [d for d in _parallel_map(_render_to, items) if d]
    print(f"{len(done)} of {len(items)} works rendered under {out}")
    return out


def judge(folder: Path, work: Path) -> dict[str, Any]:
    """The default stages over ``folder``: the split's decision and the share at each depth."""
    from ..config import load_config
    from ..engine.runner import Runner
    root = Path(__file__).resolve().parents[2]
    cfg = yaml.safe_load((root / "configs" / "default.yaml").read_text())
    out = work / f"run-{folder.name}"
    cfg.update({"input": str(folder), "output": str(out), "workers": 2})
    path = work / f"{folder.name}.yaml"
    path.write_text(yaml.safe_dump(cfg))
    Runner(load_config(path), quiet=True).run()
    rows = [json.loads(line) for line in (out / "manifest.jsonl").read_text(encoding="utf-8").splitlines()]
    # a file's identity: its dedup cluster, joined through the split's groups (kept files)
    joined: dict[str, str] = {}
    for r in rows:
        if r.get("cluster") and r.get("group"):
            joined.setdefault(r["cluster"], r["group"])
    files = [(r["source"], joined.get(r["cluster"], r["cluster"])) for r in rows if r.get("cluster")]
    depths = {}
    for d in (1, 2, 3):
        found = piece_folders(files, depths=(d,), min_folders=0)
        depths[d] = {"share": round(found.share, 4), "folders": found.folders}
    summary = json.loads((out / "summary.json").read_text())["split"]["stage"]["group_by_folder"]
    return {"folder": str(folder), "files": len(rows), "decision": summary, "by_depth": depths}


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("work", type=Path, help="a folder for rendered works and runs")
    ap.add_argument("--chorales", type=int, default=100)
    ap.add_argument("--classical", type=int, default=150)
    ap.add_argument("--folk", type=int, default=150)
    ap.add_argument("--collection", type=Path, action="append", default=[],
                    help="another folder to judge (its own layout), e.g. ../shared/data/pop909-dev")
    a = ap.parse_args(argv)
    a.work.mkdir(parents=True, exist_ok=True)
    folders = [render_corpus_layout(a.work, a.chorales, a.classical, a.folk), *a.collection]
    for folder in folders:
        res = judge(folder, a.work)
        print(json.dumps(res, ensure_ascii=False))


if __name__ == "__main__":
    main()
