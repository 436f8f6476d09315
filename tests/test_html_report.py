"""OUTPUT/report.html: written by every run, self-contained, with summary.json's numbers.

Outside references: Pillow (when installed) reads the inline PNG thumbnails and the screenshot;
headless Chromium (Debian package ``chromium``, when installed) renders the page.
"""
from __future__ import annotations

import base64
import html
import io
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pytest

from pipeline.config import load_config
from pipeline.outputs.page import read_manifest
from pipeline.engine.runner import Runner

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "sample_corpus"
CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)


def _run(out: Path, config: str = "default.yaml") -> None:
    cfg = load_config(ROOT / "configs" / config, input=str(DEMO), output=str(out), workers=1)
    Runner(cfg, quiet=True).run()


@pytest.fixture(scope="module")
def demo_out(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("report") / "out"
    _run(out)
    return out


class _Keyed(HTMLParser):
    """Collects every element's data-key / data-value pair and every img src."""

    def __init__(self) -> None:
        super().__init__()
        self.keyed: dict[str, list] = {}
        self.images: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "data-key" in a:
            self.keyed.setdefault(a["data-key"], []).append(json.loads(a["data-value"]))
        if tag == "img":
            self.images.append(a.get("src", ""))


def _parse(path: Path) -> _Keyed:
    p = _Keyed()
    p.feed(path.read_text(encoding="utf-8"))
    return p


def _lookup(summary: dict, key: str):
    node = summary
    for part in key.split("."):
        node = node[part]
    return node


def test_every_run_writes_the_report(demo_out):
    page = (demo_out / "report.html").read_text(encoding="utf-8")
    assert page.startswith("<!DOCTYPE html>") and page.rstrip().endswith("</html>")
    for heading in ("Files per stage", "The kept files", "Keys of the kept files", "Meters of the kept files",
                    "Split", "Near-duplicate clusters", "Timings and reuse"):
        assert heading in page


def test_the_numbers_are_summary_json_s(demo_out):
    summary = json.loads((demo_out / "summary.json").read_text())
    keyed = _parse(demo_out / "report.html").keyed
    for key, values in keyed.items():
        for v in values:
            assert v == _lookup(summary, key), key
    # and every count of the summary is on the page
    wanted = [f"counts.{k}" for k in ("files", "kept", "dropped", "contents", "computed", "reused")]
    for stage, st in summary["stages"].items():
        wanted.append(f"stages.{stage}.reached")
        wanted += [f"stages.{stage}.dropped.{reason}" for reason in st["dropped"]]
    for part in summary["split"]["files"]:
        wanted += [f"split.files.{part}", f"split.outputs.{part}", f"split.ratios.{part}", f"split.targets.{part}"]
    wanted += ["split.stage.moved", "split.stage.groups"] + [f"timings_s.{k}" for k in summary["timings_s"]]
    assert sorted(set(wanted) - set(keyed)) == []


def test_reason_meanings_stand_beside_the_codes(demo_out):
    from pipeline.reasons import REASONS
    page = (demo_out / "report.html").read_text(encoding="utf-8")
    for reason in ("not_midi", "near_duplicate", "too_short"):
        row = re.search(rf"<code>{reason}</code>.*?</tr>", page, re.S).group(0)
        assert html.escape(REASONS[reason][1], quote=True) in row


def test_distributions_count_the_kept_files(demo_out):
    summary = json.loads((demo_out / "summary.json").read_text())
    facts = read_manifest(demo_out / "manifest.jsonl")
    kept = summary["counts"]["kept"]
    for field in ("duration_s", "notes_per_s", "mean_polyphony", "bpm"):
        assert len(facts.values[field]) == kept
    assert sum(facts.key_before) == sum(facts.key_after) == kept
    # the default config normalizes majors to C and minors to A (configs/default.yaml)
    assert facts.key_after[0] + facts.key_after[12 + 9] == kept
    assert sum(facts.group_sizes.values()) == kept


def test_the_page_is_self_contained_and_its_thumbnails_are_png(demo_out):
    page = (demo_out / "report.html").read_text(encoding="utf-8")
    assert not re.search(r"""(src|href)=["']?(https?:)?//""", page)
    assert "@import" not in page and "<script" not in page
    images = _parse(demo_out / "report.html").images
    assert len(images) == 12  # six clusters, a kept and a dropped member each
    Image = pytest.importorskip("PIL.Image")  # reference reader: Pillow
    for src in images:
        assert src.startswith("data:image/png;base64,")
        with Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1]))) as im:
            im.load()
            assert im.size[0] > 10 and im.size[1] > 10


def test_clusters_show_the_kept_member_and_a_dropped_one_with_its_similarity(demo_out):
    page = (demo_out / "report.html").read_text(encoding="utf-8")
    rows = [json.loads(line) for line in (demo_out / "manifest.jsonl").read_text().splitlines()]
    clusters = re.findall(r"<h4>cluster ([0-9a-f]{16}): (\d+) files[^<]*</h4>(.*?)</div></div>", page, re.S)
    assert len(clusters) == 6
    every = {}
    for r in rows:
        if r["cluster"]:
            every.setdefault(r["cluster"], []).append(r)
    largest = sorted(len(m) for m in every.values())[-6:]
    assert sorted(int(size) for _, size, _ in clusters) == largest  # the six largest are shown
    for cid, size, body in clusters:
        members = every[cid]
        assert int(size) == len(members)
        kept = next(r for r in members if r["id"] == cid and r["duplicate_of"] is None)
        assert f"<code>{kept['source']}</code>" in body.replace("&#x27;", "'")
        sims = {f"{r['similarity']:.2f}" for r in members if r["duplicate_of"]}
        assert re.search(r"similarity (\d\.\d\d)", body).group(1) in sims


def _cluster_row(source: str, rid: str, cluster: str, size: int, status: str = "dropped", **fields) -> dict:
    row = {"id": rid, "source": source, "status": status, "stage": None, "reason": None, "transpose": 0,
           "output": None, "cluster": cluster, "cluster_size": size, "duplicate_of": None,
           "duplicate_kind": None, "similarity": None}
    return row | fields


def test_the_page_s_clusters_are_the_manifest_s(tmp_path):
    """Found by an audit: the page grouped rows by ``duplicate_of``, so a cluster that keeps two
    files (none directly similar to the other: dedup keeps both) was shown as two smaller ones,
    and the member dedup kept of a cluster a later stage dropped whole was labelled kept. The
    page's clusters, sizes and kept members are the manifest's ``cluster``, ``cluster_size`` and
    ``status`` (the reference here: the manifest the test writes)."""
    from pipeline.outputs.page import _clusters_section
    a, b, c, d, e = (ch * 16 for ch in "abcde")
    rows = [  # cluster a: three contents, a and c kept, b a near duplicate of a
        _cluster_row("a.mid", a, a, 3, "kept"),
        _cluster_row("b.mid", b, a, 3, stage="dedup", reason="near_duplicate", duplicate_of=a,
                     duplicate_kind="near", similarity=0.9),
        _cluster_row("c.mid", c, a, 3, "kept"),
        # cluster d: dedup kept d, which the filter dropped; e its near duplicate
        _cluster_row("d.mid", d, d, 2, stage="filter", reason="long_silence"),
        _cluster_row("e.mid", e, d, 2, stage="dedup", reason="near_duplicate", duplicate_of=d,
                     duplicate_kind="near", similarity=0.8),
        # a byte-identical copy of a lone file: a cluster of one content and two files
        _cluster_row("f.mid", "f" * 16, "f" * 16, 1, "kept"),
        _cluster_row("g.mid", "f" * 16, "f" * 16, 1, stage="dedup", reason="exact_duplicate",
                     duplicate_of="f" * 16, duplicate_kind="bytes", similarity=1.0),
        _cluster_row("h.mid", "1" * 16, "1" * 16, 1, "kept"),  # alone
    ]
    manifest = tmp_path / "manifest.jsonl"
    manifest.write_text("".join(json.dumps(r) + "\n" for r in rows))
    text = html.unescape(re.sub(r"<[^>]+>", " ", _clusters_section(read_manifest(manifest), tmp_path, tmp_path)))
    text = re.sub(r"\s+", " ", text.replace("file not available", ""))
    assert "3 clusters of two or more files" in text and "sizes in files: 2 of 2, 1 of 3." in text
    assert f"cluster {a}: 3 files; keeps 2 Also kept: c.mid kept a.mid dropped (near duplicate), similarity 0.90 b.mid" in text
    assert (f"cluster {d}: 2 files; keeps none: every member is dropped dedup kept, dropped later "
            "(dropped by filter: long_silence) d.mid dropped (near duplicate), similarity 0.80 e.mid") in text
    assert f"cluster {'f' * 16}: 2 files, 1 contents (cluster_size: byte-identical files count once); keeps 1 kept f.mid" in text
    assert "1111111111111111" not in text


def test_a_cluster_the_filter_dropped_whole_shows_no_kept_member(tmp_path):
    """The real-data side of the test above: POP909 songs (tests/data/pop909) with a filter no
    file passes; every cluster's member dedup kept is dropped, and the page says so."""
    corpus = ROOT / "tests" / "data" / "pop909"
    cfg = tmp_path / "c.yaml"
    cfg.write_text(json.dumps({"input": str(corpus), "output": str(tmp_path / "out"), "workers": 1, "stages": [
        {"validate": {}}, {"key_meter": {}}, {"dedup": {}}, {"filter": {"min_notes": 1000000}}, {"split": {}}]}))
    Runner(load_config(cfg), quiet=True).run()
    rows = [json.loads(line) for line in (tmp_path / "out" / "manifest.jsonl").read_text().splitlines()]
    assert not any(r["status"] == "kept" for r in rows)
    page = (tmp_path / "out" / "report.html").read_text(encoding="utf-8")
    section = page[page.index("<h2>Near-duplicate clusters"):page.index("<h2>Timings")]
    shown = re.findall(r"<h4>cluster ([0-9a-f]{16}): (\d+) files[^<]*keeps none[^<]*</h4>", section)
    assert shown and "<b>kept</b>" not in section
    for cid, n in shown:
        assert int(n) == sum(r["cluster"] == cid for r in rows)
        head = next(r for r in rows if r["id"] == cid and r["duplicate_of"] is None)
        assert re.search(rf"<b>dedup kept, dropped later</b> \(dropped by filter: {head['reason']}\)<br>"
                         rf"<code>{re.escape(head['source'])}</code>", section)


def test_the_meter_sentence_counts_the_manifest_s_declared_meters(tmp_path):
    """Found by an audit: the page said "89 of 104 kept files with a declared meter" while every
    kept row had a ``meter_declared``: it counted only the rows whose meter_source was file.
    (Run with ``meter_contradiction: 0.01``, the default before 0.4.8, so the demo has declared
    meters that were not used.)"""
    cfg = load_config(ROOT / "configs" / "default.yaml", input=str(DEMO), output=str(tmp_path / "out"), workers=1)
    next(s for s in cfg.stages if s.name == "key_meter").options["meter_contradiction"] = 0.01
    Runner(cfg, quiet=True).run()
    demo_out = tmp_path / "out"
    rows = [json.loads(line) for line in (demo_out / "manifest.jsonl").read_text().splitlines()]
    kept = [r for r in rows if r["status"] == "kept" and r.get("meter_declared")]
    both = [r for r in kept if r.get("meter_estimated")]
    assert any(r["meter_source"] != "file" for r in both)  # the demo has declared meters not used
    agree = sum(r["meter_declared"] == r["meter_estimated"] for r in both)
    unused = sum(1 for r in kept if r.get("meter_declared_suspect"))
    page = html.unescape((demo_out / "report.html").read_text(encoding="utf-8"))
    assert (f"{agree} of {len(both)} kept files with a declared meter (meter_declared) have the same "
            "estimate (meter_estimated).") in page
    assert f"The declared meter was not used for {unused} of them" in page


def test_the_median_is_the_middle_of_an_even_count():
    """An audit found the upper middle value printed as the median; the reference: statistics."""
    import statistics
    from pipeline.outputs.page import histogram
    values = [4.0, 1.0, 3.0, 2.0, 10.0, 7.5]
    assert f"median {statistics.median(values):g} s" in histogram(values, "Duration", "s")
    assert f"median {statistics.median(values[:5]):g} s" in histogram(values[:5], "Duration", "s")


def test_facts_with_rows_taken_back_equal_facts_of_the_rows_left(demo_out):
    """``Facts.remove`` undoes ``add``: the demo's rows all added and every third taken back
    count as the rows left added alone (value lists as multisets, clusters in source order);
    a removed value that is not there (a NaN) makes ``settle`` say so."""
    from pipeline.outputs.page import Facts
    rows = [json.loads(line) for line in (demo_out / "manifest.jsonl").read_text().splitlines()]
    gone, left = rows[::3], [r for i, r in enumerate(rows) if i % 3]
    assert any(r.get("duplicate_of") for r in gone) and any(r["status"] == "kept" for r in gone)
    both, alone = Facts(), Facts()
    for r in rows:
        both.add(r)
    for r in gone:
        both.remove(r)
    for r in left:
        alone.add(r)
    assert both.settle() and alone.settle()
    a, b = both.to_state(), alone.to_state()
    a["values"] = {f: sorted(v) for f, v in a["values"].items()}
    b["values"] = {f: sorted(v) for f, v in b["values"].items()}
    assert a == b
    kept = next(r for r in rows if r["status"] == "kept" and r.get("duration_s"))
    both.remove({**kept, "duration_s": float("nan")})
    assert not both.settle()


def test_a_run_without_dedup_or_split_still_writes_its_page(tmp_path):
    out = tmp_path / "v"
    _run(out, "validate-only.yaml")
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "Files per stage" in page and "Near-duplicate clusters" not in page


@pytest.mark.skipif(CHROMIUM is None, reason="headless Chromium is not installed (Debian package chromium)")
def test_the_page_renders_in_headless_chromium(demo_out, tmp_path):
    shot = tmp_path / "report.png"
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", "--hide-scrollbars", "--window-size=1200,2400",
           f"--screenshot={shot}", (demo_out / "report.html").as_uri()]
    subprocess.run(cmd, capture_output=True, timeout=120)
    assert shot.is_file(), "chromium wrote no screenshot"
    Image = pytest.importorskip("PIL.Image")  # reference reader: Pillow
    with Image.open(shot) as im:
        gray = im.convert("L")
        hist = gray.histogram()
    pixels = sum(hist)
    dark = sum(hist[:200]) / pixels
    # not blank: a white page with text, tables and figures has a few percent of dark pixels
    # and many gray levels (anti-aliased text, the figures' blues)
    assert dark > 0.02, dark
    assert sum(1 for n in hist if n) > 50
