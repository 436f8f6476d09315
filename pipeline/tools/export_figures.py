"""The README's export and report figures, measured on finished output folders.

    python -m pipeline.tools.export_figures OUTPUT [OUTPUT ...] [--agreement N]

For each output folder: export throughput (pieces/s) of both formats, fresh and as a rerun with
nothing changed; the time to write report.html; and the reference checks of the export tests on
up to N pieces (default all): the share of piano-roll cells on which pretty_midi's
``get_piano_roll(fs=20)`` agrees (note / no note), the default roll (pedal ignored) against the
reference with the pedal ignored (``pedal_threshold=None``) and with its default pedal (64), and
the roll of ``--sustain`` against the latter; and the largest onset and offset error of the
decoded event sequences against the notes pretty_midi reads (merged per pitch as the encoding
does). Writes into OUTPUT/export/ (removed first, so the fresh figures are fresh); the
``--sustain`` export is written last, so it is the piano-roll export left behind.
"""
from __future__ import annotations

import argparse
import shutil
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "tests"))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("outputs", nargs="+", type=Path)
    ap.add_argument("--agreement", type=int, default=0, help="check at most N pieces (0: all)")
    args = ap.parse_args()
    import pretty_midi  # the reference library (test extra)
    from pipeline.export import ExportOptions, export_output, open_export
    from pipeline.export.encodings import decode_events
    from pipeline.outputs.page import write_report
    from test_export import _merged_reference, _roll_agreement

    for out in args.outputs:
        shutil.rmtree(out / "export", ignore_errors=True)
        print(f"== {out}")
        for fmt in ("pianoroll", "events"):
            cpu = time.process_time()
            r = export_output(out, ExportOptions(fmt))
            cpu = time.process_time() - cpu
            again = export_output(out, ExportOptions(fmt))
            size = sum(p.stat().st_size for p in (out / "export" / fmt).glob("*/*.npz"))
            print(f"{fmt:<10} {r.pieces} pieces in {r.seconds:.2f} s = {r.pieces / r.seconds:,.0f} pieces/s "
                  f"(CPU {cpu:.2f} s = {r.pieces / cpu:,.0f} pieces/s); "
                  f"rerun {again.seconds:.2f} s; shards {r.shards_written}, {size / 1e6:.1f} MB")
        t, cpu = time.perf_counter(), time.process_time()
        write_report(out)
        print(f"report.html {time.perf_counter() - t:.2f} s (CPU {time.process_time() - cpu:.2f} s)")

        ex = open_export(out, "pianoroll")
        entries = ex.entries[:args.agreement or None]
        for threshold in (None, 64):
            s = np.array([_roll_agreement(ex.load(e["key"]), out / e["midi"], threshold) for e in entries])
            _agreement("pianoroll", threshold, s)
        cpu = time.process_time()
        r = export_output(out, ExportOptions("pianoroll", sustain=True))
        cpu = time.process_time() - cpu
        print(f"pianoroll --sustain {r.pieces} pieces in {r.seconds:.2f} s (CPU {cpu:.2f} s = "
              f"{r.pieces / cpu:,.0f} pieces/s)")
        ex = open_export(out, "pianoroll")
        s = np.array([_roll_agreement(ex.load(e["key"]), out / e["midi"], 64) for e in entries])
        _agreement("pianoroll --sustain", 64, s)

        ev = open_export(out, "events")
        worst_on = worst_off = 0.0
        count_ok = 0
        for e in ev.entries[:args.agreement or None]:
            got = decode_events(ev.load(e["key"]), step=0.01, max_shift_steps=100, velocity_bins=32)
            got = got[np.lexsort((got[:, 0], got[:, 2]))]  # by pitch, then onset, as the reference
            pm = pretty_midi.PrettyMIDI(str(out / e["midi"]))
            ref = np.array(_merged_reference([(n.start, n.end, n.pitch) for i in pm.instruments
                                              if not i.is_drum for n in i.notes], 0.01)).reshape(-1, 3)
            if len(ref) == len(got) and (ref[:, 2] == got[:, 2]).all():
                count_ok += 1
                if len(ref):
                    worst_on = max(worst_on, float(np.abs(ref[:, 0] - got[:, 0]).max()))
                    worst_off = max(worst_off, float(np.abs(ref[:, 1] - got[:, 1]).max()))
        n = len(ev.entries[:args.agreement or None])
        print(f"events vs pretty_midi notes: {count_ok} of {n} pieces with the same notes; largest onset "
              f"error {worst_on * 1000:.1f} ms, offset error {worst_off * 1000:.1f} ms (step 10 ms)")


def _agreement(what: str, threshold: int | None, s: np.ndarray) -> None:
    print(f"{what} vs pretty_midi get_piano_roll(fs=20, pedal_threshold={threshold}): {len(s)} pieces, "
          f"cells agreeing min {s.min():.4%}, mean {s.mean():.4%}, pieces at 100% {int((s == 1).sum())}, "
          f"under 98% {int((s < 0.98).sum())}")


if __name__ == "__main__":
    main()
