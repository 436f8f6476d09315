"""Leakage audit: near-duplicate pairs that sit in different parts of a split.

Works on our output folder (``splits/*.txt``, paths relative to the folder) or on a user's own
split given as lists of MIDI paths, so a split made elsewhere can be audited. Each file is
decoded with ``pipeline.midi.decode.decode`` and signed with ``pipeline.similarity.minhash.signature_of``; pairs
come from ``pipeline.similarity.grouping.near_links`` (the same search the split stage groups with, so an
output folder of ours audited at its grouping threshold must show none), plus equal content
hashes (the same notes, e.g. one file listed in two parts, even when it has no melody to shingle).
Files that cannot be read or decoded are listed and end the audit with its own exit code
(``INCOMPLETE``) when it found no leak: a CI gate must not pass a split it could not check.

The signing and pairing functions are parameters, so tests and other callers can inject them.
"""
from __future__ import annotations

import argparse
import json
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from ..errors import MidisiftError, UsageError
from ..outputs.table import stdout_gone
from ..store.atomic import read_json_object

#: The grouping threshold of the split stage's default config (used when an output folder does
#: not record its own).
DEFAULT_THRESHOLD = 0.2
#: The exit code of an audit that found no leak among the files it read but could not read
#: every listed file (1 is leaks found, 2 bad usage).
INCOMPLETE = 3


@dataclass(frozen=True)
class Leak:
    """One near-duplicate pair across two parts."""

    part_a: str
    path_a: str
    part_b: str
    path_b: str
    similarity: float

    def to_json(self) -> dict:
        return {"part_a": self.part_a, "path_a": self.path_a, "part_b": self.part_b,
                "path_b": self.path_b, "similarity": round(self.similarity, 6)}


@dataclass
class LeakReport:
    """What an audit found: cross-part pairs, per-part file counts and unreadable files."""

    threshold: float
    parts: dict[str, int]
    leaks: list[Leak] = field(default_factory=list)
    failed: list[tuple[str, str, str]] = field(default_factory=list)   # (part, path, reason)
    sources: dict[str, str] = field(default_factory=dict)              # output path -> source

    @property
    def exit_code(self) -> int:
        """The CLI's exit code: 1 when leaks were found, else ``INCOMPLETE`` when a listed file
        could not be read (it was not checked), else 0."""
        return 1 if self.leaks else INCOMPLETE if self.failed else 0

    def to_json(self) -> dict:
        leaks = []
        for lk in self.leaks:
            row = lk.to_json()
            for side, path in (("source_a", lk.path_a), ("source_b", lk.path_b)):
                if path in self.sources:
                    row[side] = self.sources[path]
            leaks.append(row)
        return {"threshold": self.threshold, "parts": dict(self.parts), "leaks": leaks,
                "leak_count": len(self.leaks),
                "failed": [{"part": p, "path": f, "reason": r} for p, f, r in self.failed]}


Signer = Callable[[Any], tuple[Any, Any, str]]
Linker = Callable[..., list[tuple[str, str, float]]]


def _default_decode(path: Path) -> Any:
    from ..midi.decode import decode_file
    return decode_file(path)


def _default_signer(opts: dict | None) -> Signer:
    from ..similarity.minhash import signature_of
    return lambda piece: signature_of(piece, opts)


def _default_linker() -> Linker:
    from ..similarity.grouping import near_links
    return near_links


def audit(parts: dict[str, list[Path]], threshold: float, *, sig_opts: dict | None = None,
          decode: Callable[[Path], Any] | None = None, sign: Signer | None = None,
          link: Linker | None = None, display: Callable[[Path], str] = str) -> LeakReport:
    """Find near-duplicate pairs (similarity >= ``threshold``) lying in different parts.

    ``parts`` maps a part name to its files. ``decode`` (path -> piece), ``sign`` (piece ->
    (signature, shingles, content_hash)) and ``link`` (signatures, threshold, shingles -> pairs)
    default to the project's decoder, ``signature_of(piece, sig_opts)`` and ``near_links``.
    ``display`` turns a path into the string shown in the report.
    """
    if not 0 < threshold <= 1:
        raise UsageError(f"the leakage threshold must be in (0, 1], got {threshold}; "
                         f"the split's default grouping threshold is {DEFAULT_THRESHOLD}")
    decode = decode or _default_decode
    sign = sign or _default_signer(sig_opts)
    link = link or _default_linker()
    where: dict[str, tuple[str, str]] = {}
    sigs: dict[str, Any] = {}
    shingles: dict[str, Any] = {}
    by_hash: dict[str, list[str]] = {}
    report = LeakReport(threshold, {p: len(v) for p, v in parts.items()})
    for part in sorted(parts):
        for i, path in enumerate(parts[part]):
            key = f"{part}\x1f{i:09d}"
            shown = display(path)
            try:
                piece = decode(Path(path))
                sig, sh, chash = sign(piece)
            except (MidisiftError, OSError) as e:
                report.failed.append((part, shown, getattr(e, "reason", None) or str(e)))
                continue
            except Exception as e:  # a decoder crash must not end the audit  # noqa: BLE001
                report.failed.append((part, shown, f"decoder crash: {type(e).__name__}: {e}"))
                continue
            where[key] = (part, shown)
            sigs[key], shingles[key] = sig, sh
            by_hash.setdefault(chash, []).append(key)
    best: dict[tuple[str, str], float] = {}
    for a, b, sim in link(sigs, threshold, shingles):
        if where[a][0] != where[b][0]:
            k = (min(a, b), max(a, b))
            best[k] = max(best.get(k, 0.0), float(sim))
    for keys in by_hash.values():
        for i, a in enumerate(keys):
            for b in keys[i + 1:]:
                if where[a][0] != where[b][0]:
                    best[(min(a, b), max(a, b))] = 1.0
    for (a, b), sim in best.items():
        (pa, fa), (pb, fb) = where[a], where[b]
        report.leaks.append(Leak(pa, fa, pb, fb, sim))
    report.leaks.sort(key=lambda lk: (-lk.similarity, lk.part_a, lk.path_a, lk.part_b, lk.path_b))
    return report


def read_list(list_file: Path, base: Path | None = None) -> list[Path]:
    """Paths listed one per line ('#' comments and blank lines skipped).

    Relative paths resolve against ``base`` if given, else against the list file's folder,
    falling back to the current directory when the file is not found there; a list of one of
    our output folders (``OUTPUT/splits/<part>.txt`` beside ``OUTPUT/manifest.jsonl``) names
    its files relative to OUTPUT (an audit: ``--part`` found none of our own lists' files).
    """
    folder = Path(list_file).parent
    if base is None and folder.name == "splits" and (folder.parent / "manifest.jsonl").is_file():
        base = folder.parent
    try:
        lines = Path(list_file).read_text(encoding="utf-8").splitlines()
    except OSError as e:
        raise UsageError(f"cannot read the part list: {e.strerror}; give a text file with one "
                         "MIDI path per line", file=str(list_file)) from e
    out = []
    for line in lines:
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        p = Path(line)
        if not p.is_absolute():
            cand = (base or Path(list_file).parent) / p
            p = cand if (base is not None or cand.exists() or not p.exists()) else p
        out.append(p)
    return out


def _find_key(obj: Any, key: str) -> Any:
    """The first value stored under ``key`` anywhere in a JSON tree (None if absent)."""
    if isinstance(obj, dict):
        if key in obj:
            return obj[key]
        obj = list(obj.values())
    if isinstance(obj, list):
        for v in obj:
            found = _find_key(v, key)
            if found is not None:
                return found
    return None


def audit_output(output_dir: Path, threshold: float | None = None, **kwargs: Any) -> LeakReport:
    """Audit one of our output folders: ``splits/<part>.txt`` (paths relative to the folder).

    ``threshold`` defaults to the ``group_threshold`` recorded in ``summary.json``, else
    ``DEFAULT_THRESHOLD``; files are signed as the split signs them (dedup's default signature
    settings, ``split.signature_options``, whatever the run's dedup options: the grouping
    threshold is measured on them). The manifest maps output paths back to sources.
    """
    output_dir = Path(output_dir)
    lists = sorted((output_dir / "splits").glob("*.txt"))
    if not (output_dir / "splits").is_dir():
        raise UsageError(f"no split lists under {output_dir / 'splits'}; is this a midisift "
                         "output folder of a run with a split stage?", file=str(output_dir))
    summary = read_json_object(output_dir / "summary.json")
    if threshold is None:
        threshold = _find_key(summary, "group_threshold") or DEFAULT_THRESHOLD
    if "sig_opts" not in kwargs:  # sign as the split did, not as a dedup of other settings
        from ..stages.split import signature_options
        kwargs["sig_opts"] = signature_options()
    parts = {f.stem: read_list(f, base=output_dir) for f in lists}
    report = audit(parts, float(threshold),
                   display=lambda p: _relative(p, output_dir), **kwargs)
    report.sources = _sources(output_dir / "manifest.jsonl")
    return report


def _relative(p: Path, base: Path) -> str:
    try:
        return Path(p).relative_to(base).as_posix()
    except ValueError:
        return str(p)


def _sources(manifest: Path) -> dict[str, str]:
    out: dict[str, str] = {}
    try:
        with open(manifest, encoding="utf-8") as fh:
            for line in fh:
                row = json.loads(line)
                outs = row.get("output")
                for o in (outs if isinstance(outs, list) else [outs]):
                    if o:
                        out[o] = row.get("source", "")
    except (OSError, ValueError):
        pass
    return out


def format_report(report: LeakReport) -> str:
    """Human report: every offending pair with both paths and its similarity."""
    counts = ", ".join(f"{p} {n}" for p, n in report.parts.items()) or "no parts, 0"
    lines = [f"leakage audit at similarity >= {report.threshold:g} ({counts} files)"]
    for lk in report.leaks:
        a = _with_source(lk.path_a, report.sources)
        b = _with_source(lk.path_b, report.sources)
        lines.append(f"  {lk.similarity:.3f}  {lk.part_a}: {a}  <->  {lk.part_b}: {b}")
    for part, path, reason in report.failed:
        lines.append(f"  unreadable ({part}): {path}: {reason}")
    filled = [p for p, n in report.parts.items() if n]
    if report.leaks:
        verdict = f"{len(report.leaks)} cross-part near-duplicate pair(s) found"
    elif not filled:
        verdict = "nothing to audit: every part is empty (did the run keep any file?)"
    elif len(filled) == 1:
        verdict = f"nothing to compare: only part '{filled[0]}' holds files"
    else:
        verdict = "no cross-part near-duplicates"
    if report.failed:
        verdict += (f"; {len(report.failed)} file(s) could not be read (listed above), so the "
                    "audit is incomplete" + ("" if report.leaks else f" (exit {INCOMPLETE})"))
    lines.append(verdict)
    return "\n".join(lines)


def _with_source(path: str, sources: dict[str, str]) -> str:
    src = sources.get(path)
    return f"{path} (source {src})" if src else path


def parse_part(spec: str) -> tuple[str, Path]:
    """``NAME=LISTFILE`` -> (name, path)."""
    name, sep, path = spec.partition("=")
    if not sep or not name or not path:
        raise UsageError(f"--part expects NAME=LISTFILE (e.g. --part test=test.txt), got {spec!r}")
    return name, Path(path)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """The ``midisift leakage`` options (for the CLI to attach to its subparser)."""
    parser.add_argument("--output", type=Path, help="audit this midisift output folder")
    parser.add_argument("--part", action="append", default=[], metavar="NAME=LISTFILE",
                        help="a part of your own split: a text file with one MIDI path per line "
                             "(repeat for each part; relative paths are read from the list's folder)")
    parser.add_argument("--threshold", type=float, default=None,
                        help=f"similarity at which a pair counts as a leak (default: the output "
                             f"folder's grouping threshold, or {DEFAULT_THRESHOLD})")
    parser.add_argument("--json", metavar="PATH", default=None,
                        help="also write the report as JSON to PATH ('-' for standard output)")


def main_leakage(args: argparse.Namespace, out=None) -> int:
    """Run the audit the CLI asked for; returns the exit code (0 clean, 1 leaks found,
    ``INCOMPLETE`` no leak found but a listed file could not be read).

    Raises ``UsageError`` (exit code 2) for bad usage.
    """
    out = out or sys.stdout
    specs = list(getattr(args, "part", []) or [])
    output = getattr(args, "output", None)
    if bool(specs) == bool(output):
        raise UsageError("give either an output folder of ours ('midisift leakage OUTPUT': audit "
                         "our split) or two or more --part NAME=LISTFILE (audit your own split), "
                         "not both or neither")
    if output:
        report = audit_output(Path(output), args.threshold)
    else:
        parts: dict[str, list[Path]] = {}
        for spec in specs:
            name, path = parse_part(spec)
            if name in parts:
                raise UsageError(f"part {name!r} is given twice; give each part once")
            parts[name] = read_list(path)
        if len(parts) < 2:
            raise UsageError("a leakage audit needs at least two parts, e.g. "
                             "--part train=train.txt --part test=test.txt")
        report = audit(parts, args.threshold if args.threshold is not None else DEFAULT_THRESHOLD)
    json_path = getattr(args, "json_out", None) or getattr(args, "json", None)
    if json_path and json_path != "-":  # before the table: a reader that stops early (| head)
        _write_json(Path(json_path), report.to_json())  # must not cost the file
    text = json.dumps(report.to_json(), indent=2) if json_path == "-" else format_report(report)
    try:
        print(text, file=out)
        out.flush()
    except BrokenPipeError:
        if out is not sys.stdout:
            raise
        stdout_gone()  # the verdict stands: exit 1 for leaks still
    return report.exit_code


def _write_json(path: Path, data: dict) -> None:
    tmp = path.with_name(path.name + ".tmp")
    try:
        tmp.write_text(json.dumps(data, indent=2) + "\n", encoding="utf-8")
        tmp.replace(path)
    except OSError as e:
        raise MidisiftError(f"cannot write the JSON report: {e.strerror}; check the folder "
                            "exists and is writable", file=str(path)) from e


__all__ = ["Leak", "LeakReport", "audit", "audit_output", "format_report", "read_list",
           "add_arguments", "main_leakage", "DEFAULT_THRESHOLD", "INCOMPLETE"]
