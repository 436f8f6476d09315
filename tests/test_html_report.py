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
    clusters = re.findall(r"<h4>cluster ([0-9a-f]{16}): (\d+) files</h4>(.*?)</div></div>", page, re.S)
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
