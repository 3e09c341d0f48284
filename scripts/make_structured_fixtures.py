#!/usr/bin/env python3
"""Generate the structured-pruning reference fixture in tests/fixtures/structured/.

The Rust test tests/structured_reference.rs loads the model and probe written here through
receptor's own importer, runs `prune-sweep --by unit` (the library functions behind it) and
compares its unit ranking and accuracy curves with the numbers computed here by plain numpy,
independently of receptor.

Generated with (pinned; the versions actually used are also written to VERSIONS.txt):
    Python 3.11.7, numpy 2.4.6, scikit-learn 1.9.1 (scipy 1.17.1)
Install:  pip install numpy==2.4.6 scikit-learn==1.9.1 scipy==1.17.1
Run from the repository root:  python3 scripts/make_structured_fixtures.py

Data: the optical digits set (8 x 8 images, 4-bit grey levels 0..16) shipped inside
scikit-learn (no download). Model: MLPClassifier (32, 16) relu trained with lbfgs on a
stratified 70 % split; the probe is the other 30 % (540 samples).

The published criteria and the rules shared with receptor (src/analysis/structured.rs):
  - l1: the L1 norm of a hidden unit's incoming weights, sum_i |W[j, i]| (H. Li et al.,
    "Pruning filters for efficient ConvNets", ICLR 2017, section 3.1);
  - activation: the mean |activation| of the unit on the probe, with the unpruned network;
  - ranking: ascending score, ties broken by the lower unit index first;
  - a fraction f removes k = floor(f * n + 1e-9) of a layer's n units; the output layer is
    never pruned; removing unit j deletes row j of W and b and column j of the next W;
  - "all": every hidden layer pruned at once; "per layer": one hidden layer at a time, the
    others whole (the sensitivity analysis of S. Han et al., "Learning both weights and
    connections for efficient neural networks", NeurIPS 2015).

All weights and inputs are rounded to float32 before anything is computed, so receptor and
numpy see the same numbers. numpy computes in float64, receptor in float32: a sample whose
two largest output probabilities differ by less than NEAR_TIE could be predicted
differently by the two, so each curve point records how many such samples it has.
"""

import json
import math
import platform
import sys
from pathlib import Path

import numpy as np
import scipy
import sklearn
from sklearn.datasets import load_digits
from sklearn.model_selection import train_test_split
from sklearn.neural_network import MLPClassifier

OUT = Path(__file__).resolve().parent.parent / "tests" / "fixtures" / "structured"

FRACTIONS = [i / 10 for i in range(10)]
FLOOR_SLACK = 1e-9
NEAR_TIE = 1e-5


def f32(a):
    """Round to float32 and return as float64 (exactly representable in float32)."""
    return np.asarray(a, dtype=np.float32).astype(np.float64)


def f32_json(a):
    """Nested lists of the shortest decimals that parse back to the same float32."""
    arr = np.asarray(a, dtype=np.float32)
    if arr.ndim == 0:
        return float(str(arr))
    return [f32_json(x) for x in arr]


def fmt32(v):
    return np.format_float_positional(np.float32(v), unique=True, trim="-")


def softmax(z):
    e = np.exp(z - z.max(axis=1, keepdims=True))
    return e / e.sum(axis=1, keepdims=True)


def forward(layers, x):
    """float64 forward pass; returns the hidden activations and the output probabilities."""
    hidden = []
    a = x
    for i, (w, b) in enumerate(layers):
        z = a @ w.T + b
        if i == len(layers) - 1:
            return hidden, softmax(z)
        a = np.maximum(z, 0.0)
        hidden.append(a)
    raise AssertionError("no layers")


def ranking(scores):
    """Ascending score, ties by the lower index first (np.lexsort sorts by the last key)."""
    idx = np.arange(len(scores))
    return [int(i) for i in np.lexsort((idx, scores))]


def removed_count(f, n):
    return min(int(math.floor(f * n + FLOOR_SLACK)), n)


def prune(layers, rank, f, only):
    """Delete the k lowest-ranked units of each hidden layer (or of layer `only`)."""
    out = [(w.copy(), b.copy()) for w, b in layers]
    removed = 0
    for l in range(len(layers) - 1):
        if only is not None and l != only:
            continue
        k = removed_count(f, len(rank[l]))
        gone = sorted(rank[l][:k])
        removed += k
        keep = [j for j in range(out[l][0].shape[0]) if j not in gone]
        w, b = out[l]
        out[l] = (w[keep, :], b[keep])
        wn, bn = out[l + 1]
        out[l + 1] = (wn[:, keep], bn)
    return out, removed


def point(layers, rank, f, only, x, y, criterion, names):
    pruned, removed = prune(layers, rank, f, only)
    _, p = forward(pruned, x)
    pred = np.argmax(p, axis=1)
    top2 = np.sort(p, axis=1)[:, -2:]
    near = int(np.sum(top2[:, 1] - top2[:, 0] < NEAR_TIE))
    hidden = range(len(layers) - 1)
    units = sum(layers[l][0].shape[0] for l in hidden if only is None or l == only)
    return {
        "criterion": criterion,
        "layer": "all" if only is None else names[only],
        "fraction": f,
        "removed": removed,
        "units": units,
        "parameters": int(sum(w.size + b.size for w, b in pruned)),
        "correct": int(np.sum(pred == y)),
        "samples": int(len(y)),
        "near_ties": near,
    }


def versions():
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scikit-learn": sklearn.__version__,
        "scipy": scipy.__version__,
    }


def main():
    digits = load_digits()
    x = f32(digits.data)
    y = digits.target
    x_train, x_test, y_train, y_test = train_test_split(
        x, y, test_size=0.3, random_state=0, stratify=y
    )
    clf = MLPClassifier(
        hidden_layer_sizes=(32, 16),
        activation="relu",
        solver="lbfgs",
        max_iter=2000,
        random_state=0,
    )
    clf.fit(x_train, y_train)
    clf.coefs_ = [f32(c) for c in clf.coefs_]
    clf.intercepts_ = [f32(c) for c in clf.intercepts_]
    # sklearn stores coefs_[i] as [inputs, units]; our schema is [units, inputs].
    layers = [(c.T.copy(), b.copy()) for c, b in zip(clf.coefs_, clf.intercepts_)]
    names = ["h1", "h2", "out"]
    classes = [str(c) for c in clf.classes_]

    hidden, proba = forward(layers, x_test)
    assert np.allclose(proba, clf.predict_proba(x_test), rtol=0, atol=1e-12)

    feature_names = list(digits.feature_names)
    model = {
        "schema": "receptor-model/1",
        "name": "digits_relu",
        "description": "Optical digits (as shipped with scikit-learn), MLPClassifier (32, 16) "
        "relu, lbfgs, random_state 0, trained on a stratified 70% split; reference fixture "
        "for tests/structured_reference.rs.",
        "input": {
            "size": int(x.shape[1]),
            "layout": {"kind": "vector"},
            # The data's natural range: 4-bit grey levels.
            "low": 0.0,
            "high": 16.0,
            "names": feature_names,
        },
        "layers": [],
        "generator": "scripts/make_structured_fixtures.py",
    }
    for name, (w, b) in zip(names, layers):
        entry = {
            "name": name,
            "type": "dense",
            "activation": "softmax" if name == "out" else "relu",
            "weights": f32_json(w),
            "bias": f32_json(b),
        }
        if name == "out":
            entry["labels"] = classes
        model["layers"].append(entry)

    OUT.mkdir(parents=True, exist_ok=True)
    with open(OUT / "digits_relu.json", "w", encoding="utf-8") as fh:
        json.dump(model, fh, indent=1)
        fh.write("\n")
    with open(OUT / "digits_relu_probe.csv", "w", encoding="utf-8", newline="\n") as fh:
        fh.write(",".join(feature_names + ["label"]) + "\n")
        for row, label in zip(x_test, y_test):
            fh.write(",".join([fmt32(v) for v in row] + [classes[label]]) + "\n")

    scores = {
        "l1": [np.sum(np.abs(w), axis=1) for w, _ in layers[:-1]],
        "activation": [np.mean(np.abs(a), axis=0) for a in hidden],
    }
    curves = []
    rankings = {}
    for criterion, s in scores.items():
        rank = [ranking(v) for v in s]
        rankings[criterion] = rank
        for f in FRACTIONS:
            curves.append(point(layers, rank, f, None, x_test, y_test, criterion, names))
        for l in range(len(layers) - 1):
            for f in FRACTIONS:
                curves.append(point(layers, rank, f, l, x_test, y_test, criterion, names))

    expected = {
        "generator": "scripts/make_structured_fixtures.py",
        "versions": versions(),
        "model": "digits_relu.json",
        "probe": "digits_relu_probe.csv",
        "fractions": FRACTIONS,
        "floor_slack": FLOOR_SLACK,
        "near_tie": NEAR_TIE,
        "test_accuracy": float(np.mean(clf.predict(x_test) == y_test)),
        "scores": {c: [v.tolist() for v in s] for c, s in scores.items()},
        "rankings": rankings,
        "curves": curves,
    }
    with open(OUT / "digits_relu_expected.json", "w", encoding="utf-8") as fh:
        json.dump(expected, fh, indent=1)
        fh.write("\n")
    with open(OUT / "VERSIONS.txt", "w", encoding="utf-8") as fh:
        fh.write("Generated by scripts/make_structured_fixtures.py with:\n")
        for k, val in versions().items():
            fh.write(f"{k} {val}\n")
        fh.write(f"platform {platform.system()} {platform.machine()}\n")
    print(
        f"digits_relu: test accuracy {expected['test_accuracy']:.4f}, "
        f"{len(curves)} curve points, near ties max {max(c['near_ties'] for c in curves)}"
    )


if __name__ == "__main__":
    sys.exit(main())
