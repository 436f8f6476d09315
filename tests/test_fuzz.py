"""Property-based fuzzing of the decoder and the per-file stages (pipeline.tools.fuzz).

Valid SMF files are generated with hypothesis and mutated (bit flips, truncation, lying chunk
lengths, huge variable-length deltas, running status without a status, zero-length tracks,
garbage after the last track, ...). Every file must get exactly one verdict, no exception may
escape, and a file that is still valid after the mutation must decode to the same notes as the
reference decoder: mido (``pipeline.tools.fuzz.reference_rows``, the suite's one mido reader, also
behind ``fixtures_midi.mido_rows``) read under the note policy documented in pipeline.midi.decode; a
file mido refuses (e.g. a sysex payload byte above 0x7F, which our decoder skips by its declared
length) is not compared.

CI tries 400 + 150 hypothesis cases, 275 seeded cases (25 per mutation kind, forced), 40
cross-checks of the long run's reference, a 60-file fuzzed corpus through a whole run and a
0.6-second smoke run of ``python -m pipeline.tools.fuzz``: about 925 cases plus the smoke run.
"""
from __future__ import annotations

import json
import random
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings

from fixtures_midi import mido_rows
from pipeline.tools import fuzz
from pipeline.config import load_config
from pipeline.engine.runner import Runner

REPO = Path(__file__).resolve().parents[1]

CHECKER = fuzz.Checker(reference=fuzz.reference_rows)  # None where mido cannot read the file
FAST = dict(deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


@settings(max_examples=400, **FAST)
@given(fuzz.smf_cases())
def test_mutated_files_get_one_verdict_and_valid_ones_match_mido(case):
    data, _ = case
    verdict = CHECKER.check(data)  # raises on an escape or a mismatch with mido
    assert verdict.reason == "kept" or verdict.reason in fuzz.VALIDATE_REASONS


@settings(max_examples=150, **FAST)
@given(fuzz.smf_cases(mutate=False))
def test_unmutated_files_are_kept_and_match_mido(case):
    data, applied = case
    assert applied == ()
    verdict = CHECKER.check(data)
    assert verdict.reason in ("kept", "no_notes")
    if verdict.reason == "kept":
        assert verdict.compared  # repair-free, mido reads it: the notes were compared


#: The verdicts each mutation can lead to, by the SMF 1.0 layout (a cut file ends inside a
#: chunk; a channel event with no status byte in effect is damaged; bytes after the last track
#: and empty MTrk chunks are tolerated repairs) and the decoder's documented reason codes.
EXPECTED = {
    "truncate": {"truncated", "not_midi"},
    "no_status": {"bad_event"},
    "garbage_tail": {"kept", "no_notes"},
    "zero_track": {"kept", "no_notes"},
    "huge_delta": {"kept", "no_notes", "bad_event"},  # 5-byte deltas are bad_event
    "random_bytes": {"not_midi", "bad_chunk", "truncated", "bad_event", "unsupported_format"},
}


@pytest.mark.parametrize("kind", fuzz.MUTATIONS)
def test_each_mutation_kind(kind):
    rng = random.Random(f"mutation {kind}")
    reasons = set()
    for _ in range(25):
        data, applied = fuzz.random_case(rng, kinds=(kind,))
        assert applied == (kind,)
        reasons.add(CHECKER.check(data).reason)
    assert reasons <= EXPECTED.get(kind, fuzz.VALIDATE_REASONS | {"kept"})


def test_checker_catches_a_decoder_that_disagrees_with_the_reference():
    data, _ = fuzz.random_case(random.Random(3), mutate=False)
    assert CHECKER.check(data).compared

    def off_by_one(raw):
        return [(s, e, p + 1, v, c, g, t) for s, e, p, v, c, g, t in mido_rows(raw)]
    with pytest.raises(AssertionError, match="reference decoder"):
        fuzz.Checker(reference=off_by_one).check(data)


def test_files_mido_misreads_are_not_compared():
    # SMF 1.0 ("Track Chunks"): every MTrk event, meta events included, is preceded by its
    # delta-time. mido 1.3.3 drops the delta of a meta type it does not know (0x08, "program
    # name", RP-019) - found by the long fuzz run - so such files cannot be checked against it.
    body = (fuzz.vlq(100) + b"\xff\x08\x03abc" + b"\x00\x90\x3c\x64" + b"\x60\x80\x3c\x40"
            + b"\x00\xff\x2f\x00")
    data = fuzz.Doc(0, 96, [[(b"", body)]]).to_bytes()
    assert mido_rows(data)[0][:2] == (0, 96)  # mido: the 100 ticks are lost
    verdict = CHECKER.check(data)
    assert verdict.reason == "kept" and not verdict.compared
    from pipeline.midi.decode import decode
    assert decode(data).notes["start"][0] == 100


def test_running_status_after_a_sysex_is_not_compared():
    # SMF 1.0: a sysex event cancels running status; pipeline/midi/decode.py keeps the channel status
    # in force (its documented policy), mido 1.3.3 takes 0xF0 as the running status and reads
    # the byte after the data byte as a sysex length. Found by the long fuzz run (seed 0): a
    # note whose note-off came by running status after a sysex; mido left it hanging.
    body = (b"\x00\x90\x3c\x64" + b"\x30\xf0\x02\x7e\xf7" + b"\x30\x3c\x00"
            + b"\x40\xff\x2f\x00")  # note on at 0, sysex at 48, note-off at 96, end at 160
    data = fuzz.Doc(0, 96, [[(b"", body)]]).to_bytes()
    from pipeline.midi.decode import decode
    assert decode(data).notes["end"].tolist() == [96]  # our policy: the note-off counts
    assert mido_rows(data) == [(0, 160, 0x3C, 0x64, 0, 0, 0)]  # mido: hanging to the end
    verdict = CHECKER.check(data)
    assert verdict.reason == "kept" and not verdict.compared
    # the same note-off with its status byte is compared (and agrees)
    plain = fuzz.Doc(0, 96, [[(b"", body.replace(b"\x30\x3c\x00", b"\x30\x90\x3c\x00"))]]).to_bytes()
    assert CHECKER.check(plain).compared


def test_fuzzed_corpus_through_a_whole_run(tmp_path):
    inp = tmp_path / "in"
    inp.mkdir()
    rng = random.Random(2024)
    for i in range(60):
        data, applied = fuzz.random_case(rng)
        (inp / f"case{i:03d}_{'_'.join(applied) or 'valid'}.mid").write_bytes(data)
    cfg = load_config(REPO / "configs" / "default.yaml", input=str(inp), output=str(tmp_path / "out"), workers=2)
    report = Runner(cfg, quiet=True).run()
    rows = [json.loads(line) for line in (tmp_path / "out" / "manifest.jsonl").read_text().splitlines()]
    assert report.files == len(rows) == 60
    assert len({r["source"] for r in rows}) == 60  # exactly one verdict per file
    for r in rows:
        assert r["status"] in ("kept", "dropped")
        assert r["reason"] not in ("decoder_crash", "timeout", "stage_error"), r
        assert (r["status"] == "kept") == (r["reason"] is None)


def test_long_run_entry_point(tmp_path, capsys):
    code = fuzz.main(["--minutes", "0.01", "--save", str(tmp_path / "found"),
                      "--json", str(tmp_path / "fuzz.json")])
    assert code == 0
    figures = json.loads((tmp_path / "fuzz.json").read_text())
    assert figures["cases"] > 0 and figures["escapes"] == 0
    assert "cases in" in capsys.readouterr().out
