"""Score alternative key classifiers against the shipped linear one, side by side (issue 21).

    python -m pipeline.tools.key_variants --pop ../shared/data/pop909-dev [--only NAME ...]

Every variant reads the same per-key evidence as the shipped model (``key.class_features``)
and is scored by the same two cross-validations as ``evaluate_key``: **5-fold** (folk,
classical and pop each in five folds, each fold predicted by a model trained on the other folds
plus the other sets; the 82 evaluation chorales by a model trained on all four training sets)
and **leave-one-genre-out** (trained on the three other sets). Each set weighs the same in
training. The variants (DEVELOPERS.md, Measurement history, Key detection, fifth round):

- ``linear``: the shipped multinomial logistic regression (``train_key.fit``);
- ``network-*``: a one-hidden-layer network applied to each candidate key's feature row with
  weights shared by the 24 keys, ``score_k = v . x_k + w2 . relu(W1 x_k + b1)`` (``v`` absent
  without the linear skip), softmax over keys, full-batch Adam with L2; transposition-invariant
  like the linear model, since every key's row is read from its own tonic;
- ``two-stage-*``: the key signature (one of 12 relative major/minor pairs) by the linear
  model's summed probabilities, then the mode within the pair by a dedicated binary model over
  the difference of the two keys' feature rows and/or pair contrast features.

These are experiments: nothing here is on the run path.
"""
from __future__ import annotations

import argparse
import time
from typing import Callable

import numpy as np

from . import eval_sets, train_key
from ..analysis import key as keymod

SETS = ("chorales", "folk", "classical", "pop")
#: Length of the rotated distributions of one mode's block in a class-feature row.
NR = len(keymod.FEATURES) * 12
#: Relative pairs: pair j is the major key on j and the minor key on j + 9.
PAIR_MAJOR = np.arange(12)
PAIR_MINOR = (PAIR_MAJOR + 9) % 12
_FI = {f: i for i, f in enumerate(keymod.FEATURES)}


class Data:
    """Raw features (N, len(FEATURES), 12), class features (N, 24, D) and classes per set; the
    evaluation chorales under ``chorales_eval``."""

    def __init__(self, pop: str | None, folk: int) -> None:
        from .eval_midi import decode
        works = train_key.training_sets(pop, folk)
        works["chorales_eval"] = eval_sets.chorales(100, 0)
        self.works = works
        self.raw, self.phi, self.y = {}, {}, {}
        for name, ws in works.items():
            rated = [w for w in ws if w["truth"] is not None]
            pieces = [decode(w["midi"]) for w in rated]
            self.raw[name] = np.stack([keymod.key_features(p) for p in pieces])
            self.phi[name] = np.stack([keymod.class_features(f) for f in self.raw[name]])
            self.y[name] = np.array([pc + (12 if mode == "minor" else 0)
                                     for pc, mode in (w["truth"] for w in rated)])
            self.add_features(name, pieces)
        self.sets = [s for s in SETS if s in self.y]

    def add_features(self, name: str, pieces: list) -> None:
        """More features of set ``name`` from its decoded pieces (a subclass's; none here)."""


Part = tuple[str, np.ndarray]  # (set name, indexes of its pieces)


def _adam(params: dict, grad_fn: Callable[[dict], dict], steps: int, rate: float) -> dict:
    """Full-batch Adam (0.9, 0.999, 1e-8) from ``params``; ``grad_fn`` returns the gradients."""
    m = {k: np.zeros_like(v) for k, v in params.items()}
    s = {k: np.zeros_like(v) for k, v in params.items()}
    for t in range(1, steps + 1):
        grads = grad_fn(params)
        for k in params:
            m[k] = 0.9 * m[k] + 0.1 * grads[k]
            s[k] = 0.999 * s[k] + 0.001 * grads[k] ** 2
            params[k] = params[k] - rate * (m[k] / (1 - 0.9 ** t)) / (np.sqrt(s[k] / (1 - 0.999 ** t)) + 1e-8)
    return params


def _softmax(z: np.ndarray) -> np.ndarray:
    z = z - z.max(axis=1, keepdims=True)
    q = np.exp(z)
    return q / q.sum(axis=1, keepdims=True)


class Linear:
    """The shipped model (``train_key.fit``)."""

    def __init__(self, data: Data, l2: float = 1e-3) -> None:
        self.data, self.l2 = data, l2

    def fit(self, parts: list[Part]) -> "Linear":
        d = self.data
        self.w = train_key.fit(np.concatenate([d.phi[n][i] for n, i in parts]),
                               np.concatenate([d.y[n][i] for n, i in parts]),
                               train_key.balanced_weights([d.y[n][i] for n, i in parts]), self.l2)
        return self

    def proba(self, name: str, idx: np.ndarray) -> np.ndarray:
        return train_key.probabilities(self.data.phi[name][idx], self.w)


def network_scores(params: dict, phi: np.ndarray) -> np.ndarray:
    """(N, 24) scores of the network on class features (N, 24, D): the same weights on every
    key's row, ``v . x_k + w2 . relu(W1 x_k + b1)`` (``v`` only with the skip)."""
    z = np.maximum(phi @ params["W1"].T + params["b1"], 0) @ params["w2"]
    return z + phi @ params["v"] if "v" in params else z


class Network:
    """One hidden layer shared by the 24 keys' feature rows (see the module docstring).

    ``warm``: ``v`` starts from the linear model's weights; ``freeze_v``: ``v`` stays there
    (only the hidden layer learns a correction)."""

    def __init__(self, data: Data, hidden: int = 16, l2: float = 1e-3, l2h: float = 1e-3,
                 steps: int = 400, rate: float = 0.02, skip: bool = True, warm: bool = False,
                 freeze_v: bool = False, seed: int = 0) -> None:
        self.data, self.hidden, self.l2, self.l2h = data, hidden, l2, l2h
        self.steps, self.rate, self.skip, self.warm, self.freeze_v, self.seed = (
            steps, rate, skip, warm, freeze_v, seed)

    def fit(self, parts: list[Part]) -> "Network":
        d = self.data
        phi = np.concatenate([d.phi[n][i] for n, i in parts])
        y = np.concatenate([d.y[n][i] for n, i in parts])
        balanced = train_key.balanced_weights([d.y[n][i] for n, i in parts])
        sw = (balanced / balanced.sum()).astype(np.float32)
        n, width = len(y), phi.shape[2]
        # a major row fills only the major block, a minor row the minor one: keep each row's
        # own block and the shared columns (half the width), float32 for speed
        ia = np.r_[0:NR, 2 * NR:width]
        ib = np.r_[NR:2 * NR, 2 * NR:width]
        xa = np.ascontiguousarray(phi[:, :12][:, :, ia], dtype=np.float32).reshape(n * 12, -1)
        xb = np.ascontiguousarray(phi[:, 12:][:, :, ib], dtype=np.float32).reshape(n * 12, -1)
        rng = np.random.default_rng(self.seed)
        params = {"v": np.zeros(width),
                  "W1": rng.normal(0, 1 / np.sqrt(len(ia)), (self.hidden, width)),
                  "b1": np.zeros(self.hidden),
                  "w2": rng.normal(0, 1 / np.sqrt(self.hidden), self.hidden) * 0.1}
        if self.warm:
            params["v"] = train_key.fit(phi, y, balanced, self.l2)
        if not self.skip:
            del params["v"]
        del phi
        rows = np.arange(n)

        def grads(p: dict) -> dict:
            w1, b1, w2 = (p[k].astype(np.float32) for k in ("W1", "b1", "w2"))
            aa, ab = xa @ w1[:, ia].T + b1, xb @ w1[:, ib].T + b1
            ra, rb = np.maximum(aa, 0), np.maximum(ab, 0)
            za, zb = ra @ w2, rb @ w2
            if "v" in p:
                v = p["v"].astype(np.float32)
                za += xa @ v[ia]
                zb += xb @ v[ib]
            q = _softmax(np.concatenate([za.reshape(n, 12), zb.reshape(n, 12)], axis=1))
            q[rows, y] -= 1.0  # d(cross-entropy)/dz
            q *= sw[:, None]
            ga, gb = q[:, :12].reshape(-1), q[:, 12:].reshape(-1)
            out = {}
            if "v" in p:
                gv = np.zeros(width)
                if not self.freeze_v:
                    gv[ia] += xa.T @ ga
                    gv[ib] += xb.T @ gb
                    gv += 2 * self.l2 * p["v"]
                out["v"] = gv
            out["w2"] = (ra.T @ ga + rb.T @ gb).astype(np.float64) + 2 * self.l2h * p["w2"]
            da = (ga[:, None] * w2[None, :]) * (aa > 0)
            db = (gb[:, None] * w2[None, :]) * (ab > 0)
            gw = np.zeros_like(p["W1"])
            gw[:, ia] += da.T @ xa
            gw[:, ib] += db.T @ xb
            out["W1"] = gw + 2 * self.l2h * p["W1"]
            out["b1"] = (da.sum(0) + db.sum(0)).astype(np.float64)
            return out

        self.params = _adam(params, grads, self.steps, self.rate)
        return self

    def proba(self, name: str, idx: np.ndarray) -> np.ndarray:
        return _softmax(network_scores(self.params, self.data.phi[name][idx]))


def pair_contrasts(raw: np.ndarray) -> np.ndarray:
    """(N, 12, 13) features that only make sense for a relative pair (major on j, minor on
    j + 9), from raw features (N, len(FEATURES), 12): shares a / (a + b) - 0.5 of the minor's
    raised against natural seventh and of the major against the minor tonic (duration, bass,
    melody, on-beat and final distributions), of the major tonic triad against the minor's, of
    the major against the minor triad on the minor's fifth and of the major key's V against
    the minor key's v; and the differences of the last and first triads and of the cadences."""
    j, mi = PAIR_MAJOR, PAIR_MINOR

    def share(a: np.ndarray, b: np.ndarray) -> np.ndarray:
        return np.divide(a, a + b, out=np.full_like(a, 0.5), where=(a + b) > 0) - 0.5

    out = []
    for f in ("duration", "bass", "melody", "on_beat", "final"):
        dist = raw[:, _FI[f]]
        out.append(share(dist[:, (mi + 11) % 12], dist[:, (mi + 10) % 12]))
        out.append(share(dist[:, j], dist[:, mi]))
    major, minor = raw[:, _FI["major_triads"]], raw[:, _FI["minor_triads"]]
    out.append(share(major[:, j], minor[:, mi]))
    out.append(share(major[:, (mi + 7) % 12], minor[:, (mi + 7) % 12]))
    out.append(share(major[:, (j + 7) % 12], minor[:, (mi + 7) % 12]))
    for a, b in (("last_major_triad", "last_minor_triad"), ("first_major_triad", "first_minor_triad"),
                 ("cadence_major", "cadence_minor")):
        out.append(raw[:, _FI[a]][:, j] - raw[:, _FI[b]][:, mi])
    return np.stack(out, axis=2)


class TwoStage:
    """The key signature by the linear model, the mode by a binary model within the pair
    (logistic, or with a hidden layer of ``hidden`` units)."""

    def __init__(self, data: Data, diff: bool = True, contrasts: bool = False, l2: float = 1e-3,
                 hidden: int = 0, l2h: float = 1e-3, steps: int = 600, rate: float = 0.05,
                 seed: int = 0) -> None:
        self.data, self.diff, self.contrasts, self.l2 = data, diff, contrasts, l2
        self.hidden, self.l2h, self.steps, self.rate, self.seed = hidden, l2h, steps, rate, seed

    def features(self, name: str, idx: np.ndarray) -> np.ndarray:
        """(N, 12, e): per pair, the major row minus the minor row and/or the contrasts."""
        parts = []
        if self.diff:
            phi = self.data.phi[name][idx]
            parts.append(phi[:, PAIR_MAJOR] - phi[:, 12 + PAIR_MINOR])
        if self.contrasts:
            parts.append(pair_contrasts(self.data.raw[name][idx]))
        return np.concatenate(parts, axis=2)

    def fit(self, parts: list[Part]) -> "TwoStage":
        d = self.data
        self.linear = Linear(d).fit(parts)  # the shipped model's L2; self.l2 is the mode model's
        xs, major, groups = [], [], []
        for name, idx in parts:
            y = d.y[name][idx]
            pair = np.where(y < 12, y, (y - 12 - 9) % 12)
            xs.append(self.features(name, idx)[np.arange(len(idx)), pair])
            major.append((y < 12).astype(np.float64))
            groups.append(y)
        x, t = np.concatenate(xs), np.concatenate(major)
        sw = train_key.balanced_weights(groups)
        sw /= sw.sum()
        width = x.shape[1]
        rng = np.random.default_rng(self.seed)
        params = {"u": np.zeros(width), "c": np.zeros(1)}
        if self.hidden:
            params.update(W1=rng.normal(0, 1 / np.sqrt(width), (self.hidden, width)),
                          b1=np.zeros(self.hidden),
                          w2=rng.normal(0, 0.1 / np.sqrt(self.hidden), self.hidden))

        def grads(p: dict) -> dict:
            z, a = self._logit(p, x)
            g = (1 / (1 + np.exp(-z)) - t) * sw
            out = {"u": x.T @ g + 2 * self.l2 * p["u"], "c": np.array([g.sum()])}
            if self.hidden:
                out["w2"] = np.maximum(a, 0).T @ g + 2 * self.l2h * p["w2"]
                da = g[:, None] * p["w2"][None] * (a > 0)
                out["W1"] = da.T @ x + 2 * self.l2h * p["W1"]
                out["b1"] = da.sum(0)
            return out

        self.params = _adam(params, grads, self.steps, self.rate)
        return self

    def _logit(self, p: dict, x: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
        z = x @ p["u"] + p["c"][0]
        if not self.hidden:
            return z, None
        a = x @ p["W1"].T + p["b1"]
        return z + np.maximum(a, 0) @ p["w2"], a

    def proba(self, name: str, idx: np.ndarray) -> np.ndarray:
        q = self.linear.proba(name, idx)
        signature = q[:, PAIR_MAJOR] + q[:, 12 + PAIR_MINOR]
        x = self.features(name, idx)
        z, _ = self._logit(self.params, x.reshape(len(idx) * 12, -1))
        major = (1 / (1 + np.exp(-z))).reshape(len(idx), 12)
        out = np.zeros((len(idx), 24))
        out[:, PAIR_MAJOR] = signature * major
        out[:, 12 + PAIR_MINOR] = signature * (1 - major)
        return out


def cross_validate(data: Data, make: Callable[[], object], folds: int = 5
                   ) -> dict[tuple[str, str], np.ndarray]:
    """Probabilities (N, 24) by ("5-fold" | "leave-one-genre-out", set) for every rated piece
    of each set, from models that never saw it (see the module docstring)."""
    every = {s: np.arange(len(data.y[s])) for s in data.sets}
    out = {}
    for held in data.sets:
        if held == "chorales":  # the evaluation chorales are never trained on
            model = make().fit([(s, every[s]) for s in data.sets])
            out[("5-fold", held)] = model.proba("chorales_eval", np.arange(len(data.y["chorales_eval"])))
            continue
        n = len(data.y[held])
        probs = np.zeros((n, 24))
        for f in range(folds):
            test = np.arange(n) % folds == f
            parts = [(s, every[s]) for s in data.sets if s != held] + [(held, np.flatnonzero(~test))]
            probs[test] = make().fit(parts).proba(held, np.flatnonzero(test))
        out[("5-fold", held)] = probs
    for held in data.sets:
        scored = "chorales_eval" if held == "chorales" else held
        model = make().fit([(s, every[s]) for s in data.sets if s != held])
        out[("leave-one-genre-out", held)] = model.proba(scored, np.arange(len(data.y[scored])))
    return out


def variants(data: Data) -> dict[str, Callable[[], object]]:
    """The variants of the fifth round by name (DEVELOPERS.md, Measurement history, Key detection)."""
    net = lambda **kw: (lambda: Network(data, **kw))  # noqa: E731
    two = lambda **kw: (lambda: TwoStage(data, **kw))  # noqa: E731
    return {
        "linear": lambda: Linear(data),
        "network-h16": net(hidden=16),
        "network-h8": net(hidden=8),
        "network-h16-noskip": net(hidden=16, skip=False),
        "network-h16-l2h0.01": net(hidden=16, l2h=1e-2),
        "network-h16-l2h0.03": net(hidden=16, l2h=3e-2),
        "network-h16-l2h0.1": net(hidden=16, l2h=1e-1),
        "network-h32-l2h0.03": net(hidden=32, l2h=3e-2),
        "network-h16-warm": net(hidden=16, warm=True, l2h=1e-2, steps=300, rate=0.005),
        "network-h8-frozen": net(hidden=8, warm=True, freeze_v=True, l2h=1e-2, steps=300, rate=0.005),
        "network-h16-noskip-l2h0.01": net(hidden=16, skip=False, l2h=1e-2, steps=600),
        "two-stage-diff": two(),
        "two-stage-diff-contrasts": two(contrasts=True),
        "two-stage-contrasts": two(diff=False, contrasts=True),
        "two-stage-diff-l2-0.01": two(l2=1e-2),
        "two-stage-diff-contrasts-h8": two(contrasts=True, hidden=8),
    }


def main(argv: list[str] | None = None) -> None:
    args = parser(__doc__).parse_args(argv)
    data = Data(args.pop, args.folk)
    table = variants(data)
    print_header(data)
    for name in args.only or list(table):
        print_scores(name, data, table[name])


def parser(doc: str, fold_seeds: bool = False) -> argparse.ArgumentParser:
    """The command line of a variants tool: --pop, --folk, --only (and, with ``fold_seeds``,
    --fold-seeds)."""
    ap = argparse.ArgumentParser(description=doc.splitlines()[0])
    ap.add_argument("--pop", help="POP909-style folder with labels.json")
    ap.add_argument("--folk", type=int, default=600, help="folk tunes, evenly spaced (as train_key)")
    ap.add_argument("--only", nargs="*", help="variant names (default: all)")
    if fold_seeds:
        ap.add_argument("--fold-seeds", type=int, nargs="*", default=[],
                        help="also score each variant with each set's pieces shuffled by these "
                             "seeds before the 5-fold split (other fold assignments)")
    return ap


def print_header(data: Data) -> None:
    """The header of the printed table: the sets under each cross-validation."""
    print(f"{'variant':<30} 5-fold " + " ".join(f"{s:>9}" for s in data.sets)
          + " | leave-one-genre-out " + " ".join(f"{s:>9}" for s in data.sets))


def print_scores(name: str, data: Data, make: Callable[[], object]) -> None:
    """One row of the printed table: the variant's exact accuracy per set, both
    cross-validations, and the CPU time they took."""
    t0 = time.process_time()
    probs = cross_validate(data, make)
    exact = {k: float(np.mean(p.argmax(1) == data.y["chorales_eval" if k[1] == "chorales" else k[1]]))
             for k, p in probs.items()}
    print(f"{name:<30} " + " ".join(f"{exact[('5-fold', s)]:9.3f}" for s in data.sets) + " | "
          + " ".join(f"{exact[('leave-one-genre-out', s)]:9.3f}" for s in data.sets)
          + f"  ({time.process_time() - t0:.0f} s CPU)", flush=True)


def print_variants(names: list[str], variant: Callable[[str], Data],
                   model: Callable[[str, Data], object],
                   shuffle: Callable[[Data, int], Data], fold_seeds: list[int]) -> None:
    """Rows of the printed table for the variants tools: each named variant's data
    (``variant(name)``) scored with its model, then once per fold seed with the pieces
    shuffled (``shuffle(data, seed)``: another fold assignment)."""
    for name in names:
        data = variant(name)
        print_scores(name, data, lambda: model(name, data))
        for seed in fold_seeds:
            moved = shuffle(data, seed)
            print_scores(f"{name} (folds {seed})", moved, lambda: model(name, moved))


if __name__ == "__main__":
    main()
