"""OUTPUT/report.html: one self-contained page showing what a run did, written at its end.

Everything comes from the run's summary (counts, split, timings: the page shows the same
numbers, and each such cell names its summary.json path in ``data-key``) and one pass over
manifest.jsonl (the distributions). Figures are hand-written inline SVG; the near-duplicate
thumbnails are small grayscale PNGs (``export.png``) inlined as data URIs. Nothing is loaded
from the network, and no plotting package is needed.
"""
from __future__ import annotations

import base64
import html
import json
import time
from pathlib import Path
from typing import Any, Iterable

from ..analysis.key_profiles import note_name_to_pc
from ..store.atomic import write_atomic
from .changes import EXAMPLES
from .table import folder_rule_text
from ..reasons import REASONS

PITCH_NAMES = ("C", "C#", "D", "Eb", "E", "F", "F#", "G", "Ab", "A", "Bb", "B")
#: Manifest fields shown as histograms over the kept files: (field, title, unit).
HISTOGRAMS = (("duration_s", "Duration", "s"), ("notes_per_s", "Notes per second", "/s"),
              ("mean_polyphony", "Mean polyphony", "notes"), ("bpm", "Tempo", "BPM"))
CLUSTERS_SHOWN = 6
DEFAULT_ORDER = ("validate", "transpose", "key_meter", "dedup", "filter", "split")


def esc(value: Any) -> str:
    return html.escape(str(value), quote=True)


def fmt(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:,.4g}" if abs(value) < 1000 else f"{value:,.0f}"
    if isinstance(value, int):
        return f"{value:,}"
    return str(value)


def cell(value: Any, key: str | None = None) -> str:
    """A numeric table cell; ``key`` is the value's path in summary.json (a test compares)."""
    attr = f' data-key="{esc(key)}" data-value="{esc(json.dumps(value))}"' if key else ""
    return f'<td class="n"{attr}>{esc(fmt(value))}</td>'


# figures --------------------------------------------------------------------------------------
def bars(items: list[tuple[str, float]], *, width: int = 520, color: str = "#4a78b5",
         label_w: int = 170, unit: str = "") -> str:
    """Horizontal bars with labels and values, as inline SVG."""
    if not items:
        return '<p class="muted">nothing to show</p>'
    top = max(v for _, v in items) or 1
    h = 18
    rows = []
    for i, (label, v) in enumerate(items):
        y = i * h
        w = (width - label_w - 70) * v / top
        rows.append(f'<text x="{label_w - 6}" y="{y + 13}" text-anchor="end">{esc(label)}</text>'
                    f'<rect x="{label_w}" y="{y + 3}" width="{w:.1f}" height="{h - 6}" fill="{color}"/>'
                    f'<text x="{label_w + w + 4:.1f}" y="{y + 13}">{esc(fmt(v))}{esc(unit)}</text>')
    return f'<svg width="{width}" height="{len(items) * h + 4}" class="fig">{"".join(rows)}</svg>'


def histogram(values: list[float], title: str, unit: str, *, bins: int = 24, width: int = 360,
              height: int = 150) -> str:
    """A histogram as inline SVG: equal bins from the smallest value to the 99th percentile;
    the few values above it are counted in the last bin (said under the figure)."""
    if not values:
        return f'<div class="hist"><h4>{esc(title)}</h4><p class="muted">no values</p></div>'
    vs = sorted(values)
    lo, hi = vs[0], vs[min(len(vs) - 1, int(len(vs) * 0.99))]
    if hi <= lo:
        hi = lo + 1.0
    counts = [0] * bins
    for v in vs:
        counts[min(bins - 1, max(0, int((v - lo) / (hi - lo) * bins)))] += 1
    above = sum(1 for v in vs if v > hi)
    top = max(counts)
    pw, ph = width - 40, height - 30
    bw = pw / bins
    rects = "".join(
        f'<rect x="{30 + i * bw:.1f}" y="{10 + ph - ph * c / top:.1f}" width="{bw - 1:.1f}" '
        f'height="{ph * c / top:.1f}" fill="#4a78b5"><title>{fmt(lo + i * (hi - lo) / bins)}-'
        f'{fmt(lo + (i + 1) * (hi - lo) / bins)} {esc(unit)}: {c}</title></rect>'
        for i, c in enumerate(counts) if c)
    axis = (f'<line x1="30" y1="{10 + ph}" x2="{30 + pw}" y2="{10 + ph}" stroke="#888"/>'
            f'<text x="30" y="{height - 4}">{esc(fmt(lo))}</text>'
            f'<text x="{30 + pw}" y="{height - 4}" text-anchor="end">{esc(fmt(hi))} {esc(unit)}</text>'
            f'<text x="26" y="18" text-anchor="end">{top}</text>')
    median = median_of(vs)
    note = f"{len(vs):,} files, median {fmt(median)} {unit}" + (f"; {above} above {fmt(hi)} in the last bin" if above else "")
    return (f'<div class="hist"><h4>{esc(title)}</h4><svg width="{width}" height="{height}" class="fig">'
            f'{rects}{axis}</svg><p class="muted">{esc(note)}</p></div>')


def median_of(vs: list[float]) -> float:
    """The median of sorted values: the middle one, or the mean of the two middle ones for an
    even count (an audit found the upper middle value printed as the median)."""
    n = len(vs)
    return vs[n // 2] if n % 2 else (vs[n // 2 - 1] + vs[n // 2]) / 2


def paired_bars(labels: list[str], a: list[int], b: list[int], names: tuple[str, str], *,
                width: int = 720, height: int = 170) -> str:
    """Two counts per label side by side (e.g. keys before and after normalization)."""
    top = max(a + b + [1])
    n = len(labels)
    pw, ph = width - 40, height - 50
    slot = pw / max(n, 1)
    bw = slot * 0.4
    parts = []
    for i, label in enumerate(labels):
        x = 30 + i * slot
        for j, (v, color) in enumerate(((a[i], "#9bb3d6"), (b[i], "#1f4e8c"))):
            hh = ph * v / top
            parts.append(f'<rect x="{x + j * bw:.1f}" y="{10 + ph - hh:.1f}" width="{bw - 1:.1f}" height="{hh:.1f}" '
                         f'fill="{color}"><title>{esc(label)} {esc(names[j])}: {v}</title></rect>')
        parts.append(f'<text x="{x + bw:.1f}" y="{ph + 24}" text-anchor="middle" class="small">{esc(label)}</text>')
    legend = (f'<rect x="30" y="{height - 14}" width="10" height="10" fill="#9bb3d6"/>'
              f'<text x="44" y="{height - 5}">{esc(names[0])}</text>'
              f'<rect x="200" y="{height - 14}" width="10" height="10" fill="#1f4e8c"/>'
              f'<text x="214" y="{height - 5}">{esc(names[1])}</text>'
              f'<text x="26" y="18" text-anchor="end">{top}</text>'
              f'<line x1="30" y1="{10 + ph}" x2="{30 + pw}" y2="{10 + ph}" stroke="#888"/>')
    return f'<svg width="{width}" height="{height}" class="fig">{"".join(parts)}{legend}</svg>'


def thumbnail(path: Path | None, semitones: int) -> str:
    """An <img> of the piano roll of a MIDI file moved by ``semitones`` (its normalization's
    transposition, so the members of a cluster stand in one key), or a note that the file is
    not available."""
    if path is None or not path.is_file():
        return '<span class="muted">file not available</span>'
    from ..errors import MidisiftError
    from ..export.encodings import pianoroll
    from ..export.png import png_bytes, roll_image
    from ..midi.decode import decode_file
    try:
        piece = decode_file(path)
    except MidisiftError as e:  # e.g. the source changed since the run read it
        return f'<span class="muted">cannot decode: {esc(e.reason)}</span>'
    except OSError as e:
        return f'<span class="muted">cannot read: {esc(e.strerror)}</span>'
    if semitones:
        notes = piece.notes.copy()
        notes["pitch"] = (notes["pitch"].astype(int) + semitones * (notes["channel"] != 9)).clip(0, 127)
        piece.notes = notes
    roll, _ = pianoroll(piece, step=0.1)
    data = base64.b64encode(png_bytes(roll_image(roll, max_width=320, row_px=2))).decode()
    return f'<img alt="piano roll" src="data:image/png;base64,{data}">'


# the page -------------------------------------------------------------------------------------
class Facts:
    """What the summary and the page count from the manifest, gathered one row at a time (the
    rows are not kept: at 100,000 files they would hold about 150 MB): files, kept, drops by
    (stage, reason), the stages each row reached (every stage up to the one that dropped it,
    all for a kept row: ``stages`` in run order), files per part, and the page's histograms,
    keys, meters, groups and clusters (the manifest's ``cluster``: the files of each cluster
    of two or more files and its ``cluster_size``; the rows of the clusters the page shows are
    read afterwards, ``read_manifest``)."""

    def __init__(self, stages: Iterable[str] = ()) -> None:
        self.stages = list(stages)
        self._position = {name: i for i, name in enumerate(self.stages)}
        self.files = self.kept = 0
        self.dropped_by: dict[tuple[str, str], int] = {}
        self.reached: dict[str, int] = {}
        self.parts: dict[str, int] = {}  # part -> kept files placed in it
        self.values: dict[str, list[float]] = {f: [] for f, _, _ in HISTOGRAMS}
        self.key_before = [0] * 24
        self.key_after = [0] * 24
        self.declared: dict[str, int] = {}  # meter_declared -> kept files
        self.estimated: dict[str, int] = {}  # meter_estimated -> kept files
        self.meter_both = self.meter_agree = 0  # kept files with both; of them, the same meter
        self.suspect: dict[str, int] = {}  # meter_declared_suspect -> kept files
        self.group_sizes: dict[int, int] = {}  # group size -> kept files in groups of that size
        #: cluster id -> [its rows counted, its cluster_size]: the rows of clusters of two or more
        #: contents, and the copies (``duplicate_of``) in a cluster of one content, whose first
        #: file is not counted (``cluster_files``)
        self.clusters: dict[str, list[int]] = {}
        self.members: dict[str, list[dict]] = {}  # cluster id -> its rows (shown clusters only)
        self._gone: dict[str, dict[float, int]] = {}  # field -> removed values and their counts

    def add(self, r: dict[str, Any]) -> None:
        self._count(r, 1)

    def remove(self, r: dict[str, Any]) -> None:
        """Take back a row ``add`` counted (a rerun starts from the last run's facts, removes
        the old rows it does not reuse and adds the rows it built; ``settle`` ends it)."""
        self._count(r, -1)

    def _count(self, r: dict[str, Any], sign: int) -> None:
        self.files += sign
        if r.get("status") == "kept":
            self.kept += sign
            _tally(self.parts, r.get("split"), sign)
            reached = len(self.stages)
        else:
            _tally(self.dropped_by, (r.get("stage"), r.get("reason")), sign)
            reached = self._position.get(r.get("stage"), -1) + 1
        for name in self.stages[:reached]:
            _tally(self.reached, name, sign)
        cid = r.get("cluster")
        if cid and ((r.get("cluster_size") or 0) > 1 or r.get("duplicate_of")):
            entry = self.clusters.get(cid)
            if entry is None:
                if sign < 0:
                    raise KeyError(cid)  # not a row these facts counted (``RowFacts.unused``)
                entry = self.clusters[cid] = [0, 1]
            entry[0] += sign
            if sign > 0:
                entry[1] = r.get("cluster_size") or 1
            if entry[0] <= 0:
                del self.clusters[cid]
        if r.get("status") != "kept":
            return
        for f, vs in self.values.items():
            v = r.get(f)
            if isinstance(v, (int, float)) and not isinstance(v, bool):
                if sign > 0:
                    vs.append(float(v))
                else:
                    gone = self._gone.setdefault(f, {})
                    gone[float(v)] = gone.get(float(v), 0) + 1
        mode, pc = r.get("mode"), r.get("tonic_pc")
        if pc is not None and mode in ("major", "minor"):
            off = 0 if mode == "major" else 12
            self.key_before[off + pc % 12] += sign
            moved = r.get("transpose_key")  # the key transpose shifted (its own key options)
            if moved:
                name, mode = moved.split()
                pc, off = note_name_to_pc(name), 0 if mode == "major" else 12
            self.key_after[off + (pc + (r.get("transpose") or 0)) % 12] += sign
        # the manifest's meter_declared and meter_estimated (an audit found the declared meters
        # counted only where meter_source was file, against a sentence about declared meters)
        declared, est = r.get("meter_declared"), r.get("meter_estimated")
        if declared:
            _tally(self.declared, declared, sign)
            if est:
                self.meter_both += sign
                self.meter_agree += sign * (est == declared)
            if r.get("meter_declared_suspect"):
                _tally(self.suspect, r["meter_declared_suspect"], sign)
        if est:
            _tally(self.estimated, est, sign)
        g = r.get("group_size")
        if g:
            _tally(self.group_sizes, g, sign)

    def settle(self) -> bool:
        """Apply the removed values to the value lists (one pass over each). False when a
        removed value was not in its list (a NaN never is: then count afresh)."""
        found = True
        for f, gone in self._gone.items():
            kept = []
            for v in self.values[f]:
                n = gone.get(v)
                if n:
                    gone[v] = n - 1
                else:
                    kept.append(v)
            self.values[f] = kept
            found = found and not any(gone.values())
        self._gone = {}
        return found

    def cluster_files(self, cid: str) -> int:
        """The files (manifest rows) of a counted cluster: those counted, and for a cluster of
        one content its first file, which is no copy (``duplicate_of`` null) and is not
        counted (every file dedup sees is in a cluster: the lone ones are not kept here)."""
        counted, size = self.clusters[cid]
        return counted + (size == 1)

    def to_state(self) -> dict[str, Any]:
        """The facts as JSON (without the shown clusters' rows, read from the manifest each time)."""
        self.settle()
        return {"version": FACTS_VERSION, "files": self.files, "kept": self.kept,
                "dropped_by": [[stage, reason, n] for (stage, reason), n in self.dropped_by.items()],
                "reached": self.reached, "parts": self.parts,
                "values": self.values, "key_before": self.key_before, "key_after": self.key_after,
                "declared": self.declared, "estimated": self.estimated, "meter_both": self.meter_both,
                "meter_agree": self.meter_agree, "suspect": self.suspect,
                "group_sizes": list(self.group_sizes.items()),
                "clusters": self.clusters}

    @classmethod
    def from_state(cls, saved: dict[str, Any], stages: Iterable[str] = ()) -> "Facts":
        facts = cls(stages)
        facts.files, facts.kept = saved["files"], saved["kept"]
        facts.dropped_by = {(stage, reason): n for stage, reason, n in saved["dropped_by"]}
        facts.reached, facts.parts = saved["reached"], saved["parts"]
        facts.values = {f: [float(v) for v in saved["values"][f]] for f in facts.values}
        facts.key_before, facts.key_after = saved["key_before"], saved["key_after"]
        facts.declared, facts.estimated = saved["declared"], saved["estimated"]
        facts.meter_both, facts.meter_agree = saved["meter_both"], saved["meter_agree"]
        facts.suspect = saved["suspect"]
        facts.group_sizes = {g: n for g, n in saved["group_sizes"]}
        facts.clusters = {cid: list(entry) for cid, entry in saved["clusters"].items()}
        return facts


def _tally(counts: dict, key: Any, sign: int) -> None:
    n = counts.get(key, 0) + sign
    if n:
        counts[key] = n
    else:
        del counts[key]


class RowFacts:
    """A run's facts gathered as its manifest rows pass (``row``). With the last run's facts
    (``last``, saved with its rows: ``rowreuse``) a reused line is not read at all: the old
    lines not reused are taken back (``unused``) and the built rows added. Speed: a rerun
    parsed every reused line for the facts, about 10 us each, and counted the summary's figures
    of each from the walk. ``facts()`` is None when the old lines seen do not add up to the last
    run's ``old_rows`` (then read the manifest). Facts saved in another form
    (``FACTS_VERSION``) or without the summary's counts are not used."""

    def __init__(self, stages: Iterable[str], last: dict[str, Any] | None = None, old_rows: int = 0):
        self.from_last = (last is not None and last.get("version") == FACTS_VERSION
                          and "files" in last)
        self.counted = Facts.from_state(last, stages) if self.from_last else Facts(stages)
        self.old_rows = old_rows
        self.old_seen = 0
        self.sound = True

    def row(self, r: Any) -> None:
        """A manifest row: a built row (dict), a reused line (str) or a stretch of reused
        lines (``rowreuse.OldLines``)."""
        if type(r) is dict:
            self.counted.add(r)
        elif type(r) is str:
            if self.from_last:
                self.old_seen += 1
            else:
                self.counted.add(json.loads(r))
        elif self.from_last:
            self.old_seen += r.count
        else:
            for line in r.lines():
                self.counted.add(json.loads(line))

    def unused(self, line: str) -> None:
        """A line of the last run's manifest that this run does not reuse."""
        if not self.from_last:
            return
        self.old_seen += 1
        try:
            self.counted.remove(json.loads(line))
        except (ValueError, KeyError):  # not a row the last facts counted: read the manifest
            self.sound = False

    def facts(self) -> Facts | None:
        settled = self.counted.settle()
        if self.from_last and not (self.sound and settled and self.old_seen == self.old_rows):
            return None
        return self.counted


#: The fields of a near-duplicate cluster member that the page shows.
CLUSTER_FIELDS = ("id", "source", "status", "stage", "reason", "transpose", "output", "duplicate_of",
                  "duplicate_kind", "similarity", "cluster_size")
#: The form of ``Facts.to_state``: 2 counts clusters by the manifest's ``cluster`` and meters by
#: ``meter_declared`` (1, unnamed, grouped rows by ``duplicate_of`` and counted the meters of
#: ``meter_source`` file only).
FACTS_VERSION = 2


def read_manifest(path: Path, facts: Facts | None = None, stages: Iterable[str] = ()) -> Facts:
    """The facts of a manifest.jsonl, read one line at a time (or ``facts`` already gathered
    from its rows, as the run writes them; ``stages``: the run's stage names, in order); then,
    in a second quick pass, the rows of the clusters the page shows (a line is parsed only when
    it holds one of their ids)."""
    loads = json.loads
    if facts is None:
        facts = Facts(stages)
        add = facts.add
        with open(path, encoding="utf-8") as fh:
            for line in fh:
                add(loads(line))
    facts.settle()
    shown = set(largest_clusters(facts))
    facts.members = {}
    if shown:
        # speed: only the id after the cluster key, as the manifest writes it, is compared (a
        # search of the ids in the whole line is slower: DEVELOPERS.md, Bench notes)
        key = json.dumps({"cluster": ""}, separators=(", ", ": "))[1:-2]
        at = len(key)
        with open(path, encoding="utf-8") as fh:
            for line in fh:
                i = line.find(key)
                if i >= 0 and line[i + at:i + at + 16] in shown:
                    r = loads(line)
                    if r.get("cluster") in shown:
                        facts.members.setdefault(r["cluster"], []).append({k: r.get(k) for k in CLUSTER_FIELDS})
    return facts


def largest_clusters(facts: Facts) -> list[str]:
    """The clusters the page shows: the most files, then the largest ``cluster_size``, then by id."""
    return sorted(facts.clusters, key=lambda cid: (-facts.cluster_files(cid), -facts.clusters[cid][1],
                                                   cid))[:CLUSTERS_SHOWN]


def stage_order(summary: dict, stages: Iterable[str] | None) -> list[str]:
    names = list(stages) if stages is not None else []
    rest = [s for s in summary.get("stages", {}) if s not in names]
    rest.sort(key=lambda s: (-summary["stages"][s].get("reached", 0),
                             DEFAULT_ORDER.index(s) if s in DEFAULT_ORDER else 99, s))
    return names + rest


def _stages_section(summary: dict, order: list[str]) -> str:
    rows = []
    funnel = []
    for name in order:
        st = summary["stages"].get(name, {"reached": 0, "dropped": {}})
        dropped = sum(st["dropped"].values())
        rows.append(f'<tr class="stage"><th>{esc(name)}</th>{cell(st["reached"], f"stages.{name}.reached")}'
                    f'{cell(st["reached"] - dropped)}{cell(dropped)}<td></td></tr>')
        for reason, n in sorted(st["dropped"].items(), key=lambda kv: -kv[1]):
            meaning = REASONS.get(reason, ("", "not a known reason code"))[1]
            rows.append(f'<tr><td class="reason"><code>{esc(reason)}</code></td><td></td><td></td>'
                        f'{cell(n, f"stages.{name}.dropped.{reason}")}<td class="meaning">{esc(meaning)}</td></tr>')
        funnel.append((name, st["reached"] - dropped))
    c = summary["counts"]
    return (f'<h2>Files per stage</h2><table><tr><th>stage / reason</th><th>in</th><th>kept</th>'
            f'<th>dropped</th><th>meaning</th></tr>{"".join(rows)}</table>'
            f'<h4>Files left after each stage (of {fmt(c["files"])})</h4>'
            f'{bars(funnel, color="#5b9b6b")}')


def _key_section(facts: Facts) -> str:
    labels = [f"{n}" for n in PITCH_NAMES] + [f"{n.lower()}m" for n in PITCH_NAMES]
    return ("<h3>Keys of the kept files, before and after normalization</h3>"
            '<p class="muted">The estimated key of each source file, and that key moved by the '
            'transposition applied (upper case major, lower case minor).</p>'
            + paired_bars(labels, facts.key_before, facts.key_after, ("source key", "normalized")))


def _meter_section(facts: Facts) -> str:
    declared, estimated = facts.declared, facts.estimated
    labels = sorted(set(declared) | set(estimated), key=lambda m: (-(declared.get(m, 0) + estimated.get(m, 0)), m))[:16]
    if facts.meter_both:
        note = (f"{facts.meter_agree:,} of {facts.meter_both:,} kept files with a declared meter "
                "(meter_declared) have the same estimate (meter_estimated).")
    elif sum(declared.values()):
        note = "No kept file with a declared meter has an estimate."
    else:
        note = "No kept file declares its meter."
    suspect = facts.suspect
    if suspect:
        why = {"default": "a one-beat default such as 1/4", "contradicted": "contradicted by the notes"}
        note += (f" The declared meter was not used for {sum(suspect.values()):,} of them, whose meter is "
                 "the estimate (meter_declared_suspect): " + ", ".join(
                     f"{n:,} {why.get(k, k)}" for k, n in sorted(suspect.items())) + ".")
    return ("<h3>Meters of the kept files: declared in the file vs estimated</h3>"
            + paired_bars(labels, [declared.get(m, 0) for m in labels], [estimated.get(m, 0) for m in labels],
                          ("declared", "estimated"), width=max(300, 60 * len(labels) + 60))
            + f'<p class="muted">{esc(note)}</p>')


def _split_section(summary: dict, facts: Facts) -> str:
    sp = summary.get("split", {})
    files = sp.get("files", {})
    order = [p for p in sp.get("part_order") or () if p in files] + sorted(p for p in files if p not in (sp.get("part_order") or ()))
    targets = sp.get("targets") or {}
    body = []
    for p in order:
        target = targets.get(p)
        body.append(f'<tr><th>{esc(p)}</th>{cell(files[p], f"split.files.{p}")}'
                    f'{cell(sp.get("outputs", {}).get(p, 0), f"split.outputs.{p}")}'
                    f'{cell(sp["ratios"][p], f"split.ratios.{p}")}'
                    + (cell(target, f"split.targets.{p}") + cell(round(sp["ratios"][p] - target, 6))
                       if target is not None else "<td></td><td></td>") + "</tr>")
    stage = sp.get("stage") or {}
    extra = ""
    if "moved" in stage:
        extra += (f'<p>Files moved to another part by this run: <b data-key="split.stage.moved" '
                  f'data-value="{stage["moved"]}">{fmt(stage["moved"])}</b>; groups: '
                  f'<b data-key="split.stage.groups" data-value="{stage.get("groups", 0)}">{fmt(stage.get("groups", 0))}</b>.</p>')
    rule = folder_rule_text(stage.get("group_by_folder"))
    if rule:
        applied = stage["group_by_folder"]["applied"]
        extra += (f'<p data-key="split.stage.group_by_folder.applied" data-value="{esc(json.dumps(applied))}">'
                  f'{esc(rule[0].upper() + rule[1:])}.</p>')
    groups = [(f"{k} file{'s' if k > 1 else ''}", v // k if v % k == 0 else round(v / k, 1))
              for k, v in sorted(facts.group_sizes.items())]
    share = [(p, sp["ratios"][p] * 100) for p in order]
    return (f'<h2>Split</h2><table><tr><th>part</th><th>files</th><th>outputs</th><th>share</th>'
            f'<th>target</th><th>share - target</th></tr>{"".join(body)}</table>{extra}'
            f'<div class="row"><div><h4>Share per part (%)</h4>{bars(share, width=420, label_w=80, unit="%")}</div>'
            + (f'<div><h4>Groups by size (files that travel together)</h4>{bars(groups, width=420, label_w=80)}</div>'
               if groups else "") + "</div>")


def _clusters_section(facts: Facts, input_dir: Path, out_dir: Path) -> str:
    """The manifest's near-duplicate clusters (``cluster``) of two or more files: how many, their
    sizes in files, and the largest, each with the member dedup kept (the one the cluster is
    named after: dropped when a later stage dropped it) beside one dropped member. An audit
    found clusters grouped by ``duplicate_of`` instead: a cluster that keeps two files split in
    two, and the member of a fully dropped cluster labelled kept."""
    if not facts.clusters:
        return "<h2>Near-duplicate clusters</h2><p class=\"muted\">No cluster of two or more files.</p>"
    sizes: dict[int, int] = {}
    for cid in facts.clusters:
        n = facts.cluster_files(cid)
        sizes[n] = sizes.get(n, 0) + 1
    out = ["<h2>Near-duplicate clusters</h2>",
           f'<p>{fmt(len(facts.clusters))} clusters of two or more files (the manifest\'s <code>cluster</code>: '
           "exact and near duplicates); sizes in files: "
           + ", ".join(f"{fmt(n)} of {k}" for k, n in sorted(sizes.items())) + ". A cluster may keep several "
           "files (none directly similar to another), or none when a later stage drops the member dedup kept. "
           "The largest, each with the member dedup kept and one dropped member, each moved by the "
           "transposition normalization applied to it (so both stand in the common key):</p>"]
    for cid in largest_clusters(facts):
        members = facts.members.get(cid) or []
        files, size = (len(members), members[0]["cluster_size"]) if members else \
            (facts.cluster_files(cid), facts.clusters[cid][1])
        kept = [m for m in members if m["status"] == "kept"]
        head = next((m for m in members if m["id"] == cid and not m["duplicate_of"]), kept[0] if kept else None)
        dropped = sorted((m for m in members if m["duplicate_of"] and m["status"] != "kept"),
                         key=lambda m: (m["similarity"] or 0, m["source"]))
        near = [m for m in dropped if m["duplicate_kind"] == "near"] or dropped or \
            [m for m in members if m["status"] != "kept" and m is not head]
        other = near[0] if near else None

        def show(m: dict | None, label: str) -> str:
            if m is None:
                return f"<div class=\"thumb\"><b>{label}</b><br><span class=\"muted\">none</span></div>"
            path = input_dir / m["source"]
            if not path.is_file() and m["output"]:
                path, shift = out_dir / m["output"], 0
            else:
                shift = m["transpose"] or 0
            sim = f", similarity {m['similarity']:.2f}" if m["similarity"] is not None else ""
            kind = f" ({m['duplicate_kind']} duplicate)" if m["duplicate_kind"] else ""
            if m["status"] != "kept" and not m["duplicate_of"]:
                kind = f" (dropped by {m['stage']}: {m['reason']})"
            return (f'<div class="thumb"><b>{esc(label)}</b>{esc(kind + sim)}<br><code>{esc(m["source"])}</code><br>'
                    f'{thumbnail(path, shift)}</div>')
        title = f"{files} files" + (f", {size} contents (cluster_size: byte-identical files count once)"
                                     if size != files else "")
        title += f"; keeps {len(kept)}" if kept else "; keeps none: every member is dropped"
        head_label = "dedup kept, dropped later" if head is not None and head["status"] != "kept" else "kept"
        also = [m for m in kept if m is not head]
        more = ("<p class=\"muted\">Also kept: " + ", ".join(f"<code>{esc(m['source'])}</code>" for m in also[:5])
                + (f" and {len(also) - 5:,} more" if len(also) > 5 else "") + "</p>") if also else ""
        out.append(f'<div class="cluster"><h4>cluster {esc(cid)}: {esc(title)}</h4>{more}<div class="row">'
                   f'{show(head, head_label)}{show(other, "dropped")}</div></div>')
    return "".join(out)


def _timings_section(summary: dict) -> str:
    t = summary.get("timings_s", {})
    c = summary["counts"]
    items = [(k, v) for k, v in t.items() if k != "total" and not k.startswith("stage:")]
    stage_items = [(k[6:], v) for k, v in t.items() if k.startswith("stage:")]
    body = "".join(f"<tr><th>{esc(k)}</th>{cell(v, f'timings_s.{k}')}</tr>" for k, v in sorted(t.items()))
    return (f'<h2>Timings and reuse</h2><p>Distinct contents: {cell_inline(c["contents"], "counts.contents")}; '
            f'computed in this run: {cell_inline(c["computed"], "counts.computed")}; reused from earlier runs: '
            f'{cell_inline(c["reused"], "counts.reused")}.</p>'
            f'<div class="row"><div><h4>Phases (s)</h4>{bars(items, width=420, label_w=90, unit=" s")}</div>'
            f'<div><h4>Stages in the stage walk (s)</h4>{bars(stage_items, width=420, label_w=90, unit=" s")}</div></div>'
            f'<details><summary>all timings (summary.json)</summary><table>{body}</table></details>')


def cell_inline(value: Any, key: str) -> str:
    return f'<b data-key="{esc(key)}" data-value="{esc(json.dumps(value))}">{esc(fmt(value))}</b>'


CSS = """
body{font:14px/1.45 system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif;margin:24px auto;max-width:1100px;color:#222;padding:0 16px}
h1{font-size:22px;margin-bottom:4px}h2{font-size:18px;border-bottom:1px solid #ddd;padding-bottom:3px;margin-top:28px}
h3{font-size:15px;margin:18px 0 4px}h4{font-size:13px;margin:10px 0 4px;color:#444}
table{border-collapse:collapse;margin:6px 0}td,th{padding:2px 10px;border-bottom:1px solid #eee;text-align:left;vertical-align:top}
td.n{text-align:right;font-variant-numeric:tabular-nums}tr.stage th{padding-top:8px}td.reason{padding-left:26px}
td.meaning{color:#555;font-size:12px;max-width:520px}.muted{color:#777;font-size:12px}
.row{display:flex;flex-wrap:wrap;gap:24px}.hist{width:370px}.fig text{font-size:11px;fill:#333}.fig text.small{font-size:10px}
.cards{display:flex;gap:12px;flex-wrap:wrap}.card{border:1px solid #ddd;border-radius:6px;padding:8px 14px;min-width:110px}
.card b{font-size:22px;display:block}.thumb{max-width:520px}.thumb img{border:1px solid #ccc;image-rendering:pixelated;max-width:500px}
.cluster{border-top:1px dashed #ddd;margin-top:8px}code{font-size:12px}
"""


def render(summary: dict, facts: Facts, *, stages: Iterable[str] | None = None,
           input_dir: Path | None = None, out_dir: Path | None = None) -> str:
    """The report page as a string."""
    c = summary["counts"]
    order = stage_order(summary, stages)
    input_dir = Path(input_dir if input_dir is not None else summary.get("input", "."))
    out_dir = Path(out_dir if out_dir is not None else summary.get("output", "."))
    cards = "".join(f'<div class="card">{esc(label)}{cell_inline(c[k], f"counts.{k}")}</div>'
                    for label, k in (("files in", "files"), ("kept", "kept"), ("dropped", "dropped"),
                                     ("distinct contents", "contents")))
    hists = "".join(histogram(facts.values[f], title, unit) for f, title, unit in HISTOGRAMS)
    parts = [
        "<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">",
        f"<title>midisift report: {esc(out_dir)}</title><style>{CSS}</style></head><body>",
        f"<h1>midisift run report</h1><p class=\"muted\">input <code>{esc(summary.get('input'))}</code> &rarr; "
        f"output <code>{esc(summary.get('output'))}</code>; the numbers are those of summary.json.</p>",
        f'<div class="cards">{cards}</div>',
        _stages_section(summary, order),
        f'<h2>The kept files</h2><div class="row">{hists}</div>',
        _key_section(facts), _meter_section(facts),
    ]
    if summary.get("split", {}).get("files"):
        parts.append(_split_section(summary, facts))
    if "dedup" in summary.get("stages", {}):
        parts.append(_clusters_section(facts, input_dir, out_dir))
    parts.append(_run_tail(summary))
    return "".join(parts)


#: Where the page's part that only this run's summary decides begins (``_run_tail``).
_TAIL = "<h2>Timings and reuse</h2>"


def _run_tail(summary: dict) -> str:
    """The end of the page, from ``_TAIL``: what the run itself did (contents computed and
    reused, timings, notes); the rest describes the outputs, which a nothing-changed rerun
    leaves as they were."""
    notes = summary.get("notes") or []
    listed = "<h2>Notes</h2><ul>" + "".join(f"<li>{esc(n)}</li>" for n in notes) + "</ul>" if notes else ""
    return (_timings_section(summary) + _changes_section(summary) + _skipped_section(summary) + listed
            + "</body></html>\n")


#: Skipped entries the page names (summary.json lists more, counts all).
SKIPPED_SHOWN = 50


def _skipped_section(summary: dict) -> str:
    """The entries the listing of the input left out (summary.json's ``skipped``), with why:
    the run's notes say it once, on the console."""
    sk = summary.get("skipped") or {}
    if not sk.get("count"):
        return ""
    rows = "".join(f"<li><code>{esc(e['source'])}</code>: {esc(e['why'])}</li>"
                   for e in sk.get("listed", [])[:SKIPPED_SHOWN])
    more = sk["count"] - min(len(sk.get("listed", [])), SKIPPED_SHOWN)
    return (f"<h2>Left out of the run</h2><p>{cell_inline(sk['count'], 'skipped.count')} entries below the "
            f"input folder were not read (not in the manifest; <code>midisift explain PATH</code> says "
            f"why){f', {more:,} more in summary.json' if more > 0 else ''}:</p><ul>{rows}</ul>")


def _changes_section(summary: dict) -> str:
    """What a rerun changed against the last run (summary.json's ``changes_since_last_run``,
    ``outputs.changes``; nothing on a first run), with the first sources of each kind."""
    c = summary.get("changes_since_last_run")
    if not c:
        return ""
    key = "changes_since_last_run."
    counts = "; ".join(f"{label} {cell_inline(c[k], key + k)}" for label, k in (
        ("files added", "files_added"), ("changed", "files_changed"), ("removed", "files_removed"),
        ("files kept now", "now_kept"), ("dropped now", "now_dropped"), ("moved to another part", "moved")))
    ex = c.get("examples", {})
    rows = ([f"<li>{label}: <code>{esc(src)}</code></li>" for label, k in (
                ("added", "files_added"), ("changed", "files_changed"), ("removed", "files_removed"))
             for src in ex.get(k, [])]
            + [f"<li>kept now: <code>{esc(e['source'])}</code> ({esc(e['split'])})</li>" for e in ex.get("now_kept", [])]
            + [f"<li>dropped now: <code>{esc(src)}</code></li>" for src in ex.get("now_dropped", [])]
            + [f"<li>moved: <code>{esc(e['source'])}</code> ({esc(e['from'])} &rarr; {esc(e['to'])})</li>"
               for e in ex.get("moved", [])])
    # the lists hold the first few of each kind: say how many more there are (an audit found
    # 20 of 49 newly kept files listed as if they were all)
    # (a summary.json written before 0.4.8 lists no files added, changed or removed)
    unlisted = sum(max(0, int(c.get(k, 0)) - len(ex[k])) for k in (
        "files_added", "files_changed", "files_removed", "now_kept", "now_dropped", "moved") if k in ex)
    more = (f"<p>The first {EXAMPLES} of each kind are listed, {unlisted:,} more are not (the counts are "
            "complete; <code>midisift explain PATH</code> for any file of this run).</p>" if unlisted else "")
    return (f"<h2>Since the last run</h2><p>{counts}.</p>"
            + (f"<ul>{''.join(rows)}</ul>" if rows else "") + more)


def rewrite_run_tail(out_dir: Path | str, summary: dict) -> bool:
    """Give OUTPUT/report.html the counts and timings of a run that changed no output (a
    nothing-changed rerun: its summary's), keeping the rest of the page; False, writing
    nothing, when there is no page with that part to replace. Speed: no manifest read and no
    thumbnail decoded, so the nothing-changed shortcut stays free of numpy."""
    path = Path(out_dir) / "report.html"
    try:
        page = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return False
    at = page.find(_TAIL)
    if at < 0 or page.find(_TAIL, at + 1) >= 0:
        return False
    write_atomic(path, page[:at] + _run_tail(summary), fsync=False)
    return True


def write_report(out_dir: Path | str, summary: dict | None = None, stages: Iterable[str] | None = None,
                 input_dir: Path | None = None, facts: Facts | None = None) -> Path:
    """Write OUTPUT/report.html from the run's summary (read from summary.json when not given)
    and its manifest (``facts``: gathered from its rows while they were written, else read
    from it); ``stages`` gives the stage order, ``input_dir`` the folder the sources are read
    from for the cluster thumbnails (default: the summary's input). Returns the path."""
    t0 = time.perf_counter()
    out_dir = Path(out_dir)
    if summary is None:
        summary = json.loads((out_dir / "summary.json").read_text(encoding="utf-8"))
    facts = read_manifest(out_dir / "manifest.jsonl", facts)
    page = render(summary, facts, stages=stages, input_dir=input_dir, out_dir=out_dir)
    elapsed = time.perf_counter() - t0
    page = page.replace("</body></html>", f'<p class="muted">This page took {elapsed:.2f} s to write.</p></body></html>')
    path = out_dir / "report.html"
    write_atomic(path, page, fsync=False)
    return path


__all__ = ["write_report", "render", "read_manifest", "Facts", "RowFacts"]


if __name__ == "__main__":  # python -m pipeline.outputs.page OUTPUT: write the page again
    import sys
    print(write_report(Path(sys.argv[1])))
