"""The command line: exit codes, the summary table, synth and leakage wiring."""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from pipeline.cli import main

ROOT = Path(__file__).resolve().parents[1]


def test_run_prints_summary_table(tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["run", str(ROOT / "configs" / "validate-only.yaml"), "--output", str(out), "--workers", "1"]) == 0
    text = capsys.readouterr().out
    assert "files in" in text and "kept" in text and "dropped  validate / not_midi" in text
    assert (out / "manifest.jsonl").is_file() and (out / "splits" / "all.txt").is_file()


def test_run_and_up_to_date_tables_align_and_list_parts_in_config_order(tmp_path, capsys):
    """The table a run prints and the one of the nothing-changed rerun after it: one column of
    counts whatever the length of a reason code, parts in the order the config names them
    (here not alphabetical: train, valid, test)."""
    out = tmp_path / "out"
    args = ["run", str(ROOT / "configs" / "default.yaml"), "--input", str(ROOT / "sample_corpus"),
            "--output", str(out), "--workers", "1"]
    tables = []
    for _ in range(2):
        assert main(args) == 0
        tables.append(capsys.readouterr().out)
    assert "nothing changed" in tables[1]
    for text in tables:
        rows = [line for line in text.splitlines()  # the count rows (not the split's sentences)
                if line.startswith(("files in", "kept", "dropped", "split")) and line[-1:].isdigit()]
        assert any("unsupported_format" in r for r in rows)  # the demo corpus's longest reason code
        assert len({len(r) for r in rows}) == 1, rows  # counts right-aligned in one column
        assert [r.split()[1] for r in rows if r.startswith("split")] == ["train", "valid", "test"]


def test_bad_usage_exits_2():
    proc = subprocess.run([sys.executable, "-m", "pipeline.cli", "run"], capture_output=True, text=True, cwd=ROOT)
    assert proc.returncode == 2
    assert "config" in proc.stderr


def test_bad_workers_override_exits_2(tmp_path, capsys):
    assert main(["run", str(ROOT / "configs" / "default.yaml"), "--workers", "0",
                 "--output", str(tmp_path / "o")]) == 2
    assert "workers must be 'auto' or a whole number >= 1, got 0" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("below", [False, True])
def test_an_output_path_that_is_a_file_exits_2_and_writes_nothing(below, tmp_path, capsys):
    """README, Commands: bad usage exits 2 with nothing written. An output path naming an
    existing file (or a folder below one) exited 1 with 'cannot create the output folder'."""
    afile = tmp_path / "notes.txt"
    afile.write_text("mine\n")
    out = afile / "run" if below else afile
    assert main(["run", str(ROOT / "configs" / "validate-only.yaml"), "--output", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert f"{afile}: this is a file, not a folder" in err and "must name a folder" in err
    assert afile.read_text() == "mine\n" and sorted(tmp_path.iterdir()) == [afile]


def test_synth_writes_files_and_truth(tmp_path, capsys):
    assert main(["synth", str(tmp_path / "c"), "--count", "12", "--seed", "3"]) == 0
    truth = json.loads((tmp_path / "c" / "truth.json").read_text())
    assert len(truth["files"]) == 12
    # it says what it wrote (an audit: nothing was printed on success)
    assert "wrote 12 files and truth.json" in capsys.readouterr().out
    for rel in truth["files"]:
        assert (tmp_path / "c" / rel).is_file()


def test_synth_rejects_bad_count(capsys, tmp_path):
    assert main(["synth", str(tmp_path / "c"), "--count", "0"]) == 2
    assert "--count must be at least 1" in capsys.readouterr().err


@pytest.mark.parametrize("planted", ["0.6", "0.8", "1", "nan"])
def test_synth_states_the_planted_rule_and_exits_2(planted, capsys, tmp_path):
    """The command line let 0.6 to 1 through ('a fraction from 0 to 1'), then the generator
    raised a ValueError traceback: it keeps the rest of the files as the originals its planted
    variants copy (pipeline.tools.synth.scale_mix)."""
    assert main(["synth", str(tmp_path / "c"), "--count", "5", "--planted", planted]) == 2
    assert "--planted: the planted fraction must be from 0 to below 0.6" in capsys.readouterr().err
    assert not (tmp_path / "c").exists()


def test_synth_into_a_folder_it_cannot_create_exits_2(capsys, tmp_path):
    (tmp_path / "afile").write_text("")
    assert main(["synth", str(tmp_path / "afile" / "c"), "--count", "5"]) == 2
    err = capsys.readouterr().err
    assert f"{tmp_path / 'afile' / 'c'}: cannot create the folder (Not a directory)" in err


def test_leakage_exit_codes(tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["run", str(ROOT / "configs" / "default.yaml"), "--output", str(out), "--quiet"]) == 0
    assert main(["leakage", str(out)]) == 0
    assert "no cross-part near-duplicates" in capsys.readouterr().out
    train = [str(out / p) for p in (out / "splits" / "train.txt").read_text().splitlines()]
    (tmp_path / "a.txt").write_text("\n".join(train[:10]) + "\n")
    (tmp_path / "b.txt").write_text("\n".join(train[5:12]) + "\n")  # 5 files in both parts
    report = tmp_path / "leaks.json"
    code = main(["leakage", "--part", f"a={tmp_path / 'a.txt'}", "--part", f"b={tmp_path / 'b.txt'}",
                 "--json", str(report)])
    assert code == 1
    data = json.loads(report.read_text())
    assert len(data["leaks"]) >= 5
    with pytest.raises(SystemExit):
        main(["leakage", "--threshold"])


def test_version_and_synth_help_show_defaults(capsys):
    from importlib.metadata import version
    with pytest.raises(SystemExit) as exc:
        main(["--version"])
    assert exc.value.code == 0
    assert capsys.readouterr().out.strip() == f"midisift {version('midisift')}"
    with pytest.raises(SystemExit):
        main(["synth", "--help"])
    text = capsys.readouterr().out
    assert "(default: 80)" in text and "(default: 0)" in text and "(default: small)" in text


def test_a_run_imports_only_the_runtime_dependencies(tmp_path):
    """pyproject's `dependencies` are what a run imports; music21, datasketch, mido and
    pretty_midi are extras (evaluation, bench peer, fuzzer), so a default run must not import
    them."""
    code = ("import sys; from pipeline.cli import main; "
            f"rc = main(['run', {str(ROOT / 'configs' / 'default.yaml')!r}, '--input', "
            f"{str(ROOT / 'sample_corpus')!r}, '--output', {str(tmp_path / 'o')!r}, '--quiet', "
            "'--workers', '1']); "
            "print(rc, sorted(m for m in ('music21', 'datasketch', 'mido', 'pretty_midi') "
            "if m in sys.modules))")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=tmp_path)
    assert proc.stdout.split("\n")[-2] == "0 []", proc.stdout + proc.stderr


def test_the_run_path_never_imports_the_developer_tools(tmp_path):
    """pipeline.tools (synth, bench, fuzz, docs, evaluations) and the read-side commands are
    apart from the run path (DEVELOPERS.md, Architecture): a run, fresh and up to date, loads
    none of them."""
    code = ("import sys; from pipeline.cli import main; "
            f"args = ['run', {str(ROOT / 'configs' / 'default.yaml')!r}, '--input', "
            f"{str(ROOT / 'sample_corpus')!r}, '--output', {str(tmp_path / 'o')!r}, '--quiet', "
            "'--workers', '1']; "
            "rc = main(args) + main(args); "
            "print(rc, sorted(m for m in sys.modules if m.startswith(('pipeline.tools', "
            "'pipeline.audit', 'pipeline.analysis.evaluate', 'pipeline.analysis.train', "
            "'pipeline.tools.eval_sets'))))")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=tmp_path)
    assert proc.stdout.split("\n")[-2] == "0 []", proc.stdout + proc.stderr


def test_leakage_writes_its_json_and_keeps_its_exit_status_when_stdout_is_closed(tmp_path):
    """`midisift leakage ... --json FILE | head`: a reader that stops early must not cost the
    JSON file (written before the table), and the exit status stays the documented one (README,
    Commands: 1, leaks found) with no traceback. The reader here is gone before the command
    starts (a pipe whose read end is closed), so the first write fails with EPIPE."""
    files = sorted(str(p) for p in (ROOT / "sample_corpus").rglob("*.mid"))[:12]
    (tmp_path / "a.txt").write_text("\n".join(files[:10]) + "\n")
    (tmp_path / "b.txt").write_text("\n".join(files[5:]) + "\n")  # 5 files in both parts
    report = tmp_path / "leaks.json"
    read_end, write_end = os.pipe()
    os.close(read_end)
    try:
        proc = subprocess.run([sys.executable, "-m", "pipeline.cli", "leakage", "--part", f"a={tmp_path / 'a.txt'}",
                               "--part", f"b={tmp_path / 'b.txt'}", "--json", str(report)],
                              stdout=write_end, stderr=subprocess.PIPE, text=True, cwd=ROOT)
    finally:
        os.close(write_end)
    assert proc.returncode == 1, proc.stderr
    assert proc.stderr == ""
    assert len(json.loads(report.read_text())["leaks"]) >= 5


def test_explain_escapes_what_a_non_utf8_stdout_cannot_take(tmp_path):
    """Python's stdout is strict (PYTHONIOENCODING=ascii, a legacy locale: common practice), so
    explain of a file with a non-ASCII name ended in a UnicodeEncodeError traceback (exit 1)."""
    inp = tmp_path / "in" / "ünïcödé"
    inp.mkdir(parents=True)
    first = sorted((ROOT / "sample_corpus" / "sessions").rglob("*.mid"))[0]
    (inp / "曲 №1.mid").write_bytes(first.read_bytes())
    cfg = tmp_path / "c.yaml"
    cfg.write_text(f"input: {tmp_path / 'in'}\noutput: {tmp_path / 'out'}\nworkers: 1\nstages: [validate]\n",
                   encoding="utf-8")
    assert main(["run", str(cfg), "--quiet"]) == 0
    env = {**os.environ, "PYTHONIOENCODING": "ascii", "PYTHONPATH": str(ROOT)}
    proc = subprocess.run([sys.executable, "-m", "pipeline.cli", "explain", "ünïcödé/曲 №1.mid",
                           "--output", str(tmp_path / "out")], capture_output=True, cwd=ROOT, env=env)
    assert proc.returncode == 0, proc.stderr
    assert b"source   \\xfcn\\xefc\\xf6d\\xe9/\\u66f2 \\u21161.mid" in proc.stdout
