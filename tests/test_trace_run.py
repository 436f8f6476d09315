"""``trace_run time``: the step timers sum every call of each named step and change nothing a
run computes (a timed rerun writes the same outputs as an untimed one)."""
from __future__ import annotations

import filecmp
import shutil
from pathlib import Path

from pipeline.config import load_config
from pipeline.engine import runner
from pipeline.outputs import manifest
from pipeline.store.ledger import Ledger
from pipeline.tools import synth
from pipeline.tools.trace_run import TIMED, time_steps

CONFIG = Path(__file__).resolve().parents[1] / "configs" / "default.yaml"


def _run(inp: Path, out: Path) -> None:
    runner.Runner(load_config(CONFIG, input=str(inp), output=str(out), workers="1"), quiet=True).run()


def test_timed_rerun_counts_each_step_and_writes_what_an_untimed_one_writes(tmp_path):
    inp = tmp_path / "in"
    synth.generate(inp / "a", 24, seed=3)
    _run(inp, tmp_path / "timed")
    shutil.copytree(tmp_path / "timed", tmp_path / "plain")
    synth.generate(inp / "b", 4, seed=4)  # a rerun with a few new files

    sums, restore = time_steps()
    try:
        _run(inp, tmp_path / "timed")
    finally:
        restore()
    # every step is put back as it was
    assert Ledger.verdicts_for.__name__ == "verdicts_for"
    assert manifest.write_all.__name__ == "write_all"
    _run(inp, tmp_path / "plain")

    labels = {f"{m.rsplit('.', 1)[-1]}.{p}" for m, p in TIMED}
    assert set(sums) <= labels
    # one call per run of the run-level steps; a row digest made for the 4 new sources only
    # (the 24 others' rows are settled: their digests are the last run's, rowreuse.settle)
    assert sums["dedup.Dedup.run_corpus"][0] == 1
    assert sums["split.Split.run_corpus"][0] == 1
    assert sums["manifest.write_all"][0] == 1
    assert sums["rowreuse.row_digest"][0] == 4
    assert sums["ledger.Ledger.verdicts_for"][0] == 4  # the default config's four per-file stages
    for calls, wall, cpu in sums.values():
        assert calls >= 0 and wall >= 0.0 and cpu >= 0.0
    # a step's time includes the steps it calls
    assert sums["walk.StageWalk.run"][1] >= sums["dedup.Dedup.run_corpus"][1]
    for name in ("manifest.jsonl", "splits/train.txt", "splits/valid.txt", "splits/test.txt"):
        assert filecmp.cmp(tmp_path / "timed" / name, tmp_path / "plain" / name, shallow=False), name
