"""Argument parsing only: turns argv into calls. Exit codes: 0 ok, 1 runtime failure (leakage: leaks
found), 2 bad usage/config, 3 a leakage audit that could not read every listed file."""
from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from .errors import ConfigError, MidisiftError, UsageError
from .reasons import RETRYABLE


def _version() -> str:
    """The installed distribution's version (the package metadata, not a copy of it)."""
    from importlib.metadata import PackageNotFoundError, version
    try:
        return version("midisift")
    except PackageNotFoundError:
        return "unknown (not installed)"


class _VersionAction(argparse.Action):
    """``--version``: the version is looked up only when asked for (speed: reading the package
    metadata costs every command about 70 ms of start-up, DEVELOPERS.md, Measurement history,
    Throughput)."""

    def __init__(self, option_strings: list[str], dest: str = argparse.SUPPRESS, **kwargs: Any):
        super().__init__(option_strings, dest=dest, nargs=0, default=argparse.SUPPRESS,
                         help="show program's version number and exit")

    def __call__(self, parser: argparse.ArgumentParser, *args: Any) -> None:
        print(f"midisift {_version()}")
        parser.exit()


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="midisift", description="Prepare MIDI training corpora.")
    p.add_argument("--version", action=_VersionAction)
    sub = p.add_subparsers(dest="command", required=True)

    r = sub.add_parser("run", help="run a config over its input folder")
    r.add_argument("config", help="YAML config file, e.g. configs/default.yaml")
    r.add_argument("--input", help="input folder (overrides the config)")
    r.add_argument("--output", help="output folder (overrides the config)")
    r.add_argument("--workers", help="'auto' or a number of worker processes (overrides the config)")
    r.add_argument("--executor", metavar="local|tcp://HOST:PORT",
                   help="where the per-file work runs: 'local' worker processes or a Dask "
                        "scheduler's address (overrides the config; needs the dask extra)")
    r.add_argument("--fresh", action="store_true", help="ignore cached results and recompute everything")
    r.add_argument("--quiet", action="store_true", help="no progress bars and no summary table")
    r.add_argument("--reassign", action="store_true", help="place every group again (files may change part); "
                   "with --fresh, the split of a first run over the same files")
    r.add_argument("--retry-failed", action="store_true",
                   help=f"recompute files that failed in an earlier run with {', '.join(RETRYABLE)} "
                        "or too_large against the per-file memory limit max_memory_mb (such "
                        "verdicts are cached otherwise)")

    e = sub.add_parser("explain", help="print the whole decision trail of one file")
    e.add_argument("file", help="source path (as in the manifest, or under the input folder) or an id")
    e.add_argument("--output", default="out/demo",
                   help="output folder of the run (default: out/demo, the output of configs/default.yaml)")
    e.add_argument("--json", action="store_true", help="print the trail as JSON (the same steps as data)")

    s = sub.add_parser("synth", help="generate a demo/benchmark corpus with planted cases and truth.json",
                       formatter_class=argparse.ArgumentDefaultsHelpFormatter)
    s.add_argument("dir")
    s.add_argument("--count", type=int, default=80, help="number of files")
    s.add_argument("--seed", type=int, default=0, help="random seed (the same seed gives the same files)")
    s.add_argument("--profile", choices=("small", "large"), default="small",
                   help="small: ~5 KB, ~500 notes; large: ~60 KB, ~8,000 notes per file")
    s.add_argument("--naming", choices=("plain", "workshop"), default="plain",
                   help="file names: plain numbered folders, or the demo corpus's invented workshop library")
    s.add_argument("--planted", type=float, help="fraction of files that are planted cases, from 0 to below 0.6 (default: the "
                   "generator's mix)")
    s.add_argument("--force", action="store_true",
                   help="write into a folder that is not empty (files of the same names are "
                        "overwritten; nothing is deleted)")

    lk = sub.add_parser("leakage", help="audit a split for near-duplicates across its parts")
    lk.add_argument("output", nargs="?", help="an output folder of ours (splits/*.txt)")
    lk.add_argument("--part", action="append", default=[], metavar="NAME=LIST",
                    help="a part of your own split: a text file with one MIDI path per line (repeat)")
    lk.add_argument("--threshold", type=float, help="similarity that counts as a leak")
    lk.add_argument("--json", dest="json_out", help="also write the report as JSON to this file")

    x = sub.add_parser("export", help="write a finished run's files as piano-roll or event-token shards")
    x.add_argument("output", help="the output folder of a finished run")
    x.add_argument("--format", required=True, metavar="FORMAT", help="pianoroll or events")
    x.add_argument("--step", type=float, metavar="S", help="seconds per frame (pianoroll, default 0.05) or per "
                   "time-shift step (events, default 0.01)")
    x.add_argument("--per-beat", type=int, metavar="N", help="pianoroll: frames per quarter-note beat instead of --step")
    x.add_argument("--pitch-low", type=int, metavar="P", help="pianoroll: lowest pitch kept (default 0)")
    x.add_argument("--pitch-high", type=int, metavar="P", help="pianoroll: highest pitch kept (default 127)")
    x.add_argument("--drums", default="omit", metavar="omit|apart", help="omit (default): leave the drum channel out; "
                   "apart: write it as its own array beside each piece's")
    x.add_argument("--window", type=float, metavar="W", help="pianoroll: fixed windows of this length (seconds, "
                   "or beats with --per-beat; a whole number of frames)")
    x.add_argument("--hop", type=float, metavar="H", help="pianoroll: a window starts every HOP (default: the window; "
                   "a whole number of frames)")
    x.add_argument("--max-shift", type=float, metavar="S", help="events: longest time shift, seconds (default 1; "
                   "a whole number of steps)")
    x.add_argument("--velocity-bins", type=int, metavar="N", help="events: velocity bins (default 32)")
    x.add_argument("--previews", type=int, metavar="N", help="pianoroll: PNG previews of the first N pieces")
    x.add_argument("--sustain", action="store_const", const=True, help="pianoroll: the sustain pedal "
                   "(control change 64) holds notes until it comes up (default: ignored)")
    x.add_argument("--shard-mb", type=float, metavar="MB", default=64.0, help="bound of a shard's array bytes (default 64)")
    x.add_argument("--quiet", action="store_true", help="print nothing")

    b = sub.add_parser("bench", help="side-by-side throughput benchmark; prints a table, writes bench.json")
    b.add_argument("--quick", action="store_true", help="small corpora (a smoke run, minutes not tens of minutes)")
    b.add_argument("--out", default="bench-out", help="scratch folder for corpora and outputs")
    b.add_argument("--json", dest="json_out", default="bench.json")
    b.add_argument("--only", action="append", default=[], help="run only the named sections (repeat)")
    b.add_argument("--mem-sizes", metavar="N,N,...",
                   help="file counts of the memory section's full runs, each a multiple of the first "
                        "(default 10000,100000; --quick 500,2000); reruns at the second")
    b.add_argument("--run-timeout", type=float, metavar="S",
                   help="stop a measured run after S seconds and report it unfinished (default 600, --quick "
                        "3600; the memory section scales it with the size past its second)")
    return p


def _run(args: argparse.Namespace) -> int:
    seen: list = []  # the up-to-date check's listing of the input folder, reused by the run
    if not (args.fresh or args.reassign or args.retry_failed):
        # an up-to-date rerun is recognised before the stages (and numpy) are even imported
        from .engine.uptodate import check_up_to_date
        report = check_up_to_date(args.config, input=args.input, output=args.output,
                                  workers=args.workers, executor=args.executor,
                                  on_discover=seen.append)
        if report is not None:
            if not args.quiet:
                print(report.table())
            return 0
    from .config import load_config
    from .engine.runner import Runner
    cfg = load_config(args.config, input=args.input, output=args.output, workers=args.workers,
                      executor=args.executor)
    report = Runner(cfg, fresh=args.fresh, quiet=args.quiet, reassign=args.reassign,
                    retry_failed=args.retry_failed, discovered=seen[0] if seen else None).run()
    if not args.quiet:
        print(report.table())
    return 0


def _explain(args: argparse.Namespace) -> int:
    from .audit.explain import explain
    print(explain(Path(args.output), args.file, as_json=args.json))
    return 0


def _synth(args: argparse.Namespace) -> int:
    from .tools.synth import main_synth
    if args.count < 1:
        raise UsageError(f"--count must be at least 1, got {args.count}")
    made = main_synth(Path(args.dir), args.count, args.seed, args.profile, naming=args.naming,
                      planted=args.planted, force=args.force)
    expected = ", ".join(f"{n:,} {what}" for what, n in sorted(made["expect"].items()))
    print(f"wrote {made['files']:,} files and truth.json to {made['out_dir']} (expected verdicts: {expected})")
    return 0


def _leakage(args: argparse.Namespace) -> int:
    from .audit.leakage import main_leakage
    if not args.output and not args.part:
        raise UsageError("give an output folder or at least two --part NAME=LIST options")
    return main_leakage(args)


def _export(args: argparse.Namespace) -> int:
    from .export import ExportOptions, export_output
    opts = ExportOptions(args.format, step=args.step, per_beat=args.per_beat, pitch_low=args.pitch_low,
                         pitch_high=args.pitch_high, drums=args.drums, window=args.window, hop=args.hop,
                         max_shift=args.max_shift, velocity_bins=args.velocity_bins,
                         previews=args.previews, shard_mb=args.shard_mb, sustain=args.sustain)
    result = export_output(Path(args.output), opts)
    if not args.quiet:
        print(result.table())
    return 0


def _bench(args: argparse.Namespace) -> int:
    from .tools.bench import main_bench
    return main_bench(args)


COMMANDS = {"run": _run, "explain": _explain, "synth": _synth, "leakage": _leakage, "export": _export,
            "bench": _bench}


class _Terminated(KeyboardInterrupt):
    """SIGTERM (a batch scheduler's stop, `kill`): handled like Ctrl-C, so finished work is
    saved, with the shell's exit status for that signal."""


def _on_sigterm(signum: int, frame: object) -> None:
    raise _Terminated()


def _escape_what_stdout_cannot_take() -> None:
    """Print what the terminal's encoding cannot hold (a file name in Unicode on an ASCII or
    Latin-1 stdout; a name that is not UTF-8, held as surrogates) as backslash escapes rather
    than raise UnicodeEncodeError: Python's stdout is strict by default, stderr already escapes."""
    reconfigure = getattr(sys.stdout, "reconfigure", None)
    if reconfigure is not None and getattr(sys.stdout, "errors", None) == "strict":
        reconfigure(errors="backslashreplace")


def main(argv: list[str] | None = None) -> int:
    import signal
    args = _parser().parse_args(argv)
    _escape_what_stdout_cannot_take()
    previous = None
    try:
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:  # not the main thread (an embedding program): leave its handler alone
        pass
    try:
        return _dispatch(args)
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def _dispatch(args: argparse.Namespace) -> int:
    """Run one command; map errors and interruptions to exit codes."""
    try:
        return COMMANDS[args.command](args)
    except (ConfigError, UsageError) as e:
        print(f"midisift: error: {e.message}", file=sys.stderr)
        return 2
    except MidisiftError as e:
        print(f"midisift: {e.message}", file=sys.stderr)
        return 1
    except KeyboardInterrupt as e:
        what = "stopped by SIGTERM" if isinstance(e, _Terminated) else "interrupted"
        print(f"midisift: {what}; finished work is saved: rerun the same command to continue "
              "where it stopped", file=sys.stderr)
        return 143 if isinstance(e, _Terminated) else 130  # 128 + the signal, as shells report
    except BrokenPipeError:  # output piped into e.g. `head`, which stopped reading: not an error
        from .outputs.table import stdout_gone
        stdout_gone()
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
