"""``midisift export``: a finished output folder's normalized files as array shards.

Layout of ``OUTPUT/export/<format>/``::

    index.jsonl          one line per exported file, in part order then key order
    export.json          the options used, their fingerprint, the encoding version, the
                         state of the output folder it was made from (``freshness``)
    vocabulary.json      (events) the token table
    <part>/<part>-<fp>-00000.npz  shards: many pieces' arrays by key, about ``shard_mb`` each;
                         ``<fp>`` is the start of the options' fingerprint
    previews/<key>.png   (pianoroll, with --previews N) time x pitch images of the first N pieces

The files exported are those the split lists name (augmentation copies included, in the part
of their file); ``key`` is the file's name without ``.mid`` (its id, plus the copy's suffix).

Reruns write only what changed: a shard is kept untouched when every piece in it is still
wanted, in the same part, with the same normalized bytes (sha256) and the same options, and
the shard file still has the size and sha256 its index lines record; the pieces of every
other shard, and new pieces, go into new shards. Of those, a piece still wanted unchanged
whose old shard has the size and sha256 its index lines record (a shard that lost a piece)
has its arrays read from that shard ("carried") rather than computed again from its
normalized file; the new shards hold the same bytes either way.

An export never writes over a shard its folder's index names: new shards take names no index
line uses (another options' shards carry another fingerprint in their name), the index is
replaced atomically once they are all written, and only then are the shards it no longer
names removed. An export stopped at any point leaves the previous one readable as it was.
"""
from __future__ import annotations

import hashlib
import io
import json
import math
import os
import time
import zipfile
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import DecodeError, MidisiftError, UsageError
from ..store.lock import OutputLock
from ..store.atomic import file_sha256, read_json_object, write_atomic
from ..midi.decode import decode_file
from .encodings import ENCODING_VERSION, events, pianoroll, vocabulary, windows
from .freshness import output_state
from .png import png_bytes, roll_image

FORMATS = ("pianoroll", "events")
DRUMS = ("omit", "apart")
DEFAULT_STEP = {"pianoroll": 0.05, "events": 0.01}
#: Bounds of the time options (an audit: --step 0.00001 ran for ten minutes at 8 GB on 97
#: files, --per-beat 1000000 asked for 35 GiB, inf and nan raised): a step from 1 ms (finer
#: than the 10 ms of the event encoding's paper, common practice for rolls) to 10 s, at most
#: 960 frames a beat (a common MIDI resolution: finer frames than the file's ticks add
#: nothing), windows and hops up to 3,600 (seconds, or beats with --per-beat), the longest
#: time shift up to 10 s.
STEP_RANGE = (0.001, 10.0)
MAX_PER_BEAT = 960
MAX_WINDOW = 3600.0
MAX_SHIFT_S = 10.0
#: Each format's own options: (field, command-line flag, default). Given to the other format,
#: one is a usage error; not given (None), it takes the default.
FORMAT_OPTIONS: dict[str, tuple[tuple[str, str, Any], ...]] = {
    "pianoroll": (("per_beat", "--per-beat", None), ("pitch_low", "--pitch-low", 0),
                  ("pitch_high", "--pitch-high", 127), ("window", "--window", None),
                  ("hop", "--hop", None), ("previews", "--previews", 0), ("sustain", "--sustain", False)),
    "events": (("max_shift", "--max-shift", 1.0), ("velocity_bins", "--velocity-bins", 32)),
}


@dataclass(frozen=True)
class ExportOptions:
    """What ``midisift export`` was asked for; ``checked()`` refuses an option of the other
    format (``FORMAT_OPTIONS``), fills defaults and states each broken rule with the value
    given. A format's own option left None takes its default."""

    format: str
    step: float | None = None  # seconds per frame (pianoroll) or per time-shift step (events)
    per_beat: int | None = None  # pianoroll: frames per quarter-note beat instead of seconds
    pitch_low: int | None = None  # pianoroll: lowest kept pitch (default 0)
    pitch_high: int | None = None  # pianoroll: highest kept pitch (default 127)
    drums: str = "omit"  # omit: drum channel left out; apart: its own array beside the piece's
    window: float | None = None  # pianoroll: window length (seconds, or beats with per_beat)
    hop: float | None = None  # pianoroll: window start every hop (default: the window)
    max_shift: float | None = None  # events: longest single time shift, seconds (default 1)
    velocity_bins: int | None = None  # events (default 32)
    previews: int | None = None  # pianoroll: PNG previews of the first N pieces (default 0)
    shard_mb: float = 64.0  # bound of a shard's uncompressed array bytes
    sustain: bool | None = None  # pianoroll: the sustain pedal holds notes (default False)

    def checked(self) -> "ExportOptions":
        if self.format not in FORMATS:
            raise UsageError(f"unknown format {self.format!r}; use one of: {', '.join(FORMATS)}")
        if self.drums not in DRUMS:
            raise UsageError(f"--drums must be one of {', '.join(DRUMS)}, got {self.drums!r}")
        roll = self.format == "pianoroll"
        defaults = {}
        for fmt, options in FORMAT_OPTIONS.items():
            for name, flag, default in options:
                if fmt != self.format and getattr(self, name) is not None:
                    raise UsageError(f"{flag} applies to --format {fmt} only")
                defaults[name] = default if getattr(self, name) is None else getattr(self, name)
        return replace(self, **defaults)._checked(roll)

    def _checked(self, roll: bool) -> "ExportOptions":
        """The rules of the values, every option given or defaulted."""
        if self.per_beat is not None:
            if self.step is not None:
                raise UsageError("give --step (seconds) or --per-beat (frames per beat), not both")
            if not 1 <= self.per_beat <= MAX_PER_BEAT:
                raise UsageError(f"--per-beat must be from 1 to {MAX_PER_BEAT} frames per beat, got {self.per_beat}")
            step = None
        else:
            step = DEFAULT_STEP[self.format] if self.step is None else float(self.step)
            low, high = STEP_RANGE
            if not low <= step <= high:  # NaN fails too
                raise UsageError(f"--step must be above 0, from {low:g} to {high:g} seconds (finer steps make "
                                 f"arrays of millions of frames), got {self.step}")
        if not 0 <= self.pitch_low <= self.pitch_high <= 127:
            raise UsageError(f"the pitch range must satisfy 0 <= low <= high <= 127, got "
                             f"{self.pitch_low}..{self.pitch_high}")
        frame = step if step is not None else 1.0 / self.per_beat  # type: ignore[operator]
        unit = "seconds" if step is not None else "beats"
        window, hop = self.window, self.hop
        if hop is not None and window is None:
            raise UsageError("--hop needs --window")
        for flag, value in (("--window", window), ("--hop", hop)):
            if value is not None and not value <= MAX_WINDOW:  # NaN and inf fail too
                raise UsageError(f"{flag} must be at most {MAX_WINDOW:g} {unit}, got {value}")
        frame_name = (f"the {'frame' if roll else 'step'} (--step {step:g} s)" if step is not None
                      else f"the frame (--per-beat {self.per_beat}: {frame:g} beats)")
        if window is not None:
            if window < frame - 1e-12:
                raise UsageError(f"--window ({window} {unit}) is shorter than one frame ({frame:g} {unit})")
            hop = window if hop is None else hop
            if hop < frame - 1e-12:
                raise UsageError(f"--hop ({hop} {unit}) is shorter than one frame ({frame:g} {unit})")
            _whole_steps("--window", window, frame, frame_name, unit, MAX_WINDOW)
            _whole_steps("--hop", hop, frame, frame_name, unit, MAX_WINDOW)
        if not roll:
            if not self.max_shift >= step:  # type: ignore[operator]
                raise UsageError(f"--max-shift ({self.max_shift} s) must be at least one step ({step} s)")
            if not self.max_shift <= MAX_SHIFT_S:  # inf fails too
                raise UsageError(f"--max-shift must be at most {MAX_SHIFT_S:g} seconds, got {self.max_shift}")
            _whole_steps("--max-shift", self.max_shift, step, frame_name, "s", MAX_SHIFT_S)  # type: ignore[arg-type]
            if not 1 <= self.velocity_bins <= 128:
                raise UsageError(f"--velocity-bins must be from 1 to 128, got {self.velocity_bins}")
        if self.previews < 0:
            raise UsageError(f"--previews must be 0 or more, got {self.previews}")
        if not 0 < self.shard_mb < float("inf"):
            raise UsageError(f"--shard-mb must be above 0, got {self.shard_mb}")
        return ExportOptions(self.format, step, self.per_beat, self.pitch_low, self.pitch_high, self.drums,
                             window, hop, float(self.max_shift), self.velocity_bins, self.previews,
                             float(self.shard_mb), bool(self.sustain))

    def recorded(self) -> dict[str, Any]:
        """The options that shape the arrays (written on every index line)."""
        d = asdict(self)
        for name in ("previews", "shard_mb"):
            d.pop(name)
        if self.format == "pianoroll":
            for name in ("max_shift", "velocity_bins"):
                d.pop(name)
            if self.window is not None:  # the frame counts the windows are cut with
                d["window_frames"], d["hop_frames"] = self.frames(self.window), self.frames(self.hop)  # type: ignore[arg-type]
            if not self.sustain:  # recorded only when asked for: an export without it keeps
                d.pop("sustain")  # the options (and fingerprint) it had before the option existed
        else:
            for name in ("per_beat", "pitch_low", "pitch_high", "window", "hop", "sustain"):
                d.pop(name)
            d["max_shift_steps"] = self.max_shift_steps
        return d

    @property
    def max_shift_steps(self) -> int:
        return max(1, int(round(self.max_shift / self.step))) if self.step else 1

    def frames(self, length: float) -> int:
        """A length in seconds (or beats with per_beat) as a whole number of frames (>= 1)."""
        per = self.per_beat if self.per_beat is not None else 1.0 / self.step  # type: ignore[operator]
        return max(1, int(round(length * per)))


#: Relative tolerance for "a whole number of steps": float error of values such as 0.3 / 0.1.
WHOLE_TOLERANCE = 1e-9


def _whole_steps(flag: str, value: float, step: float, step_name: str, unit: str, limit: float) -> int:
    """``value`` as a whole number of ``step``s; a UsageError naming the option, the value, the
    step (``step_name``) and the nearest valid values when it is not one (within
    ``WHOLE_TOLERANCE``), or when that many steps exceed ``limit``."""
    n = round(value / step)
    if abs(value - n * step) > WHOLE_TOLERANCE * max(abs(value), step):
        below, above = math.floor(value / step), math.floor(value / step) + 1
        near = [f"{k * step:.10g}" for k in (below, above) if k >= 1 and k * step <= limit * (1 + WHOLE_TOLERANCE)]
        valid = f"the nearest valid value is {near[0]}" if len(near) == 1 else f"the nearest valid values are {' and '.join(near)}"
        raise UsageError(f"{flag} {value:g} {unit} is not a whole multiple of {step_name}; {valid} {unit}")
    if n * step > limit * (1 + WHOLE_TOLERANCE):
        raise UsageError(f"{flag} must be at most {limit:g} {unit}, got {value:g} ({n} steps of {step:g} {unit})")
    return int(n)


@dataclass
class Wanted:
    """One normalized file to export."""

    key: str  # its file name without .mid: the id, plus an augmentation copy's suffix
    id: str
    source: str
    part: str
    midi: str  # path relative to OUTPUT
    digest: str = ""  # sha256 of its bytes (first 16 hex)


@dataclass
class ExportResult:
    folder: Path
    pieces: int = 0
    computed: int = 0  # pieces whose arrays were computed from their normalized file
    carried: int = 0  # pieces whose arrays were read from an old shard into a new one
    reused: int = 0  # pieces of the shards kept untouched
    shards_written: int = 0
    shards_kept: int = 0
    shards_removed: int = 0
    seconds: float = 0.0
    parts: dict[str, int] = field(default_factory=dict)
    no_pitched_note: int = 0  # pieces whose array holds no note (empty, or all silence)

    def table(self) -> str:
        lines = [f"{'pieces exported':<28}{self.pieces:>8}"]
        lines += [f"{'  ' + part:<28}{n:>8}" for part, n in self.parts.items()]
        lines += [f"{'pieces with no pitched note':<28}{self.no_pitched_note:>8}"]
        lines += [f"{'computed / carried / reused':<28}{self.computed:>8} / {self.carried} / {self.reused}",
                  f"{'shards written / kept':<28}{self.shards_written:>8} / {self.shards_kept}",
                  f"{'shards removed':<28}{self.shards_removed:>8}",
                  f"{'seconds':<28}{self.seconds:>8.2f}",
                  f"export: {self.folder}"]
        return "\n".join(lines)


def finished_run(out_dir: Path) -> dict:
    """The summary of the output folder's last finished run; a clear error when there is none."""
    if out_dir.exists() and not out_dir.is_dir():
        raise UsageError("this is a file, not an output folder; give the folder a `midisift run` wrote",
                         file=str(out_dir))
    if not out_dir.is_dir():
        raise UsageError("no such output folder; give the folder a `midisift run` wrote", file=str(out_dir))
    missing = [n for n in ("summary.json", "manifest.jsonl") if not (out_dir / n).is_file()]
    if missing:
        raise UsageError(f"not the output folder of a finished run ({' and '.join(missing)} missing); "
                         "run `midisift run CONFIG --output` on it first", file=str(out_dir))
    try:
        return json.loads((out_dir / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError) as e:
        raise MidisiftError(f"cannot read summary.json ({e}); rerun the pipeline", file=str(out_dir)) from None


def part_order(summary: dict, parts: Any) -> list[str]:
    """The parts in the config's order, others after, sorted."""
    configured = [p for p in summary.get("split", {}).get("part_order") or () if p in parts]
    return configured + sorted(p for p in parts if p not in configured)


def wanted_files(out_dir: Path, summary: dict) -> tuple[list[Wanted], list[str]]:
    """Every normalized file of the run (split lists), with its id, source and part (manifest),
    and every part that has a split list (empty ones included), in the config's order."""
    parts: dict[str, list[str]] = {}
    splits = out_dir / "splits"
    for p in sorted(splits.glob("*.txt")) if splits.is_dir() else ():
        parts[p.stem] = [line for line in p.read_text(encoding="utf-8").splitlines() if line]
    source_of: dict[str, str] = {}
    with open(out_dir / "manifest.jsonl", encoding="utf-8") as fh:
        for line in fh:
            if '"kept"' not in line:  # speed: dropped rows name no output
                continue
            row = json.loads(line)
            if row.get("status") != "kept":
                continue
            for rel in row.get("outputs") or [row.get("output")]:
                if rel:
                    source_of.setdefault(rel, row["source"])
    out: list[Wanted] = []
    order = part_order(summary, parts)
    for part in order:
        for rel in sorted(parts[part]):
            key = rel.rsplit("/", 1)[-1][:-len(".mid")]
            out.append(Wanted(key, key[:16], source_of.get(rel, ""), part, rel))
    return out, order


#: The on-disk layout of an export folder, recorded in export.json. Layout 2: shard names carry
#: the fingerprint, index lines record their fingerprint and their shard's size and sha256.
#: An export without it (layout 1) is never reused and the loader refuses it.
LAYOUT = 2


def _read_index(folder: Path) -> list[dict]:
    """The index lines of the export in ``folder`` (whatever its options), [] when unreadable."""
    try:
        with open(folder / "index.jsonl", encoding="utf-8") as fh:
            return [json.loads(line) for line in fh if line.strip()]
    except (OSError, ValueError):
        return []


def _shard_intact(folder: Path, shard: str, line: dict) -> bool:
    """Whether the shard file is the one the index line describes (its size, then sha256)."""
    path = folder / shard
    try:
        return (line.get("shard_bytes") == path.stat().st_size
                and line.get("shard_sha256") == file_sha256(path))
    except OSError:
        return False


def arrays_of(path: Path, opts: ExportOptions) -> tuple[np.ndarray, np.ndarray | None]:
    """The arrays of one normalized file: (piece, drums or None)."""
    try:
        piece = decode_file(path)
    except DecodeError as e:  # midisift wrote it whole: it changed after the run
        where = "".join(f", {w}" for w in (f"track {e.track}" if e.track is not None else "",
                                           f"byte {e.offset}" if e.offset is not None else "") if w)
        raise MidisiftError(f"this normalized file cannot be decoded ({e.code}{where}); the output folder "
                            "changed since its last finished run: rerun `midisift run`", file=str(path)) from None
    if opts.format == "events":
        return events(piece, step=opts.step, max_shift_steps=opts.max_shift_steps,  # type: ignore[arg-type]
                      velocity_bins=opts.velocity_bins, drums=opts.drums)
    roll, drums = pianoroll(piece, step=opts.step, per_beat=opts.per_beat, low=opts.pitch_low,
                            high=opts.pitch_high, drums=opts.drums, sustain=bool(opts.sustain))
    if opts.window is not None:
        size, hop = opts.frames(opts.window), opts.frames(opts.hop)  # type: ignore[arg-type]
        roll = windows(roll, size, hop)
        drums = windows(drums, size, hop) if drums is not None else None
    return roll, drums


def _save_shard(path: Path, arrays: dict[str, np.ndarray]) -> tuple[int, str]:
    """Write an .npz atomically (a temporary name, then rename): a zip of ``<key>.npy``
    members as ``np.savez_compressed`` writes them, but at deflate level 1 instead of 6: on
    piano rolls a third of the time, for files twice as large (on the synthetic corpus still
    about 35 times smaller than the arrays). Returns the file's size and sha256."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp")
    try:
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=1) as zf:
            for key, arr in arrays.items():
                with zf.open(f"{key}.npy", "w", force_zip64=True) as fh:
                    np.lib.format.write_array(fh, np.asanyarray(arr), allow_pickle=False)
        signature = tmp.stat().st_size, file_sha256(tmp)
        os.replace(tmp, path)
    except OSError as e:
        tmp.unlink(missing_ok=True)
        raise MidisiftError(f"cannot write a shard ({e.strerror})", file=str(path)) from None
    return signature


def export_output(out_dir: Path | str, opts: ExportOptions, *,
                  progress: Any = None) -> ExportResult:
    """Export the finished run in ``out_dir`` (see the module doc); returns what was done."""
    t0 = time.perf_counter()
    out_dir = Path(out_dir)
    opts = opts.checked()
    summary = finished_run(out_dir)
    folder = out_dir / "export" / opts.format
    with OutputLock(out_dir):  # no run may move the files while they are read
        wanted, parts = wanted_files(out_dir, summary)
        for w in wanted:
            try:
                w.digest = hashlib.sha256((out_dir / w.midi).read_bytes()).hexdigest()[:16]
            except OSError as e:
                raise MidisiftError(f"a file of the split lists cannot be read ({e.strerror}); the "
                                    "output folder changed since its last finished run: rerun "
                                    "`midisift run`", file=str(out_dir / w.midi)) from None
        result = _write(out_dir, folder, wanted, parts, opts, progress)
    result.seconds = time.perf_counter() - t0
    return result


def _fingerprint(opts: ExportOptions) -> str:
    text = json.dumps({"options": opts.recorded(), "encoding": ENCODING_VERSION}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _unchanged(w: Wanted | None, line: dict) -> bool:
    """Whether the index line (of these options) describes the wanted piece as it is now: the
    same key, part, source and normalized bytes (digest)."""
    return (w is not None and w.part == line.get("part") and w.digest == line.get("digest")
            and w.source == line.get("source"))


def array_matches(arr: np.ndarray, line: dict, *, drums: bool = False) -> bool:
    """Whether an array read from a shard is the one index line ``line`` describes: its shape
    (``drums``: the line's drum array's) and dtype."""
    shape = line["drums_shape"] if drums else line["shape"]
    return list(arr.shape) == list(shape) and str(arr.dtype) == line["dtype"]


class _Carried:
    """The arrays of pieces still wanted unchanged whose old shard cannot be kept (it lost a
    piece, or holds one that changed), read from that shard instead of computed again.

    Each old shard is read once, when its first such piece is asked for: its bytes are checked
    against the size and sha256 its index lines record (a shard that is not the one the index
    describes gives nothing: its pieces are computed), then its members are read from those
    very bytes as they are asked for, each checked against its line's shape and dtype; the
    shard is let go after its last piece. Asked in index order, as the new shards are written,
    one or two old shards are held at a time (their compressed bytes)."""

    def __init__(self, folder: Path, lines: dict[str, list[dict]]):
        self.folder = folder
        self.line_of = {line["key"]: line for group in lines.values() for line in group}
        self.left = {shard: len(group) for shard, group in lines.items()}
        self.shards: dict[str, Any] = {}  # shard -> its open NpzFile, or None when not intact

    def take(self, key: str) -> tuple[np.ndarray, np.ndarray | None] | None:
        """The piece's (array, drums or None) from its old shard; None when there is none to
        read (not a carried piece, or its shard or member is not the one its line describes)."""
        line = self.line_of.pop(key, None)
        if line is None:
            return None
        shard = line["file"]
        z = self.shards[shard] if shard in self.shards else self._open(shard, line)
        got = None
        if z is not None:
            try:
                arr = z[key]
                drums = z[line["drums_key"]] if "drums_key" in line else None
                if array_matches(arr, line) and (drums is None or array_matches(drums, line, drums=True)):
                    got = arr, drums
            except (KeyError, OSError, ValueError, EOFError, zipfile.BadZipFile):
                pass
        self.left[shard] -= 1
        if not self.left[shard]:
            self.close(shard)
        return got

    def _open(self, shard: str, line: dict) -> Any:
        z = None
        try:
            data = (self.folder / shard).read_bytes()
            if len(data) == line.get("shard_bytes") and hashlib.sha256(data).hexdigest() == line.get("shard_sha256"):
                z = np.load(io.BytesIO(data), allow_pickle=False)
        except (OSError, ValueError, EOFError, zipfile.BadZipFile):
            z = None
        self.shards[shard] = z
        return z

    def close(self, shard: str | None = None) -> None:
        for name in [shard] if shard is not None else list(self.shards):
            z = self.shards.get(name)
            if z is not None:
                z.close()
            self.shards[name] = None


def _write(out_dir: Path, folder: Path, wanted: list[Wanted], parts: list[str], opts: ExportOptions,
           progress: Any) -> ExportResult:
    fp = _fingerprint(opts)
    recorded = opts.recorded()
    index = _read_index(folder)
    taken = {line.get("file") for line in index}  # names a new shard must not take
    want = {w.key: w for w in wanted}
    by_shard: dict[str, list[dict]] = {}
    for line in index:
        if line.get("fingerprint") == fp:  # same options (and layout: older lines have none)
            by_shard.setdefault(line["file"], []).append(line)
    kept_lines: dict[str, dict] = {}
    kept_shards: set[str] = set()
    carry: dict[str, list[dict]] = {}  # shard that cannot be kept -> its pieces still wanted unchanged
    for shard, lines in by_shard.items():
        same = [line for line in lines if _unchanged(want.get(line["key"]), line)]
        if len(same) == len(lines) and _shard_intact(folder, shard, lines[0]):
            kept_shards.add(shard)
            kept_lines.update((line["key"], line) for line in lines)
        elif same and len(same) < len(lines):  # (all unchanged but not intact: nothing to read)
            carry[shard] = same
    result = ExportResult(folder, pieces=len(wanted), reused=len(kept_lines))
    todo = [w for w in wanted if w.key not in kept_lines]
    carried = _Carried(folder, carry)
    limit = opts.shard_mb * (1 << 20)
    new_lines: dict[str, dict] = {}
    arrays: dict[str, np.ndarray] = {}
    pending: list[dict] = []
    size = 0
    current_part = None
    numbers: dict[str, int] = {}

    def fresh_name(part: str) -> str:
        """The next shard name of ``part`` under these options that no index line uses."""
        while True:
            numbers[part] = numbers.get(part, -1) + 1
            name = f"{part}/{part}-{fp[:8]}-{numbers[part]:05d}.npz"
            if name not in taken:
                return name

    def flush() -> None:
        nonlocal arrays, pending, size
        if not pending:
            return
        shard = fresh_name(pending[0]["part"])
        nbytes, sha = _save_shard(folder / shard, arrays)
        for line in pending:
            line.update(file=shard, shard_bytes=nbytes, shard_sha256=sha)
            new_lines[line["key"]] = line
        result.shards_written += 1
        arrays, pending, size = {}, [], 0

    computed: set[str] = set()  # keys of the pieces computed from their normalized file
    try:
        for w in todo:
            if w.part != current_part:
                flush()
                current_part = w.part
            got = carried.take(w.key)
            if got is not None:
                result.carried += 1
            else:
                got = arrays_of(out_dir / w.midi, opts)
                computed.add(w.key)
            arr, drums = got
            line = {"id": w.id, "source": w.source, "part": w.part, "file": None, "key": w.key,
                    "shape": list(arr.shape), "dtype": str(arr.dtype), "options": recorded,
                    "midi": w.midi, "digest": w.digest, "fingerprint": fp, "no_pitched_note": not arr.any()}
            nbytes = arr.nbytes + (drums.nbytes if drums is not None else 0)
            if pending and size + nbytes > limit:  # this piece starts the next shard
                flush()
            arrays[w.key] = arr
            if drums is not None:
                line["drums_key"] = f"{w.key}.drums"
                line["drums_shape"] = list(drums.shape)
                arrays[line["drums_key"]] = drums
            pending.append(line)
            size += nbytes
            if progress is not None:
                progress(1)
        flush()
    finally:
        carried.close()
    result.computed = len(computed)

    lines = [kept_lines.get(w.key) or new_lines[w.key] for w in wanted]
    result.parts = {part: 0 for part in parts}
    for line in lines:
        result.parts[line["part"]] = result.parts.get(line["part"], 0) + 1
    result.no_pitched_note = sum(bool(line.get("no_pitched_note")) for line in lines)
    # the new export takes over here: its index first (the loader checks export.json and the
    # vocabulary against the index's fingerprint), then the files that describe it
    index_written = _write_if_changed(folder / "index.jsonl", "".join(json.dumps(line) + "\n" for line in lines))
    meta = {"format": opts.format, "options": recorded, "fingerprint": fp, "encoding_version": ENCODING_VERSION,
            "layout": LAYOUT, "pieces": len(lines), "parts": result.parts,
            "no_pitched_note": result.no_pitched_note, "output_state": output_state(out_dir)}
    result.shards_kept = len(kept_shards)
    # how the export that wrote this index got its pieces: a rerun that leaves the index as it
    # was leaves export.json too (its counts then still describe the export that wrote both)
    old_meta = read_json_object(folder / "export.json")
    if index_written or old_meta is None or {k: v for k, v in old_meta.items() if k != "written"} != meta:
        meta["written"] = {"computed": result.computed, "carried": result.carried, "reused": result.reused,
                           "shards_written": result.shards_written, "shards_kept": result.shards_kept}
        _write_if_changed(folder / "export.json", json.dumps(meta, indent=2) + "\n")
    if opts.format == "events":
        vocab = vocabulary(opts.max_shift_steps, opts.velocity_bins, opts.step)  # type: ignore[arg-type]
        _write_if_changed(folder / "vocabulary.json", json.dumps({**vocab, "fingerprint": fp}, indent=1) + "\n")
    # only now, with the new index in place, the shards it does not name go
    names = {line["file"] for line in lines}
    result.shards_removed = _remove_strays(folder, names)
    if opts.format == "pianoroll":
        _previews(out_dir, folder, wanted[:opts.previews], computed, opts)  # type: ignore[index]
    return result


def _write_if_changed(path: Path, text: str) -> bool:
    """Write ``text`` atomically unless the file already holds it (a rerun with nothing new
    leaves every file of the export untouched); whether it was written."""
    try:
        if path.read_text(encoding="utf-8") == text:
            return False
    except (OSError, UnicodeDecodeError):
        pass
    write_atomic(path, text)
    return True


def _remove_strays(folder: Path, shards: set[str]) -> int:
    """Remove the .npz files under the part folders that the index does not name (the shards
    of the previous export or of other options, a stopped export's, an older layout's), and
    temporary files a stopped export left; returns how many shards were removed."""
    removed = 0
    for path in folder.glob("*/*.npz"):
        if path.relative_to(folder).as_posix() not in shards:
            path.unlink(missing_ok=True)
            removed += 1
    for path in folder.glob("*/.*.npz.tmp"):
        path.unlink(missing_ok=True)
    return removed


def _previews(out_dir: Path, folder: Path, first: list[Wanted], computed: set[str], opts: ExportOptions) -> None:
    """PNG previews (time x pitch) of the first pieces; others' previews are removed."""
    pdir = folder / "previews"
    names = {f"{w.key}.png" for w in first}
    if pdir.is_dir():
        for p in pdir.glob("*.png"):
            if p.name not in names:
                p.unlink()
    for w in first:
        target = pdir / f"{w.key}.png"
        if w.key in computed or not target.is_file():
            # the preview shows the whole piece, not its windows
            roll, _ = arrays_of(out_dir / w.midi, replace(opts, window=None, hop=None))
            write_atomic(target, png_bytes(roll_image(roll)))


__all__ = ["ExportOptions", "ExportResult", "export_output", "FORMATS", "DRUMS"]
