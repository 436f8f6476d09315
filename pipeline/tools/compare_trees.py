"""Per-file CPU of decoding and of rendering a normalized output, this tree against another
checkout, side by side in one process (alternating rounds on the same files; the minimum
over rounds, which a busy shared machine inflates least).

    python -m pipeline.tools.compare_trees BASE_CHECKOUT 'CORPUS/**/*.mid' [ROUNDS]

BASE_CHECKOUT is a checkout of the other commit with its extension built in place
(``git archive COMMIT | tar -x -C DIR`` then ``python setup.py build_ext --inplace`` there).
Its ``pipeline`` package is copied to a temporary folder as ``pipeline_base`` so both import
in one process. "decode" is ``bench.decode_paths`` (read and decode each file); "render" is
what ``outputs.render.render`` does for a piece transposed by +3 semitones, without the file write.
"""
from __future__ import annotations

import glob
import importlib
import shutil
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path


#: What is timed, by module: in today's layout and in the flat one before 2026-12-04 (so a
#: checkout of either can be the base).
LAYOUTS = (
    {"bench": "tools.bench", "decode": "midi.decode", "encode": "midi.encode", "errors": "errors",
     "transpose": "stages.transpose", "shifts": "analysis.transpose"},
    {"bench": "bench", "decode": "smf", "encode": "encode", "errors": "errors",
     "transpose": "stages.transpose", "shifts": "outputs"},
)


def load(name: str) -> dict:
    for layout in LAYOUTS:
        try:
            return {role: importlib.import_module(f"{name}.{mod}") for role, mod in layout.items()}
        except ModuleNotFoundError:
            continue
    raise SystemExit(f"{name}: neither layout of the package found")


def render_all(m: dict, pieces: list) -> None:
    shifts, enc = m["shifts"], m["encode"]
    transpose = m["transpose"].Transpose
    for p in pieces:
        for _suffix, notes, semis in transpose.output_notes(p, {"transpose": 3}):
            kw = {"key_signatures": shifts.shift_key_signatures(p.key_signatures, semis)}
            if hasattr(shifts, "shift_controls"):
                kw["controls"] = shifts.shift_controls(p.controls, semis)
            enc.encode(replace(p, **kw), notes)


def main() -> None:
    if len(sys.argv) < 3:
        raise SystemExit("usage: python -m pipeline.tools.compare_trees BASE_CHECKOUT 'CORPUS/**/*.mid' [ROUNDS]")
    base, pattern = Path(sys.argv[1]), sys.argv[2]
    rounds = int(sys.argv[3]) if len(sys.argv) > 3 else 9
    tmp = Path(tempfile.mkdtemp(prefix="compare_trees_"))
    shutil.copytree(base / "pipeline", tmp / "pipeline_base")
    sys.path[:0] = [str(tmp), str(Path(__file__).resolve().parents[2])]
    trees = {"base": load("pipeline_base"), "this": load("pipeline")}
    paths = sorted(glob.glob(pattern, recursive=True))
    pieces = {}
    for name, m in trees.items():
        pieces[name] = []
        for path in paths:
            try:
                pieces[name].append(m["decode"].decode(Path(path).read_bytes()))
            except m["errors"].DecodeError:
                pass
    best = {name: [float("inf"), float("inf")] for name in trees}
    for _ in range(rounds):
        for name, m in trees.items():
            c0 = time.process_time()
            m["bench"].decode_paths(paths)
            c1 = time.process_time()
            render_all(m, pieces[name])
            c2 = time.process_time()
            best[name] = [min(best[name][0], (c1 - c0) / len(paths)),
                          min(best[name][1], (c2 - c1) / len(pieces[name]))]
    shutil.rmtree(tmp, ignore_errors=True)
    n_ctl = sum(len(getattr(p, "controls", ())) for p in pieces["this"])
    print(f"{len(paths)} files ({len(pieces['this'])} decoded), "
          f"{n_ctl / max(1, len(pieces['this'])):.0f} controls per file")
    for name, (d, r) in best.items():
        print(f"{name}: decode {d * 1e3:.4f} ms/file, render {r * 1e3:.4f} ms/file")
    (bd, br), (td, tr) = best["base"], best["this"]
    print(f"change: decode {100 * (td / bd - 1):+.1f}%, render {100 * (tr / br - 1):+.1f}%")


if __name__ == "__main__":
    main()
