"""The nothing-changed shortcut: a rerun whose inputs, options and outputs are all as the last
completed run left them does no work beyond proving it.

Two keys are stored with every completed run (in its counts, in the ledger and summary.json):

* ``state_key`` (made by the runner, which has built the stages): every (source, sha256), every
  stage's options fingerprint, the output fingerprint, the package version and the metadata
  table (``rows_base``, also the base of a rerun's row reuse);
* ``quick_key``: every (source, sha256), the config as written (CLI overrides applied, ``workers``
  left out: it changes no output) and the package version.

The same config text and package version give the same fingerprints, so ``quick_key`` decides
as ``state_key`` does, without building the stages. ``midisift run`` checks it first
(``check_up_to_date``) with nothing heavier than YAML and SQLite: no numpy, no stage module, so
an up-to-date rerun costs little more than Python's start-up. Anything unusual (a config it
cannot read, a bad ``workers`` or ``executor``, a missing output folder, a changed file) returns
None and the normal run takes over and reports it.
"""
from __future__ import annotations

import hashlib
import json
import time
from pathlib import Path
from typing import Any, Callable

from .. import __version__
from ..outputs.changes import Changes
from ..outputs.table import RunReport, in_part_order, split_lines

NOTE = "nothing changed since the last run: outputs are up to date"


def files_hash(files: Any) -> Any:
    """A sha256 hash fed with every (source, sha256) pair of ``files`` (a
    ``sources.SourceTable``), for ``state_key`` and ``quick_key`` to extend (each extends a copy:
    the files are hashed once a run)."""
    h = hashlib.sha256()
    rel, sha256 = files.rel, files.sha256
    for i in range(len(files)):
        h.update(f"{rel(i)}\0{sha256(i)}\n".encode("utf-8", "surrogateescape"))
    return h


def rows_base(stages: list, output_fp: str, metadata_digest: str) -> str:
    """What every manifest row depends on besides its own file: the stages, their options
    fingerprints (which include their versions), the output fingerprint, the package version
    and the metadata table (its columns are in the rows; ``pipeline.outputs.rowreuse``)."""
    h = hashlib.sha256()
    for st in stages:
        h.update(f"{st.name}:{st.kind}:{st.fingerprint}\n".encode())
    h.update(f"{output_fp}\nmidisift {__version__}".encode())
    h.update(f"\nmetadata {metadata_digest}".encode())
    return h.hexdigest()


def state_key(files_h: Any, base: str) -> str:
    """Hash of everything a run's outputs depend on: every (source, sha256) (``files_h``, made
    by ``files_hash``) and ``rows_base``."""
    h = files_h.copy()
    h.update(base.encode())
    return h.hexdigest()


def quick_key(raw: dict[str, Any], files_h: Any) -> str:
    """Hash of the sources (``files_h``, made by ``files_hash``), the config as written (without
    ``workers`` and ``executor``, which change where the work runs, not its results) and the
    version."""
    h = files_h.copy()
    settings = {k: v for k, v in raw.items() if k not in ("workers", "executor")}
    h.update(json.dumps(settings, sort_keys=True, default=str).encode("utf-8", "surrogateescape"))
    h.update(f"midisift {__version__}".encode())
    if isinstance(raw.get("metadata"), str):  # an edited table changes the manifest
        from ..metadata import table_digest
        h.update(f"metadata {table_digest(Path(raw['metadata']))}".encode())
    return h.hexdigest()


def last_summary_if(ledger: Any, out: Path, name: str, key: str) -> dict | None:
    """The last completed run's summary when its key ``name`` equals ``key`` and its outputs
    are all still as it wrote them, else None: the manifest with the size and modification time
    the run recorded, the split lists (those of its parts, no other) naming in sorted order
    exactly the normalized files it recorded, and ``midi/`` holding those files and no other
    (audits found an added line, a list out of order, a stray list and a stray file kept)."""
    last = ledger.last_run()
    if last is None or last["counts"].get(name) != key:
        return None
    try:
        summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if summary.get("counts", {}).get(name) != key or not (out / "manifest.jsonl").is_file():
        return None
    from ..outputs.rowreuse import STATE as ROWS_STATE, file_stat
    if ledger.state_value(ROWS_STATE, "manifest") != file_stat(out / "manifest.jsonl"):
        return None
    recorded = ledger.outputs()
    parts = summary.get("split", {}).get("outputs", {})
    try:
        lists = {p.name for p in (out / "splits").glob("*.txt")}
    except OSError:
        return None
    if lists != {f"{part}.txt" for part in parts}:  # a list the run did not write
        return None
    listed: list[str] = []
    for part in parts:
        try:
            lines = (out / "splits" / f"{part}.txt").read_text(encoding="utf-8").splitlines()
        except (OSError, UnicodeDecodeError):
            return None
        if lines != sorted(lines) or not all(line.startswith(f"midi/{part}/") for line in lines):
            return None
        listed += lines
    if len(listed) != len(recorded) or set(listed) != recorded.keys():
        return None
    from ..outputs.files import files_below
    if files_below(out, "midi") != recorded.keys():  # each recorded file there, and no other
        return None
    return summary


def report_from(summary: dict, output: Path, seconds: float, notes: list[str]) -> RunReport:
    """The table of a run that found nothing to do."""
    dropped = {(stage, reason): n for stage, info in summary.get("stages", {}).items()
               for reason, n in info.get("dropped", {}).items()}
    counts = summary["counts"]
    split = summary.get("split", {})
    parts = in_part_order(dict(split.get("outputs", {})), split.get("part_order"))
    return RunReport(output, counts["files"], counts["kept"], dropped, {"total": seconds}, 0,
                     counts.get("contents", 0), parts, notes + [NOTE], summary.get("warnings", []),
                     split_lines=split_lines(split.get("stage")))


def record_unchanged(ledger: Any, out: Path, summary: dict, run_id: int, quick: str,
                     seconds_discover: float, t_start: float,
                     skipped: list[tuple[str, str]]) -> None:
    """Finish the logged run ``run_id`` that found nothing to do: summary.json keeps the last
    run's content with fresh timings, this run's ``quick_key`` (the config may be written
    differently) and the entries this run's listing left out (``skipped``: path, why; they
    may have changed without any input file changing)."""
    from ..outputs.summary import skipped_summary, write_summary
    summary["skipped"] = skipped_summary(skipped)
    ledger.put_skipped(skipped)
    summary["counts"]["quick_key"] = quick
    summary["counts"].update(computed=0, reused=summary["counts"].get("contents", 0))
    summary["timings_s"] = {"discover": round(seconds_discover, 4),
                            "total": round(time.perf_counter() - t_start, 4)}
    summary["unchanged_since_last_run"] = True
    summary["changes_since_last_run"] = Changes().as_dict()  # not the last run's changes
    # the same summary with fresh timings: no fsync, which waits for whatever else the disk is
    # writing (after a power cut the previous summary, equal but for the timings, is there)
    write_summary(out, summary, fsync=False)
    ledger.finish_run(run_id, summary["counts"])
    # report.html's numbers are summary.json's: its part on the run itself follows (an audit
    # found the page still giving the last run's counts and timings)
    from ..outputs.page import rewrite_run_tail, write_report
    if not rewrite_run_tail(out, summary):
        write_report(out, summary)


def check_up_to_date(config_path: str | Path, *, input: str | None = None,
                     output: str | None = None, workers: str | int | None = None,
                     executor: str | None = None,
                     on_discover: Callable[[Any], None] | None = None) -> RunReport | None:
    """The report of an up-to-date rerun, done without building the stages; None when the
    normal run must decide (see the module docstring), which includes a bad ``workers`` or
    ``executor`` (the config's or the override given): they are not in ``quick_key``, so only
    this check can keep them from passing as up to date. ``on_discover`` receives the
    ``sources.Discovery`` made on the way, for the run that follows (no second listing)."""
    t_start = time.perf_counter()
    from ..errors import ConfigError, MidisiftError
    from ..settings import parse_executor, parse_workers, read_config, with_overrides
    try:  # the normal run reports a config it cannot read (exit 2), as config.load_config
        raw = read_config(config_path)
    except ConfigError:
        return None
    if not isinstance(raw, dict):
        return None
    raw = with_overrides(raw, input=input, output=output, workers=workers, executor=executor)
    try:  # the normal run reports a bad value (exit 2) before it writes anything
        parse_workers(raw.get("workers"))
        parse_executor(raw.get("executor"))
    except ConfigError:
        return None
    if not isinstance(raw.get("input"), str) or not isinstance(raw.get("output"), str):
        return None
    inp, out = Path(raw["input"]), Path(raw["output"])
    if not inp.is_dir() or not (out / "state.sqlite").is_file() or not (out / "summary.json").is_file():
        return None
    from ..store.ledger import Ledger
    from ..store.lock import OutputLock
    from .sources import Discovery, check_folders, discover, fingerprint
    try:
        check_folders(inp, out)
    except MidisiftError:
        return None
    with OutputLock(out):
        with Ledger(out / "state.sqlite") as ledger:
            last = ledger.last_run()
            if last is None or "quick_key" not in last["counts"]:
                return None
            t = time.perf_counter()
            files, notes = discover(inp, out)
            if on_discover is not None:
                on_discover(Discovery(inp.resolve(), out.resolve(), files, notes))
            known = ledger.sources()
            if len(files) != len(known) or any(files.rel(i) not in known for i in range(len(files))):
                return None  # files added or removed: the normal run records them
            changed = fingerprint(files, known, notes)
            seconds_discover = time.perf_counter() - t
            # files touched with their bytes unchanged: their new stat spares the next check a
            # hash. A file whose bytes changed is left for the run to record: the run finds
            # the changed files by their recorded hashes, and an audit found a swap of two
            # files' contents passing unseen (stale manifest rows) once they were written here
            touched = [row for row in changed if known[row[0]][2] == row[3]]
            if touched:
                with ledger.batch():
                    ledger.put_sources(touched)
            quick = quick_key(raw, files_hash(files))
            summary = last_summary_if(ledger, out, "quick_key", quick)
            if summary is None:
                return None
            with ledger.batch():
                run_id = ledger.start_run({"config": raw, "stages": last["config"].get("stages")})
                record_unchanged(ledger, out, summary, run_id, quick, seconds_discover, t_start,
                                 files.skipped)
    return report_from(summary, out, time.perf_counter() - t_start, notes)
