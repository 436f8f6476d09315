"""Train the key classifier (``profile: learned``) and write ``key_weights.json``.

    python -m pipeline.tools.train_key --pop ../shared/data/pop909-dev --folk 600 [--l2 0.01]

The model: multinomial logistic regression over the 24 keys whose per-key evidence is
``key.class_features`` (transposition-invariant, so one weight vector serves every tonic),
fitted with numpy by full-batch gradient descent (Adam) on the cross-entropy plus an L2
penalty. Each set weighs the same in the loss whatever its size, so no genre dominates.

Training sets (recorded in the weights file): the Bach chorales of the development subset
(``chorales(100, offset=2)``; the evaluation subset, offset 0, is never trained on), the folk
tunes of airdsAirs and miscFolk with a major/minor ``K:`` field, the classical pieces of the
corpus with a tonal ending, and the POP909 development songs when ``--pop`` is given. The
L2 strength is chosen by leave-one-genre-out cross-validation (train on three sets, score the
fourth), never on one set, by the held-out log-loss (the probabilities are what key_confidence
reports); the figures are stored beside the weights.
"""
from __future__ import annotations

import argparse
import datetime
import json
from pathlib import Path

import numpy as np

from . import eval_sets
from ..analysis import key as keymod

WEIGHTS_PATH = Path(keymod.__file__).with_name("key_weights.json")
L2_GRID = (1e-4, 1e-3, 1e-2)


def decode(data: bytes):
    from .eval_midi import decode as _decode
    return _decode(data)


def class_feature_array(works: list[dict]) -> tuple[np.ndarray, np.ndarray]:
    """(N, 24, D) per-key evidence and (N,) class index (tonic + 12 * minor) of the works
    that have a key truth."""
    rated = [w for w in works if w["truth"] is not None]
    phi = np.zeros((len(rated), 24, keymod.N_CLASS_FEATURES))
    y = np.zeros(len(rated), dtype=np.int64)
    for i, w in enumerate(rated):
        phi[i] = keymod.class_features(keymod.key_features(decode(w["midi"])))
        pc, mode = w["truth"]
        y[i] = pc + (12 if mode == "minor" else 0)
    return phi, y


def fit(phi: np.ndarray, y: np.ndarray, sample_weight: np.ndarray, l2: float = 1e-3,
        iterations: int = 600, rate: float = 0.05) -> np.ndarray:
    """Weights minimizing sum(sample_weight * cross-entropy) / sum(sample_weight) + l2 * |w|^2
    (Adam, full batch, from zero; deterministic).

    ``phi`` is (N, 24, D) from ``class_features``; its structure (major rows fill only the
    major block, minor rows the same rotated values in the minor block) is used to keep one
    float32 copy of the rotated distributions, four times less memory to stream per step."""
    n = len(keymod.FEATURES) * 12
    rot = np.ascontiguousarray(phi[:, :12, :n], dtype=np.float32)      # (N, 12, n)
    rest = np.ascontiguousarray(phi[:, :, 2 * n:], dtype=np.float32)   # (N, 24, r)
    sw = (sample_weight / sample_weight.sum()).astype(np.float32)
    w = np.zeros(phi.shape[2])
    m = np.zeros_like(w)
    v = np.zeros_like(w)
    b1, b2, eps = 0.9, 0.999, 1e-8
    rows = np.arange(len(y))
    for t in range(1, iterations + 1):
        w32 = w.astype(np.float32)
        z = rest @ w32[2 * n:]
        z[:, :12] += rot @ w32[:n]
        z[:, 12:] += rot @ w32[n:2 * n]
        z -= z.max(axis=1, keepdims=True)
        p = np.exp(z)
        p /= p.sum(axis=1, keepdims=True)
        p[rows, y] -= 1.0  # d(cross-entropy)/dz
        p *= sw[:, None]
        grad = np.empty_like(w)
        grad[:n] = np.einsum("nk,nkd->d", p[:, :12], rot)
        grad[n:2 * n] = np.einsum("nk,nkd->d", p[:, 12:], rot)
        grad[2 * n:] = np.einsum("nk,nkd->d", p, rest)
        grad += 2 * l2 * w
        m = b1 * m + (1 - b1) * grad
        v = b2 * v + (1 - b2) * grad * grad
        w -= rate * (m / (1 - b1 ** t)) / (np.sqrt(v / (1 - b2 ** t)) + eps)
    return w


def probabilities(phi: np.ndarray, w: np.ndarray) -> np.ndarray:
    """(N, 24) key probabilities per piece."""
    z = phi @ w
    z -= z.max(axis=1, keepdims=True)
    p = np.exp(z)
    return p / p.sum(axis=1, keepdims=True)


def predict(phi: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(predicted class, its probability) per piece."""
    p = probabilities(phi, w)
    best = p.argmax(axis=1)
    return best, p[np.arange(len(best)), best]


def balanced_weights(groups: list[np.ndarray]) -> np.ndarray:
    """Per-sample weights giving each group the same total weight."""
    return np.concatenate([np.full(len(g), 1.0 / max(len(g), 1)) for g in groups])


def leave_one_genre_out(sets: dict[str, tuple[np.ndarray, np.ndarray]], l2: float,
                        iterations: int = 600) -> dict[str, dict]:
    """For each set: train on the others (balanced), score it. Returns per set the exact
    accuracy, the log-loss (mean -log probability of the true key), the predictions and their
    probabilities."""
    out = {}
    for held in sets:
        train = [s for s in sets if s != held]
        phi = np.concatenate([sets[s][0] for s in train])
        y = np.concatenate([sets[s][1] for s in train])
        w = fit(phi, y, balanced_weights([sets[s][1] for s in train]), l2, iterations)
        p = probabilities(sets[held][0], w)
        y = sets[held][1]
        pred = p.argmax(axis=1)
        out[held] = {"exact": float(np.mean(pred == y)),
                     "log_loss": float(-np.mean(np.log(p[np.arange(len(y)), y] + 1e-12))),
                     "pred": pred, "prob": p[np.arange(len(y)), pred]}
    return out


def cross_validated(sets: dict[str, tuple[np.ndarray, np.ndarray]], held: str, l2: float,
                    folds: int = 5, iterations: int = 600) -> tuple[np.ndarray, np.ndarray]:
    """Predictions for every piece of set ``held`` by models that never saw it: piece i is
    in fold ``i % folds``; each fold is predicted by a model trained on the other folds of
    ``held`` plus every other set (balanced). Returns (predicted class, probability)."""
    phi_h, y_h = sets[held]
    pred = np.zeros(len(y_h), dtype=np.int64)
    prob = np.zeros(len(y_h))
    others = [s for s in sets if s != held]
    for f in range(folds):
        test = np.arange(len(y_h)) % folds == f
        groups = [sets[s][1] for s in others] + [y_h[~test]]
        phi = np.concatenate([sets[s][0] for s in others] + [phi_h[~test]])
        w = fit(phi, np.concatenate(groups), balanced_weights(groups), l2, iterations)
        pred[test], prob[test] = predict(phi_h[test], w)
    return pred, prob


def training_sets(pop: str | None, folk_count: int | None, pop_count: int | None = None
                  ) -> dict[str, list[dict]]:
    """The training sets by name (see the module docstring)."""
    sets = {"chorales": eval_sets.chorales(100, offset=2),
            "folk": eval_sets.folk(folk_count),
            "classical": eval_sets.classical()}
    if pop:
        sets["pop"] = eval_sets.pop(pop, pop_count, music21_count=0)
    return sets


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pop", help="POP909-style folder with labels.json (optional set)")
    ap.add_argument("--folk", type=int, default=600,
                    help="folk tunes, evenly spaced (0 = all 1,365; the shipped weights: 600)")
    ap.add_argument("--l2", type=float, default=None, help="L2 strength (default: chosen by "
                    "leave-one-genre-out cross-validation over " + ", ".join(map(str, L2_GRID)) + ")")
    ap.add_argument("--out", default=str(WEIGHTS_PATH))
    args = ap.parse_args(argv)
    works = training_sets(args.pop, args.folk or None)
    sets = {name: class_feature_array(ws) for name, ws in works.items()}
    for name, (phi, y) in sets.items():
        print(f"{name}: {len(y)} pieces with a key truth")
    cv, loss = {}, {}
    for l2 in ([args.l2] if args.l2 is not None else L2_GRID):
        res = leave_one_genre_out(sets, l2)
        cv[l2] = {k: v["exact"] for k, v in res.items()}
        loss[l2] = float(np.mean([v["log_loss"] for v in res.values()]))
        print(f"l2={l2:g}: leave-one-genre-out exact " +
              ", ".join(f"{k} {v:.3f}" for k, v in cv[l2].items()) +
              f"; mean {np.mean(list(cv[l2].values())):.3f}; mean log-loss {loss[l2]:.3f}")
    # the probabilities are the product (key_confidence): choose by held-out log-loss
    best_l2 = min(loss, key=lambda k: (loss[k], -k))
    phi = np.concatenate([s[0] for s in sets.values()])
    y = np.concatenate([s[1] for s in sets.values()])
    w = fit(phi, y, balanced_weights([s[1] for s in sets.values()]), best_l2)
    data = {
        "method": "multinomial logistic regression over 24 keys on key.class_features",
        "features": list(keymod.FEATURES), "profiles": list(keymod.CORRELATION_PROFILES),
        "l2": best_l2,
        "trained_on": {name: {"pieces": int(len(s[1])), "files": [w["name"] for w in works[name]
                                                                  if w["truth"] is not None]}
                       for name, s in sets.items()},
        "leave_one_genre_out_exact": {str(k): v for k, v in cv.items()},
        "leave_one_genre_out_log_loss": {str(k): v for k, v in loss.items()},
        "trained": datetime.date.today().isoformat(),
        "command": ("python -m pipeline.tools.train_key"
                    + (" --pop ../shared/data/pop909-dev" if args.pop else "")
                    + (f" --folk {args.folk}" if args.folk else "")
                    + (f" --l2 {args.l2:g}" if args.l2 is not None else "")),
        "weights": [round(float(x), 6) for x in w],
    }
    Path(args.out).write_text(json.dumps(data, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    print(f"l2={best_l2:g}; wrote {args.out}")


if __name__ == "__main__":
    main()
