"""``cpu_map steps``: the whole run in one process with a CPU clock per step sees each step
once per file it runs on, and leaves the run's code as it was (a later run writes the same
outputs as a run made before it)."""
from __future__ import annotations

import filecmp
import json
from pathlib import Path

from pipeline.config import load_config
from pipeline.engine import runner, worker
from pipeline.midi import decode
from pipeline.tools import synth
from pipeline.tools.cpu_map import STEPS, main

CONFIG = Path(__file__).resolve().parents[1] / "configs" / "default.yaml"


def _run(inp: Path, out: Path) -> None:
    runner.Runner(load_config(CONFIG, input=str(inp), output=str(out), workers="1"), quiet=True).run()


def test_steps_are_clocked_once_per_call_and_put_back(tmp_path, capsys):
    inp = tmp_path / "in"
    synth.generate(inp, 24, seed=3)
    _run(inp, tmp_path / "before")
    run_tasks, process_file, decode_fn = runner.run_tasks, worker.process_file, decode.decode

    assert main(["steps", str(CONFIG), str(inp), str(tmp_path / "scratch")]) == 0
    printed = capsys.readouterr().out
    calls = {line.split()[-1]: int(line.split()[1]) for line in printed.splitlines()
             if line.startswith("  ") and not line.strip().startswith("pickled")}
    assert set(calls) == {path for _, path in STEPS}
    computed = json.loads((tmp_path / "before" / "summary.json").read_text())["counts"]["computed"]
    # one task per content, one pass per task, one run-level call of each corpus step
    assert calls["process_file"] == calls["file_pass"] == calls["Validate.read"] == computed > 0
    assert calls["Dedup.run_corpus"] == calls["Split.run_corpus"] == calls["write_all"] == 1
    # a stage after the reader runs on at most the files the reader kept
    assert calls["Transpose.process"] <= calls["Validate.read"]
    assert "pickled and unpickled, task alone" in printed

    # everything is put back: the same functions, and a later run writes what the first wrote
    assert (runner.run_tasks, worker.process_file, decode.decode) == (run_tasks, process_file, decode_fn)
    _run(inp, tmp_path / "after")
    for name in ("manifest.jsonl", "splits/train.txt", "splits/valid.txt", "splits/test.txt"):
        assert filecmp.cmp(tmp_path / "before" / name, tmp_path / "after" / name, shallow=False), name
    assert not (tmp_path / "scratch").exists()
