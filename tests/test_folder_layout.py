"""The split's ``group_by_folder: auto``: a collection laid out one folder per piece is found
from its files' own near-duplicate links, and then its folders share a part, so versions the
notes do not link still travel together.

The real-data checks use twelve files of POP909 (tests/data/pop909, MIT licence, Music X Lab
2020: its README there says which): the collection's own folders and labels are the outside
truth of which files are one song. The layout rule's own cases are built from invented paths.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
import yaml

from pipeline.config import load_config
from pipeline.engine.runner import Runner
from pipeline.errors import ConfigError
from pipeline.outputs.table import split_lines
from pipeline.similarity.grouping import FOLDER_SHARE, piece_folders

POP = Path(__file__).parent / "data" / "pop909"


# --- the layout rule on invented paths ----------------------------------------------------

def _piece_per_folder(n: int, versions: int = 2, stray: int = 0) -> list[tuple[str, str]]:
    """``n`` folders, each a piece's main file and ``versions`` versions in a subfolder, all of
    the piece's identity but ``stray`` versions of the first folder (another identity each)."""
    files = []
    for k in range(n):
        files.append((f"song{k}/song{k}.mid", f"piece{k}"))
        for v in range(versions):
            odd = k == 0 and v < stray
            files.append((f"song{k}/versions/v{v}.mid", f"odd{v}" if odd else f"piece{k}"))
    return files


def test_a_folder_per_piece_is_found_at_its_depth():
    layout = piece_folders(_piece_per_folder(5))
    assert (layout.depth, layout.share, layout.folders) == (1, 1.0, 5)
    # under one top folder holding everything, the pieces are one level down
    nested = [(f"collection/{p}", g) for p, g in _piece_per_folder(5)]
    assert piece_folders(nested).depth == 2
    # a version the notes do not link lowers the share, within the bar (14 of 15 files)
    assert piece_folders(_piece_per_folder(5, stray=1)).depth == 1


def test_a_collection_laid_out_by_piece_beside_others_is_found_on_its_own():
    """A song collection copied beside folders of mixed files: the input as a whole is not laid
    out by piece, but its top-level folder of songs is, and its songs are tied (an audit: pop909
    beside 25 folders of generated files had its versions leak again). Our own rule."""
    songs = [(f"songs/{p}", g) for p, g in _piece_per_folder(5)]
    mixed = [(f"gen/d{k % 2}/f{k}.mid", f"x{k}") for k in range(80)]
    layout = piece_folders(songs + mixed)
    assert layout.depth is None and layout.share < FOLDER_SHARE
    assert [(top, found.depth, found.folders) for top, found in layout.collections] == [("songs", 2, 5)]
    assert layout.as_dict()["collections"]["songs"]["depth"] == 2
    from pipeline.stages.split import _piece_folder
    assert _piece_folder("songs/song3/versions/v0.mid", {"songs": 2}) == "songs/song3"
    assert _piece_folder("songs/loose.mid", {"songs": 2}) is None  # right in the collection's folder
    assert _piece_folder("gen/d0/f0.mid", {"songs": 2}) is None


def test_piece_folders_beside_a_few_large_mixed_ones_are_named_with_the_way_to_tie_them():
    """Song folders at the top beside two large folders of other files: the files' share stays
    below the bar (the large folders hold most files), but most folders hold one piece each;
    the run says so and names the setting that ties them (a split audit: POP909's songs beside
    two folders of 1,000 generated files leaked songs 575 and 703 with nothing said). Our own
    rule."""
    from pipeline.outputs.table import folder_rule_text
    from pipeline.stages.split import Split
    songs = _piece_per_folder(20, versions=1)
    mixed = [(f"gen{k % 2}/f{k}.mid", f"x{k}") for k in range(400)]
    layout = piece_folders(songs + mixed)
    assert layout.depth is None and layout.collections == ()
    assert (layout.at, layout.folders, layout.alike) == (1, 22, 20)
    rule = {"option": "auto", "applied": False, **layout.as_dict()}
    assert "yet 20 of those 22 folders hold one piece each" in folder_rule_text(rule)
    summary: dict = {"split": {}}
    Split({}).add_to_summary(summary, {"summary": {"group_by_folder": rule}})
    warning = next(w for w in summary["warnings"] if w.startswith("group_by_folder: auto tied no folders, yet 20 of 22"))
    # the advice does not tie the large folders of other files (a regression audit: depth 1
    # put them, whole, into one part each)
    assert "move the piece folders under one folder of their own" in warning
    assert "only if every folder, the large ones too, is one piece" in warning
    # folders that mix pieces say nothing of the kind
    mixing = piece_folders([(f"album{k % 4}/t{k}.mid", f"p{k}") for k in range(40)])
    assert mixing.alike == 0
    assert "yet" not in folder_rule_text({"option": "auto", "applied": False, **mixing.as_dict()})


def test_folders_that_mix_pieces_are_not_pieces():
    # by composer or session: each folder holds several pieces, one file each
    mixed = [(f"composer{k % 4}/work{k}.mid", f"piece{k}") for k in range(40)]
    layout = piece_folders(mixed)
    assert layout.depth is None and layout.share == pytest.approx(0.1)
    # one large folder of different pieces outweighs a few folders of one piece each (the share
    # counts files, not folders)
    big = _piece_per_folder(3) + [(f"inbox/f{k}.mid", f"x{k}") for k in range(40)]
    assert piece_folders(big).depth is None
    # too few folders of two or more to judge; files at the top are not counted
    assert piece_folders(_piece_per_folder(2)).depth is None
    assert piece_folders([(f"f{k}.mid", "same") for k in range(10)]).folders == 0


def test_the_bar_is_the_share_of_files_in_their_folders_largest_group():
    # 3 folders of 5 files: 4 of one identity in each is 0.8, at the bar; 3 in one of them is below
    at_bar = [(f"s{k}/f{v}.mid", f"p{k}" if v < 4 else f"q{k}") for k in range(3) for v in range(5)]
    assert piece_folders(at_bar).share == pytest.approx(FOLDER_SHARE) and piece_folders(at_bar).depth == 1
    below = [(p, "other" if p == "s0/f3.mid" else g) for p, g in at_bar]
    assert piece_folders(below).depth is None


def test_the_rule_counts_the_folders_group_by_folder_applies():
    # on random layouts, each depth's share and folder count as a plain count over the folders
    # that ``group_by_folder: N`` ties (``split.folder_of``), so what is judged is what is applied
    import random
    from collections import Counter, defaultdict
    from pipeline.stages.split import folder_of
    rng = random.Random(7)
    for _ in range(40):
        files = []
        for k in range(rng.randint(0, 60)):
            depth = rng.randint(0, 4)
            parts = [rng.choice("abc") for _ in range(depth)]
            files.append(("/".join(parts + [f"f{k}.mid"]), rng.choice("xyz") if rng.random() < 0.7 else f"g{k}"))
        for depth in (1, 2, 3):
            by = defaultdict(Counter)
            for path, group in files:
                folder = folder_of(path, depth)
                if folder is not None:
                    by[folder][group] += 1
            several = [c for c in by.values() if sum(c.values()) >= 2]
            total = sum(sum(c.values()) for c in several)
            found = piece_folders(files, depths=(depth,), min_folders=0, share=2.0)  # never applied
            assert found.folders == len(several)
            assert found.share == pytest.approx(sum(max(c.values()) for c in several) / total if total else 0.0)


# --- POP909's own layout ------------------------------------------------------------------

def _run(tmp_path: Path, corpus: Path, out: str, *, dedup: bool = True, **split: object) -> tuple[list[dict], dict]:
    cfg = tmp_path / f"{out}.yaml"
    cfg.write_text(yaml.safe_dump({
        "input": str(corpus), "output": str(tmp_path / out), "workers": 1,
        "stages": [{"validate": {}}, {"key_meter": {}}, *([{"dedup": {}}] if dedup else []),
                   {"split": {"ratios": {"train": 0.5, "valid": 0.25, "test": 0.25}, **split}}]}))
    Runner(load_config(cfg), quiet=True).run()
    rows = [json.loads(line) for line in (tmp_path / out / "manifest.jsonl").read_text().splitlines()]
    summary = json.loads((tmp_path / out / "summary.json").read_text())["split"]["stage"]
    return rows, summary


def _song(source: str) -> str:
    return Path(source).name[:3]  # the collection's file names begin with the song's number


def test_pop909_versions_the_notes_do_not_link_share_their_songs_part(tmp_path):
    rows, summary = _run(tmp_path, POP, "layout")
    by = {r["source"]: r for r in rows}
    # the notes alone: 703-v2 (another melody) is not in 703.mid's dedup cluster, so both stay
    assert by["703/versions/703-v2.mid"]["cluster"] != by["703/703.mid"]["cluster"]
    kept_703 = [r for r in rows if r["status"] == "kept" and _song(r["source"]) == "703"]
    assert len(kept_703) >= 2
    # the layout, judged on the 11 distinct contents (v2 and v3 are byte-identical): 10 lie in
    # their folder's largest group (703: 4 of 5)
    assert summary["group_by_folder"] == {"option": "auto", "applied": 1, "depth": 1, "judged_depth": 1,
                                          "share": pytest.approx(10 / 11, abs=1e-4), "folders": 4}
    assert len({(r["split"], r["group"]) for r in kept_703}) == 1
    # the run's table says so
    assert split_lines(summary) == ["split  files under the same top-level folder share a part (group_by_folder: "
                                    "auto: 90.9% of the files in 4 folders of two or more lie in their folder's "
                                    "largest near-duplicate group)"]
    assert ('data-key="split.stage.group_by_folder.applied" data-value="1">Files under the same top-level folder'
            in (tmp_path / "layout" / "report.html").read_text(encoding="utf-8"))
    # explain names the group's members and the folder rule
    from pipeline.audit.explain import explain
    text = explain(tmp_path / "layout", "703/versions/703-v2.mid")
    assert "group members (2)" in text and "703/versions/703-v4.mid" in text
    assert "files under the same top-level folder share a part (group_by_folder: auto: 90.9%" in text
    # every song of the collection lies in one part
    parts: dict[str, set] = {}
    for r in rows:
        if r["status"] == "kept":
            parts.setdefault(_song(r["source"]), set()).add(r["split"])
    assert all(len(p) == 1 for p in parts.values())
    # the user's word wins: no folder grouping, and 703's kept files are apart
    rows_off, summary_off = _run(tmp_path, POP, "off", group_by_folder=False)
    assert summary_off["group_by_folder"] == {"option": False, "applied": False}
    groups = {r["group"] for r in rows_off if r["status"] == "kept" and _song(r["source"]) == "703"}
    assert len(groups) >= 2


def test_without_dedup_the_split_judges_the_layout_on_its_own_links(tmp_path):
    # every file reaches the split; its own signatures link the versions that share a melody
    rows, summary = _run(tmp_path, POP, "no_dedup", dedup=False)
    assert summary["group_by_folder"]["applied"] == 1 and summary["near_duplicate_signatures"] == "split"
    parts: dict[str, set] = {}
    for r in rows:
        parts.setdefault(_song(r["source"]), set()).add(r["split"])
    assert len(rows) == 12 and all(len(p) == 1 for p in parts.values())


def test_pop909_versions_added_later_join_their_songs_part(tmp_path):
    # the first run lacks 703's versions with another melody; a rerun adds them: they join the
    # part the song's files already hold, and no file moves
    corpus = tmp_path / "pop"
    shutil.copytree(POP, corpus)
    held = {name: (corpus / "703" / "versions" / name).read_bytes() for name in ("703-v2.mid", "703-v3.mid")}
    for name in held:
        (corpus / "703" / "versions" / name).unlink()
    first, summary = _run(tmp_path, corpus, "grow")
    assert summary["group_by_folder"]["applied"] == 1
    part_703 = {r["split"] for r in first if r["status"] == "kept" and _song(r["source"]) == "703"}
    assert len(part_703) == 1
    for name, data in held.items():
        (corpus / "703" / "versions" / name).write_bytes(data)
    again, summary = _run(tmp_path, corpus, "grow")
    assert summary["moved"] == 0
    assert {r["split"] for r in again if r["status"] == "kept" and _song(r["source"]) == "703"} == part_703
    before = {r["source"]: r["split"] for r in first}
    assert all(r["split"] == before[r["source"]] for r in again if r["source"] in before)


def test_pop909_beside_a_folder_of_other_music_keeps_its_songs_together(tmp_path):
    """The twelve POP909 files under pop909/, beside gen/ (generated pieces, one folder of many):
    the input as a whole is not laid out by piece, pop909/ is, and its songs' files share a
    part (an audit: pop909-dev beside 25 folders of generated files leaked two songs)."""
    from pipeline.tools.synth import generate
    corpus = tmp_path / "mixed"
    shutil.copytree(POP, corpus / "pop909")
    generate(corpus / "gen", 60, seed=4)
    rows, summary = _run(tmp_path, corpus, "mixed_out")
    rule = summary["group_by_folder"]
    assert rule["applied"] == {"pop909": 2} and rule["depth"] is None
    assert rule["collections"]["pop909"]["folders"] == 4
    parts: dict[str, set] = {}
    for r in rows:
        if r["status"] == "kept" and r["source"].startswith("pop909/"):
            parts.setdefault(_song(r["source"]), set()).add(r["split"])
    assert len(parts) == 4 and all(len(p) == 1 for p in parts.values())
    assert split_lines(summary)[0].startswith(
        "split  files under the same folder share a part within 1 top-level folder laid out one "
        "folder per piece (group_by_folder: auto: not the input as a whole")
    assert "pop909/ at depth 2 (90.9% of the files in 4 folders)" in split_lines(summary)[0]
    page = (tmp_path / "mixed_out" / "report.html").read_text(encoding="utf-8")
    assert 'data-key="split.stage.group_by_folder.applied" data-value="{&quot;pop909&quot;: 2}"' in page


def test_pop909_files_in_folders_that_mix_songs_are_not_grouped_by_folder(tmp_path):
    # the same twelve files laid out by role: the songs' main files in one folder, every
    # version in another (each folder holds several songs)
    corpus = tmp_path / "by_role"
    for src in POP.rglob("*.mid"):
        rel = src.relative_to(POP)
        dest = corpus / ("versions" if "versions" in rel.parts else "main") / src.name
        dest.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(src, dest)
    rows, summary = _run(tmp_path, corpus, "by_role_out")
    assert summary["group_by_folder"]["applied"] is False
    assert summary["group_by_folder"]["share"] < FOLDER_SHARE
    # the table says why (two folders are too few to judge)
    assert split_lines(summary) == ["split  folders are not taken as pieces (group_by_folder: auto: "
                                    "fewer than 3 folders hold two or more files)"]
    three = {**summary["group_by_folder"], "folders": 3, "share": 0.5}
    assert split_lines({"group_by_folder": three}) == [
        "split  folders are not taken as pieces (group_by_folder: auto: at best 50.0% of the files "
        "in 3 folders of two or more lie in their folder's largest near-duplicate group, below 80%)"]
    # and flat, there is no folder to read
    flat = tmp_path / "flat"
    flat.mkdir()
    for src in POP.rglob("*.mid"):
        shutil.copyfile(src, flat / src.name)
    _, summary_flat = _run(tmp_path, flat, "flat_out")
    assert summary_flat["group_by_folder"] == {"option": "auto", "applied": False, "depth": None,
                                               "judged_depth": None, "share": 0.0, "folders": 0,
                                               "alike": 0}
    assert split_lines(summary_flat) == []


def test_group_by_folder_names_what_it_takes():
    from pipeline.config import parse_config
    cfg = {"input": "in", "output": "out", "stages": ["validate", {"split": {"group_by_folder": "auto"}}]}
    parse_config(cfg)  # accepted
    cfg["stages"][1]["split"]["group_by_folder"] = "sometimes"
    with pytest.raises(ConfigError, match="must be auto, true, false or a folder depth of at least 1, not 'sometimes'"):
        parse_config(cfg)
