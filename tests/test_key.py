"""Key detection checked against published profiles, music21's analyzers and Bach chorales."""
from __future__ import annotations


import mido
import numpy as np
import pytest

from fixtures_midi import smf_bytes
from pipeline.analysis import key as keymod
from pipeline.analysis import key_profiles
from pipeline.tools.evaluate_key import (agreement_with_music21, key_table, mirex_score,
                                         render_chorale)
from pipeline.tools.eval_sets import abc_key
from pipeline.midi.piece import KEY_DTYPE, METER_DTYPE, TEMPO_DTYPE, Piece, empty_notes, sort_notes
from pipeline.stages.base import FileContext
from pipeline.stages.key_meter import KeyMeter

from music21_fixtures import RESERVED, chorale_paths, chorales, decode


@pytest.fixture(scope="session")
def works():
    return chorales(100)


# --- profile tables ------------------------------------------------------------------------

# Published values, typed from the sources (from memory, cross-checked against music21 below).
PUBLISHED = {
    # Krumhansl 1990, Cognitive Foundations of Musical Pitch, Table 2.1 (Krumhansl & Kessler 1982)
    "krumhansl_kessler": (
        [6.35, 2.23, 3.48, 2.33, 4.38, 4.09, 2.52, 5.19, 2.39, 3.66, 2.29, 2.88],
        [6.33, 2.68, 3.52, 5.38, 2.60, 3.53, 2.54, 4.75, 3.98, 2.69, 3.34, 3.17]),
    # Temperley 2007, Music and Probability, ch. 4 (Kostka-Payne corpus)
    "temperley_kostka_payne": (
        [0.748, 0.060, 0.488, 0.082, 0.670, 0.460, 0.096, 0.715, 0.104, 0.366, 0.057, 0.400],
        [0.712, 0.084, 0.474, 0.618, 0.049, 0.460, 0.105, 0.747, 0.404, 0.067, 0.133, 0.330]),
    # Aarden 2003, Dynamic Melodic Expectancy (dissertation), Essen folksong frequencies
    "aarden_essen": (
        [17.7661, 0.145624, 14.9265, 0.160186, 19.8049, 11.3587, 0.291248, 22.062, 0.145624,
         8.15494, 0.232998, 4.95122],
        [18.2648, 0.737619, 14.0499, 16.8599, 0.702494, 14.4362, 0.702494, 18.6161, 4.56621,
         1.93186, 7.37619, 1.75623]),
}


@pytest.mark.parametrize("name", sorted(PUBLISHED))
def test_profiles_match_published_tables(name):
    major, minor = keymod.PROFILES[name]
    assert np.allclose(major, PUBLISHED[name][0]) and np.allclose(minor, PUBLISHED[name][1])


@pytest.mark.parametrize("name,cls", [
    ("krumhansl_kessler", "KrumhanslSchmuckler"), ("temperley_kostka_payne", "TemperleyKostkaPayne"),
    ("aarden_essen", "AardenEssen"), ("bellman_budge", "BellmanBudge"), ("simple", "SimpleWeights")])
def test_profiles_match_music21(name, cls):
    # source: music21.analysis.discrete, the weights music21 ships for each analyzer
    from music21.analysis import discrete
    analyzer = getattr(discrete, cls)()
    major, minor = keymod.PROFILES[name]
    assert np.allclose(major, analyzer.getWeights("major"))
    assert np.allclose(minor, analyzer.getWeights("minor"))


def test_correlations_equal_music21_on_random_histograms():
    # source: music21 KeyWeightKeyAnalysis._getDifference (Pearson r per tonic and mode)
    from music21.analysis import discrete
    rng = np.random.default_rng(1)
    analyzer = discrete.TemperleyKostkaPayne()
    for _ in range(20):
        hist = list(rng.random(12) * rng.integers(0, 2, 12) * 10 + 0.01)
        ours = keymod.estimate_key_from_histogram(hist, "temperley_kostka_payne").scores
        for mode, lo in (("major", 0), ("minor", 12)):
            theirs = analyzer._getDifference(analyzer._convoluteDistribution(hist, mode), hist, mode)
            assert np.allclose(ours[lo:lo + 12], theirs)


# --- music21 on the same MIDI files --------------------------------------------------------

def test_krumhansl_kessler_agrees_with_music21_on_chorales(works):
    # source: music21 Stream.analyze('key.krumhanslschmuckler') on music21's parse of the same
    # MIDI bytes (bundled Bach chorales, key-signature events removed). Both weight pitch
    # classes by duration in quarter notes; a difference could only come from music21's MIDI
    # import quantizing durations.
    agreement, differ = agreement_with_music21(works)
    assert agreement >= 0.95, differ


@pytest.mark.parametrize("work,tonic,mode", [("bwv66.6", "F#", "minor"), ("bwv57.8", "Bb", "major")])
def test_music21_documented_examples(work, tonic, mode):
    # source: music21 KeyWeightKeyAnalysis.getSolution doctest (KS profile): bwv66.6 is
    # f# minor, bwv57.8 is B- major
    from music21 import corpus
    rendered = render_chorale(corpus.getWork(f"bach/{work}"))
    est = keymod.estimate_key(decode(rendered["midi"]), "krumhansl_kessler", bass_weight=0)
    assert (est.tonic, est.mode) == (tonic, mode)


def test_default_scores_at_least_best_music21_analyzer(works, record_property):
    # ground truth: key signature + final bass note (common practice, no single source);
    # MIREX weighted score (MIREX audio key detection task)
    rows = {label: (exact, mirex, n) for label, exact, mirex, n in key_table(works)}
    for label, (exact, mirex, n) in rows.items():
        record_property(label, f"exact={exact:.3f} mirex={mirex:.3f} n={n}")
        print(f"{label:<48} exact {exact:.3f} MIREX {mirex:.3f} (n={n})")
    ours = rows["midisift default"]
    m21 = [v for k, v in rows.items() if k.startswith("music21 ")]
    assert ours[2] >= 60  # enough rated chorales for the comparison to mean something
    assert ours[0] >= max(v[0] for v in m21)
    assert ours[1] >= max(v[1] for v in m21)
    # the plain KK estimate is music21's KS estimate: same figures on the same files
    assert rows["midisift krumhansl_kessler"][:2] == rows["music21 key.krumhanslschmuckler"][:2]


@pytest.mark.parametrize("est,truth,score", [
    # worked from the MIREX key-detection definition
    ((0, "major"), (0, "major"), 1.0), ((7, "major"), (0, "major"), 0.5),
    ((9, "minor"), (0, "major"), 0.3), ((0, "major"), (9, "minor"), 0.3),
    ((0, "minor"), (0, "major"), 0.2), ((2, "major"), (0, "major"), 0.0),
    ((4, "minor"), (9, "minor"), 0.5), ((5, "major"), (0, "major"), 0.0),
])
def test_mirex_score(est, truth, score):
    assert mirex_score(est, truth) == score


# --- spelling, declared key, stage ---------------------------------------------------------

@pytest.mark.parametrize("mode", ["major", "minor"])
def test_tonic_spelling_has_fewest_accidentals(mode):
    # source: music21.key.Key(...).sharps gives the signature of each spelling
    from music21 import key as m21key
    for pc in range(12):
        name = keymod.key_name(pc, mode).split()[0]
        ours = abs(m21key.Key(name.replace("b", "-") if len(name) > 1 else name, mode).sharps)
        alts = [n for n in (key_profiles.PITCH_NAMES_SHARP[pc], key_profiles.PITCH_NAMES_FLAT[pc]) if n != name]
        for alt in alts:
            assert ours <= abs(m21key.Key(alt.replace("b", "-") if len(alt) > 1 else alt, mode).sharps)
        assert m21key.Key(name.replace("b", "-") if len(name) > 1 else name, mode).tonic.pitchClass == pc


@pytest.mark.parametrize("mido_key,declared", [("Eb", "Eb major"), ("F#m", "F# minor"),
                                               ("C", "C major"), ("Bbm", "Bb minor")])
def test_declared_key_from_key_signature_event(mido_key, declared):
    # the file is written by mido (reference writer), decoded by our decoder
    mf = mido.MidiFile(ticks_per_beat=480)
    tr = mido.MidiTrack([mido.MetaMessage("key_signature", key=mido_key, time=0),
                         mido.Message("note_on", note=60, velocity=80, time=0),
                         mido.Message("note_off", note=60, velocity=0, time=480)])
    mf.tracks.append(tr)
    assert keymod.declared_key(decode(smf_bytes(mf))) == declared


def test_the_declared_key_is_the_last_signature_at_the_start():
    # a sequencer's C major written before the real D major at tick 0 (an audit): a player
    # applies the events in file order, so the later one is in force (common practice); mido
    # writes the file, our decoder reads it
    mf = mido.MidiFile(ticks_per_beat=480)
    mf.tracks.append(mido.MidiTrack([mido.MetaMessage("key_signature", key="C", time=0),
                                     mido.MetaMessage("key_signature", key="D", time=0),
                                     mido.Message("note_on", note=62, velocity=80, time=0),
                                     mido.Message("note_off", note=62, velocity=0, time=480),
                                     mido.MetaMessage("key_signature", key="G", time=0)]))
    assert keymod.declared_key(decode(smf_bytes(mf))) == "D major"


def test_drums_and_empty_pieces(works):
    piece = decode(works[0]["midi"])
    drums = piece.notes.copy()
    drums["channel"] = 9
    drummed = Piece(**{**piece.__dict__, "notes": sort_notes(np.concatenate([piece.notes, drums]))})
    empty = Piece(**{**piece.__dict__, "notes": piece.notes[:0]})
    for profile in ("learned", "simple"):
        base = keymod.estimate_key(piece, profile)
        assert keymod.estimate_key(drummed, profile).scores == pytest.approx(base.scores)
    # no evidence: every key equally likely (learned), a zero margin (correlation)
    assert keymod.estimate_key(empty).confidence == pytest.approx(1 / 24)
    assert keymod.estimate_key(empty, "simple").confidence == 0.0


def test_confidence_and_runner_up(works):
    piece = decode(works[3]["midi"])
    est = keymod.estimate_key(piece, "simple")
    scores = np.array(est.scores)
    second = np.argsort(-scores)[1]
    assert est.runner_up == keymod.key_name(int(second % 12), ("major", "minor")[second // 12])
    assert est.confidence == pytest.approx(scores.max() - scores[second])
    assert est.confidence > 0
    # learned: the scores are the 24 key probabilities, the confidence the chosen key's
    learned = keymod.estimate_key(piece)
    probs = np.array(learned.scores)
    assert probs.sum() == pytest.approx(1.0) and (probs >= 0).all()
    assert learned.confidence == pytest.approx(probs.max())
    second = np.argsort(-probs)[1]
    assert learned.runner_up == keymod.key_name(int(second % 12), ("major", "minor")[second // 12])


# --- the learned method ----------------------------------------------------------------------

def _notes_piece(rows) -> Piece:
    """A piece from (start, end, pitch) rows at 480 ticks per beat."""
    notes = empty_notes(len(rows))
    for i, (start, end, pitch) in enumerate(rows):
        notes[i]["start"], notes[i]["end"], notes[i]["pitch"] = start, end, pitch
    notes["velocity"] = 80
    return Piece(notes=sort_notes(notes), ticks_per_beat=480,
                 tempos=np.array([(0, 500_000)], dtype=TEMPO_DTYPE),
                 time_signatures=np.zeros(0, dtype=METER_DTYPE),
                 key_signatures=np.zeros(0, dtype=KEY_DTYPE))


def test_key_features_worked_example():
    # invented fixture, worked by hand: beat 0 a C major triad (C3 E4 G4, 1 beat); beat 1
    # G3 (2 beats) under B4 D5 (1 beat); beats 3-4 C3 C5 E5 (2 beats)
    piece = _notes_piece([(0, 480, 48), (0, 480, 64), (0, 480, 67),
                          (480, 1440, 55), (480, 960, 71), (480, 960, 74),
                          (1440, 2400, 48), (1440, 2400, 72), (1440, 2400, 76)])
    f = dict(zip(keymod.FEATURES, keymod.key_features(piece)))

    def dist(**weights):
        v = np.zeros(12)
        for name, w in weights.items():
            v[keymod.note_name_to_pc(name)] = w
        return v / v.sum()
    assert np.allclose(f["duration"], dist(C=5, E=3, G=3, B=1, D=1))
    assert np.allclose(f["on_beat"], f["duration"])           # every note starts on a beat
    assert np.allclose(f["onsets"], dist(C=3, E=2, G=2, B=1, D=1))
    assert np.allclose(f["bass"], dist(C=3, G=2))              # C3, G3 (2 beats), C3 (2)
    assert np.allclose(f["top"], dist(G=1, D=1, E=2))          # G4, D5, E5 (2 beats)
    # the last 4 beats (after tick 480): G3, B4, D5 and the last chord
    assert np.allclose(f["final"], dist(C=4, E=2, G=2, B=1, D=1))
    for name, note in (("first_bass", "C"), ("last_bass", "C"), ("last_top", "E")):
        assert np.allclose(f[name], dist(**{note: 1}))
    # triads in the beats where a note starts: C major (beat 0), G major (beat 1), and beat 3
    # holds C and E without a fifth: no triad. The last beat with a triad is beat 1.
    assert np.allclose(f["major_triads"], dist(C=1, G=1))
    assert not f["minor_triads"].any() and not f["last_minor_triad"].any()
    assert np.allclose(f["last_major_triad"], dist(G=1))


def test_melody_voice_worked_example():
    # invented fixture, worked by hand. Voices are (track, channel) pairs, the usual split of a
    # MIDI file into instruments (common practice). Track 1: a tune in the top register
    # (D5 E5 ... ending on C5); track 2: a chord on every beat below it; track 3: two very high
    # notes, higher on average than the tune but 2 of 26 notes (under a tenth): not the melody.
    tune = [(i * 480, (i + 1) * 480, p) for i, p in enumerate((74, 76, 77, 74, 71, 72))]
    chords = [(i * 480, (i + 1) * 480, p) for i in range(6) for p in (48, 55, 64)]
    rows = [r + (1, 0) for r in tune] + [r + (2, 1) for r in chords] + \
        [(0, 480, 96, 3, 2), (960, 1440, 98, 3, 2)]
    notes = empty_notes(len(rows))
    for i, (start, end, pitch, track, channel) in enumerate(rows):
        notes[i]["start"], notes[i]["end"], notes[i]["pitch"] = start, end, pitch
        notes[i]["track"], notes[i]["channel"] = track, channel
    notes = sort_notes(notes)
    voice = notes["track"].astype(np.int64) * 16 + notes["channel"]
    melody = keymod.melody_voice(voice, notes["pitch"].astype(np.int64))
    assert (notes["track"][melody] == 1).all() and melody.sum() == 6
    piece = Piece(notes=notes, ticks_per_beat=480, tempos=np.array([(0, 500_000)], dtype=TEMPO_DTYPE),
                  time_signatures=np.zeros(0, dtype=METER_DTYPE),
                  key_signatures=np.zeros(0, dtype=KEY_DTYPE))
    f = dict(zip(keymod.FEATURES, keymod.key_features(piece)))
    one = np.zeros(12)
    one[0] = 1.0  # the tune ends on C
    assert np.allclose(f["melody_last"], one)
    want = np.zeros(12)
    for name, beats in (("D", 2), ("E", 1), ("F", 1), ("B", 1), ("C", 1)):
        want[keymod.note_name_to_pc(name)] = beats
    assert np.allclose(f["melody"], want / want.sum())
    # with the high voice holding a tenth of the notes or more it is the melody
    assert keymod.melody_voice(voice, notes["pitch"].astype(np.int64))[notes["track"] == 3].sum() == 0
    dense = np.concatenate([voice, np.full(3, 3 * 16 + 2)])
    pitches = np.concatenate([notes["pitch"].astype(np.int64), np.full(3, 97)])
    assert (dense[keymod.melody_voice(dense, pitches)] == 3 * 16 + 2).all()


def test_learned_is_transposition_invariant(works):
    # key finding commutes with transposition (common practice): shifting a piece by k
    # semitones rotates its 24 key probabilities by k within each mode
    from pipeline.analysis.transpose import shift_notes
    piece = decode(works[5]["midi"])
    base = np.array(keymod.estimate_key(piece).scores)
    for k in (1, 5, 6, 11):
        moved = Piece(**{**piece.__dict__, "notes": sort_notes(shift_notes(piece.notes, k)[0])})
        got = np.array(keymod.estimate_key(moved).scores)
        assert np.allclose(np.roll(base[:12], k), got[:12])
        assert np.allclose(np.roll(base[12:], k), got[12:])


def test_confidence_falls_as_the_key_evidence_is_destroyed(works):
    # invented degradation of real pieces: a growing share of each chorale's notes gets a
    # random pitch (times and durations kept). The mean probability of the piece's own key
    # must fall at every step; the accuracy against the truth (noisier, 36 trials a step)
    # must end lower than it starts.
    rated = [w for w in works if w["truth"] is not None][:12]
    means, accuracy, confidence, correct = [], [], [], []
    for share in (0.0, 0.2, 0.4, 0.6, 0.8):
        probs, right = [], []
        for work in rated:
            piece = decode(work["midi"])
            own = keymod.estimate_key(piece)
            idx = own.tonic_pc + (12 if own.mode == "minor" else 0)
            for seed in range(3):
                rng = np.random.default_rng(seed)
                notes = piece.notes.copy()
                hit = rng.random(len(notes)) < share
                notes["pitch"][hit] = rng.integers(48, 84, int(hit.sum()))
                est = keymod.estimate_key(Piece(**{**piece.__dict__, "notes": sort_notes(notes)}))
                probs.append(est.scores[idx])
                right.append((est.tonic_pc, est.mode) == tuple(work["truth"]))
                confidence.append(est.confidence)
                correct.append(right[-1])
        means.append(float(np.mean(probs)))
        accuracy.append(float(np.mean(right)))
    assert all(a > b for a, b in zip(means, means[1:])), means
    assert accuracy[-1] < accuracy[0], accuracy
    # over all 180 estimates, right answers come with higher confidence than wrong ones, and
    # the more confident half is right more often than the less confident half
    conf, ok = np.array(confidence), np.array(correct)
    assert 0 < ok.sum() < len(ok) and conf[ok].mean() > conf[~ok].mean()
    order = np.argsort(conf, kind="stable")
    assert ok[order[len(ok) // 2:]].mean() > ok[order[:len(ok) // 2]].mean()


def test_weights_file_names_its_training_sets():
    import json
    from pathlib import Path
    data = json.loads(Path(keymod.__file__).with_name("key_weights.json").read_text())
    assert tuple(data["features"]) == keymod.FEATURES
    assert len(data["weights"]) == keymod.N_CLASS_FEATURES
    files = [f for s in data["trained_on"].values() for f in s["files"]]
    assert files and not any(r in f for f in files for r in RESERVED)
    # the chorale evaluation subset of the tests and the README is not trained on
    evaluation = {f"bach/{p.name}" for p in chorale_paths(100, 0)}
    assert not evaluation & set(data["trained_on"]["chorales"]["files"])


@pytest.mark.parametrize("field,want", [
    # the abc music standard 2.1, section 3.1.14 (K: key): tonic, accidental, mode name
    ("G", (7, "major")), ("Em", (4, "minor")), ("E Minor", (4, "minor")), ("Bb", (10, "major")),
    ("F#min", (6, "minor")), ("A Aeolian", (9, "minor")), ("D Ionian", (2, "major")),
    ("A Dorian", None), ("D Mixolydian", None), ("Hp", None), ("", None),
])
def test_abc_key_field(field, want):
    assert abc_key(field) == want


def test_key_meter_stage_declared_and_trust(works):
    work = next(w for w in works if w["truth"] is not None)
    piece = decode(work["midi"])
    assert keymod.declared_key(piece) is None
    values = KeyMeter().process(piece, FileContext(piece)).values
    assert values["key_declared"] is None and values["key_agrees"] is None
    est = keymod.estimate_key(piece)
    assert (values["tonic_pc"], values["mode"], values["tonic"]) == (est.tonic_pc, est.mode, est.tonic)
    # a file that declares a sequencer-default C major
    declared = Piece(**{**piece.__dict__,
                        "key_signatures": np.array([(0, 0, 0)], dtype=KEY_DTYPE)})
    v = KeyMeter().process(declared, FileContext(declared)).values
    assert v["key_declared"] == "C major"
    assert v["key_agrees"] == ((est.tonic_pc, est.mode) == (0, "major"))
    assert v["tonic"] == est.tonic and v["key_source"] == "estimated"
    trusted = KeyMeter({"trust_file_key": True}).process(declared, FileContext(declared)).values
    assert (trusted["tonic"], trusted["mode"], trusted["key_source"]) == ("C", "major", "file")
