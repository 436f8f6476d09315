"""Config loading: every error names its key path, the value, the rule, and a near match."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from pipeline.config import load_config, parse_config
from pipeline.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]


def _cfg(stages, **top):
    raw = {"input": "sample_corpus", "output": "out/x", "stages": stages}
    raw.update(top)
    return raw


def test_default_config_loads_all_six_stages():
    cfg = load_config(ROOT / "configs" / "default.yaml")
    assert [s.name for s in cfg.stages] == ["validate", "transpose", "key_meter", "dedup", "filter", "split"]
    assert cfg.workers >= 1


@pytest.mark.parametrize("name", ["default.yaml", "validate-only.yaml", "augmented.yaml"])
def test_shipped_configs_are_valid(name):
    load_config(ROOT / "configs" / name)


@pytest.mark.parametrize("name", sorted(p.name for p in (ROOT / "configs").glob("*.yaml")))
def test_every_shipped_config_keeps_files_of_the_demo_corpus(name, tmp_path):
    """A worked example must show its effect: each config keeps files and writes outputs."""
    import json

    from pipeline.cli import main
    out = tmp_path / "out"
    assert main(["run", str(ROOT / "configs" / name), "--input", str(ROOT / "sample_corpus"),
                 "--output", str(out), "--workers", "1", "--quiet"]) == 0
    kept = [json.loads(line) for line in (out / "manifest.jsonl").open() if '"status": "kept"' in line]
    assert kept and all((out / r["output"]).is_file() for r in kept if r.get("output"))


def test_unknown_top_key_suggests_nearest():
    with pytest.raises(ConfigError, match=r"unknown key 'stagse'.*did you mean 'stages'"):
        parse_config({"input": "a", "output": "b", "stagse": []})


def test_unknown_stage_suggests_nearest():
    with pytest.raises(ConfigError, match=r"stages\[1\].*unknown stage 'dedupe'.*did you mean 'dedup'"):
        parse_config(_cfg([{"validate": {}}, {"dedupe": {}}]))


def test_unknown_option_names_key_path_and_suggests():
    with pytest.raises(ConfigError, match=r"stages\[0\]\.validate\.max_byte.*did you mean 'max_bytes'"):
        parse_config(_cfg([{"validate": {"max_byte": 10}}]))


def test_wrong_type_names_expected_type_and_value():
    with pytest.raises(ConfigError, match=r"stages\[0\]\.validate\.max_bytes: expected an integer, got 'big'"):
        parse_config(_cfg([{"validate": {"max_bytes": "big"}}]))


def test_bool_is_not_a_number():
    with pytest.raises(ConfigError, match=r"expected an integer, got True"):
        parse_config(_cfg([{"validate": {"max_bytes": True}}]))


def test_out_of_range_value_states_rule():
    with pytest.raises(ConfigError, match=r"stages\[0\]\.validate\.max_bytes: must be greater than 0 \(got -5\)"):
        parse_config(_cfg([{"validate": {"max_bytes": -5}}]))


def test_zero_workers_is_an_error():
    with pytest.raises(ConfigError, match=r"workers must be 'auto' or a whole number >= 1, got 0"):
        parse_config(_cfg([{"validate": {}}], workers=0))


def test_auto_workers_are_the_usable_cpus(monkeypatch):
    from pipeline import settings
    monkeypatch.setattr(settings, "usable_cpus", lambda: 5)
    assert parse_config(_cfg([{"validate": {}}], workers="auto")).workers == 5


def _affinity(monkeypatch, n):
    import os
    if hasattr(os, "process_cpu_count"):
        monkeypatch.setattr(os, "process_cpu_count", lambda: n)
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: set(range(n)), raising=False)


def test_usable_cpus_follow_the_affinity_mask_and_the_cgroup_quota(tmp_path, monkeypatch):
    # file formats from the Linux kernel documentation: cgroup v2 cpu.max "<quota> <period>"
    # or "max <period>" (admin-guide/cgroup-v2.rst); v1 cpu.cfs_quota_us / cpu.cfs_period_us,
    # quota -1 meaning none (scheduler/sched-bwc.rst)
    from pipeline.cpus import cgroup_cpu_quota, usable_cpus
    _affinity(monkeypatch, 6)  # e.g. taskset -c 0-5 on a bigger host
    assert cgroup_cpu_quota(str(tmp_path)) is None
    assert usable_cpus(str(tmp_path)) == 6
    v2 = tmp_path / "v2"
    v2.mkdir()
    for text, quota in (("max 100000", None), ("150000 100000", 2), ("200000 100000", 2),
                        ("50000 100000", 1), ("800000 100000", 8), ("garbage", None)):
        (v2 / "cpu.max").write_text(text + "\n")
        assert cgroup_cpu_quota(str(v2)) == quota, text
    (v2 / "cpu.max").write_text("150000 100000\n")
    assert usable_cpus(str(v2)) == 2  # a container given 1.5 CPUs: 2 workers, not 6
    (v2 / "cpu.max").write_text("800000 100000\n")
    assert usable_cpus(str(v2)) == 6  # a quota above the mask does not add CPUs
    v1 = tmp_path / "v1"
    (v1 / "cpu").mkdir(parents=True)
    (v1 / "cpu" / "cpu.cfs_period_us").write_text("100000\n")
    for text, quota in (("-1", None), ("300000", 3), ("250000", 3)):
        (v1 / "cpu" / "cpu.cfs_quota_us").write_text(text + "\n")
        assert cgroup_cpu_quota(str(v1)) == quota, text


def test_validate_must_come_first():
    with pytest.raises(ConfigError, match=r"first stage must be 'validate'"):
        parse_config(_cfg([{"key_meter": {}}, {"validate": {}}]))


def test_stage_listed_twice():
    with pytest.raises(ConfigError, match=r"stage 'validate' appears twice"):
        parse_config(_cfg([{"validate": {}}, {"validate": {}}]))


def test_bare_stage_name_is_accepted():
    cfg = parse_config(_cfg(["validate"]))
    assert cfg.stages[0].options["max_bytes"] > 0


def test_yaml_syntax_error_names_line(tmp_path):
    p = tmp_path / "bad.yaml"
    p.write_text("input: a\nstages: [validate\n")
    with pytest.raises(ConfigError, match=r"bad.yaml: line \d+, column \d+: not valid YAML"):
        load_config(p)


def test_yaml_is_loaded_safely(tmp_path):
    # yaml.safe_load refuses python object tags (PyYAML documentation, "Loading YAML").
    p = tmp_path / "evil.yaml"
    p.write_text("input: !!python/object/apply:os.system ['echo hi']\noutput: o\nstages: [validate]\n")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(p)


def test_cli_bad_config_exits_2_and_writes_nothing(tmp_path):
    out = tmp_path / "out"
    p = tmp_path / "c.yaml"
    p.write_text(yaml.safe_dump(_cfg([{"validate": {"max_bytes": -1}}], output=str(out))))
    proc = subprocess.run([sys.executable, "-m", "pipeline.cli", "run", str(p)], capture_output=True, text=True,
                          cwd=ROOT)
    assert proc.returncode == 2
    assert "stages[0].validate.max_bytes" in proc.stderr
    assert not out.exists()


def test_every_problem_is_reported_at_once_with_its_key_path():
    from pipeline.errors import ConfigErrors
    raw = _cfg([{"validate": {"max_byte": 10}}, {"dedupe": {}},
                {"filter": {"min_seconds": "long", "min_notes": 32.5}}], workers=0, colour=1)
    with pytest.raises(ConfigErrors) as exc:
        parse_config(raw, source="c.yaml")
    where = [p.location for p in exc.value.problems]
    assert where == ["colour", "workers", "stages[0].validate.max_byte", "stages[1]",
                     "stages[2].filter.min_seconds", "stages[2].filter.min_notes"]
    text = exc.value.message
    assert text.startswith("c.yaml: 6 problems:") and "did you mean 'dedup'" in text
    assert "min_notes must be a whole number" in text


@pytest.mark.parametrize("stage,opts,match", [
    ("filter", {"min_seconds": 60, "max_seconds": 30}, "min_seconds 60 is above max_seconds 30"),
    ("filter", {"notes_per_s": [10, 2]}, "low 10 is above high 2"),
    ("filter", {"min_pitches": 2.5}, "min_pitches must be a whole number"),
    ("transpose", {"augment": [1, 2, 2]}, r"\[2\] appear more than once"),
    ("transpose", {"augment": [0, 3]}, "0 is the normalized file itself"),
])
def test_cross_option_rules(stage, opts, match):
    with pytest.raises(ConfigError, match=match):
        parse_config(_cfg([{"validate": {}}, {stage: opts}]))


def test_whole_number_counts_accept_yaml_floats_such_as_32_0():
    cfg = parse_config(_cfg([{"validate": {}}, {"filter": {"min_notes": 32.0}}]))
    assert cfg.stage("filter").options["min_notes"] == 32.0


def test_empty_config_file_says_it_is_empty(tmp_path):
    p = tmp_path / "empty.yaml"
    p.write_text("# nothing yet\n")
    with pytest.raises(ConfigError, match="the config file is empty") as exc:
        load_config(p)
    assert exc.value.file == str(p)


def test_the_tools_default_config_is_configs_default_yaml():
    # bench, fuzz and the split benchmark keep the default config's text once (they also run
    # from an installed package, without configs/); it must be the shipped file to the byte
    from pipeline.tools.defaults import DEFAULT_CONFIG, default_stages
    assert (ROOT / "configs" / "default.yaml").read_text(encoding="utf-8") == DEFAULT_CONFIG
    assert [next(iter(s)) for s in default_stages()] == \
        ["validate", "transpose", "key_meter", "dedup", "filter", "split"]


def test_a_key_given_twice_names_both_lines(tmp_path):
    """YAML 1.2, 3.2.1.1: the keys of a mapping are unique. PyYAML's safe_load kept the last
    value without a word, so a second 'input:' ran over another folder."""
    from pipeline.errors import ConfigErrors
    p = tmp_path / "twice.yaml"
    p.write_text("input: corpusA\noutput: out\nstages:\n  - validate\n"
                 "  - filter: {min_notes: 32, min_notes: 100000}\ninput: corpusB\n")
    with pytest.raises(ConfigErrors) as exc:
        load_config(p)
    second, first = exc.value.problems  # in the order of the second keys
    assert first.location == "input" and first.file == str(p)
    assert "key 'input' is given twice (line 1 and line 6)" in first.reason
    assert second.location == "stages[1].filter.min_notes"
    assert "(line 5, column 14 and line 5, column 29)" in second.reason
    assert "delete one of them" in second.reason


def test_a_config_that_is_not_utf8_names_the_byte_and_line(tmp_path):
    # common practice: a Latin-1 editor's umlaut (0xfc) is not valid UTF-8
    p = tmp_path / "latin1.yaml"
    p.write_bytes(b"input: in\n# f\xfcr die Demo\noutput: out\nstages: [validate]\n")
    with pytest.raises(ConfigError) as exc:
        load_config(p)
    assert exc.value.file == str(p) and exc.value.location == "line 2"
    assert "not UTF-8 text (byte 13: 0xfc); save the file as UTF-8" in exc.value.reason


@pytest.mark.parametrize("stage, opts, where, shown", [
    ("split", {"ratios": {"train": float("nan"), "test": 0.5}}, "split.ratios.train", "nan"),
    ("split", {"ratios": {"train": 0.5, "test": float("inf")}}, "split.ratios.test", "inf"),
    ("filter", {"min_seconds": float("nan")}, "filter.min_seconds", "nan"),
    ("filter", {"max_note_s": float("nan")}, "filter.max_note_s", "nan"),
    ("filter", {"min_notes": float("nan")}, "filter.min_notes", "nan"),
    ("filter", {"max_polyphony": float("inf")}, "filter.max_polyphony", "inf"),
    ("filter", {"notes_per_s": [float("nan"), 10]}, "filter.notes_per_s[0]", "nan"),
    ("transpose", {"bass_weight": float("inf")}, "transpose.bass_weight", "inf"),
    ("key_meter", {"final_weight": float("nan")}, "key_meter.final_weight", "nan"),
    ("dedup", {"threshold": float("-inf")}, "dedup.threshold", "-inf")])
def test_nan_and_infinities_are_refused_by_every_number_option(stage, opts, where, shown):
    """IEEE 754 (common practice): NaN compares false with everything, so ``x < .nan`` switched
    a filter rule off and NaN ratios passed 'sum to 1'; ``int(.nan)`` and ``int(.inf)`` raised
    a traceback from the whole-number checks. One check refuses them with the key path."""
    with pytest.raises(ConfigError) as exc:
        parse_config(_cfg([{"validate": {}}, {stage: opts}]), source="c.yaml")
    assert exc.value.location == f"stages[1].{where}"
    assert f"must be a finite number, got {shown} (NaN fails every comparison" in exc.value.reason
    assert ("(null switches it off)" in exc.value.reason) == (stage == "filter")


@pytest.mark.parametrize("given, where", [({"workers": "abc"}, "--workers"),
                                          ({"executor": "bogus://x"}, "--executor")])
def test_a_bad_command_line_value_names_the_option_not_the_config(given, where, tmp_path):
    """README, Commands: --workers and --executor override the config. Their bad values were
    reported as '<config file>: workers: ...', pointing at a file that never held them."""
    p = tmp_path / "c.yaml"
    p.write_text(yaml.safe_dump(_cfg(["validate"])))
    with pytest.raises(ConfigError) as exc:
        load_config(p, **given)
    assert exc.value.file == "the command line" and exc.value.location == where
    assert str(p) not in exc.value.message
