#!/usr/bin/env python3
"""Generate the reference fixtures in tests/fixtures/reference/ with numpy and scikit-learn.

The Rust test tests/reference.rs loads these models and probes through receptor's own
importer and compares receptor's forward pass, per-unit statistics and interval bounds with
the numbers written here by independent code (scikit-learn's MLPClassifier.predict_proba and
plain numpy implementations of the published definitions).

Generated with (pinned; the versions actually used are also written to VERSIONS.txt):
    Python 3.11.7, numpy 2.4.6, scikit-learn 1.9.1 (scipy 1.17.1)
Install:  pip install numpy==2.4.6 scikit-learn==1.9.1 scipy==1.17.1
Run from the repository root:  python3 scripts/make_reference_fixtures.py

Data sets: iris and breast cancer, both shipped inside scikit-learn (no download).

What the fixtures contain, per model NAME:
  NAME.json            the trained MLPClassifier in our schema "receptor-model/1"
                       (weights transposed from sklearn's coefs_ [inputs, units] to our
                       [units, inputs]; softmax output, labels = class names)
  NAME_probe.csv       the data set's samples: feature columns then a `label` column
  NAME_expected.json   predict_proba, predict, per-unit statistics, interval bounds and
                       hidden pre-/post-activations of a few samples

All weights, biases and inputs are rounded to float32 *before* scikit-learn computes its
predictions, so that sklearn and receptor see exactly the same numbers; what remains is the
difference between float32 arithmetic (receptor) and float64 arithmetic (sklearn/numpy).
"""

import json
import platform
import sys
from pathlib import Path

import numpy as np
import scipy
import sklearn
from sklearn.datasets import load_breast_cancer, load_iris
from sklearn.neural_network import MLPClassifier
from sklearn.preprocessing import StandardScaler

OUT = Path(__file__).resolve().parent.parent / "tests" / "fixtures" / "reference"

# Samples whose hidden pre-activations are written out (indices into the probe).
TRACE_ROWS = [0, 1, 7, 50, 100, 120]

# Relative tolerance for near_zero_frac: |w| <= 0.01 x (largest |w| in the layer).
# Normative definition of the `stats` contract.
NEAR_ZERO_REL = 0.01


def f32(a):
    """Round to float32 and return as float64 (exactly representable in float32)."""
    return np.asarray(a, dtype=np.float32).astype(np.float64)


def f32_json(a):
    """Nested lists of the shortest decimal strings that parse back to the same float32.

    json.dump would print the float64 value; converting the float32's shortest repr to a
    Python float keeps the file short and still parses to the identical float32.
    """
    arr = np.asarray(a, dtype=np.float32)
    if arr.ndim == 0:
        return float(str(arr))
    return [f32_json(x) for x in arr]


def fmt32(v):
    """Shortest decimal string of a float32 value (for the probe CSV)."""
    return np.format_float_positional(np.float32(v), unique=True, trim="-")


# ---------------------------------------------------------------------------------------
# Published definitions, in numpy (float64).


def hoyer(w):
    """Hoyer (2004), "Non-negative matrix factorization with sparseness constraints", JMLR 5:
    (sqrt(n) - L1/L2) / (sqrt(n) - 1). The `stats` contract gives 1 for an all-zero vector
    and for n == 1 (the formula is undefined there)."""
    w = np.abs(np.asarray(w, dtype=np.float64))
    n = w.size
    l2 = np.sqrt(np.sum(w * w))
    if n == 1 or l2 == 0.0:
        return 1.0
    return (np.sqrt(n) - np.sum(w) / l2) / (np.sqrt(n) - 1.0)


def gini(w):
    """Gini index of |w| per Hurley & Rickard (2009), "Comparing measures of sparsity",
    IEEE Trans. Inf. Theory 55(10), eq. for S_Gini: with c sorted ascending,
    G = 1 - 2 * sum_k (c_k / ||c||_1) * ((N - k + 1/2) / N), k = 1..N.
    The `stats` contract gives 1 for an all-zero vector and for N == 1."""
    c = np.sort(np.abs(np.asarray(w, dtype=np.float64)))
    n = c.size
    s = np.sum(c)
    if n == 1 or s == 0.0:
        return 1.0
    k = np.arange(1, n + 1, dtype=np.float64)
    return 1.0 - 2.0 * np.sum((c / s) * ((n - k + 0.5) / n))


def unit_stats(layers):
    """Per-unit statistics and per-layer summaries, from the `stats` contract."""
    rows, summaries = [], []
    for li, (name, w, b, _act) in enumerate(layers):
        layer_max = float(np.max(np.abs(w)))
        tol = NEAR_ZERO_REL * layer_max
        hs, gs = [], []
        for u in range(w.shape[0]):
            row = w[u]
            h, g = hoyer(row), gini(row)
            hs.append(h)
            gs.append(g)
            rows.append(
                {
                    "layer": name,
                    "layer_index": li,
                    "unit": u,
                    "fan_in": int(row.size),
                    "l1": float(np.sum(np.abs(row))),
                    "l2": float(np.sqrt(np.sum(row * row))),
                    "max_abs": float(np.max(np.abs(row))),
                    "near_zero_frac": float(np.mean(np.abs(row) <= tol)),
                    "hoyer": float(h),
                    "gini": float(g),
                    "bias": float(b[u]),
                }
            )
        summaries.append(
            {
                "layer": name,
                "units": int(w.shape[0]),
                "fan_in": int(w.shape[1]),
                "zero_tol": tol,
                "mean_hoyer": float(np.mean(hs)),
                "mean_gini": float(np.mean(gs)),
                "near_zero_frac": float(np.mean(np.abs(w) <= tol)),
                "max_abs": layer_max,
            }
        )
    return rows, summaries


ACT = {
    "identity": lambda z: z,
    "relu": lambda z: np.maximum(z, 0.0),
    "tanh": np.tanh,
    "sigmoid": lambda z: 1.0 / (1.0 + np.exp(-z)),
}


def softmax(z):
    e = np.exp(z - z.max(axis=1, keepdims=True))
    return e / e.sum(axis=1, keepdims=True)


def apply(act, z):
    return softmax(z) if act == "softmax" else ACT[act](z)


def act_range(act, lo, hi):
    """Image of [lo, hi] under a monotone element-wise activation."""
    return ACT[act](lo), ACT[act](hi)


def interval_bounds(layers, low, high):
    """Plain interval bound propagation (Gowal et al. 2018, "On the effectiveness of interval
    bound propagation for training verifiably robust models", eqs. 5-6), in float64:
    centre/radius form, z_mid = W mid + b, z_rad = |W| rad. On the first layer this equals
    the exact box maximum b + sum(max(w*low, w*high)) (and the minimum likewise)."""
    lows, highs = [], []
    lo, hi = low, high
    for li, (_name, w, b, act) in enumerate(layers):
        mid, rad = (hi + lo) / 2.0, (hi - lo) / 2.0
        zmid = w @ mid + b
        zrad = np.abs(w) @ rad
        zl, zh = zmid - zrad, zmid + zrad
        if li == 0:
            # Cross-check with the closed form of the first layer.
            exact_hi = b + np.sum(np.maximum(w * low, w * high), axis=1)
            exact_lo = b + np.sum(np.minimum(w * low, w * high), axis=1)
            assert np.allclose(zh, exact_hi, rtol=0, atol=1e-12)
            assert np.allclose(zl, exact_lo, rtol=0, atol=1e-12)
            zl, zh = exact_lo, exact_hi
        lows.append(zl)
        highs.append(zh)
        if act != "softmax":
            lo, hi = act_range(act, zl, zh)
    return lows, highs


# Saturation thresholds of the `screen` contract (normative constants): a sigmoid/tanh unit
# is saturated where its slope is below 5% of the peak slope.
SATURATION_Z = {"sigmoid": 4.3565, "tanh": 2.1783}
RARE = 0.01  # default --rare of `screen`


def screen(layers, pre, post, upper):
    """Per hidden unit: active_frac, mean and max of the activation over the probe, and the
    status by the rules of the `screen` contract (with plain interval bounds)."""
    rows = []
    for li, (name, _w, _b, act) in enumerate(layers[:-1]):
        z, a = pre[li], post[li]
        if act in SATURATION_Z:
            active = np.abs(z) < SATURATION_Z[act]
        else:
            active = z > 0.0
        frac = np.mean(active, axis=0)
        for u in range(z.shape[1]):
            if act in ("relu", "leaky_relu"):
                if upper[li][u] <= 0.0:
                    status = "dead_proven"
                elif frac[u] == 0.0:
                    status = "dead_on_probe"
                elif frac[u] < RARE:
                    status = "rarely_active"
                elif frac[u] == 1.0:
                    status = "always_active"
                else:
                    status = "ok"
            elif act in SATURATION_Z:
                status = "saturated" if frac[u] < RARE else "ok"
            else:
                status = "ok"
            rows.append(
                {
                    "layer": name,
                    "layer_index": li,
                    "unit": u,
                    "activation": act,
                    "active_frac": float(frac[u]),
                    "mean": float(np.mean(a[:, u])),
                    "max": float(np.max(a[:, u])),
                    "ibp_upper_bound": float(upper[li][u]),
                    "status": status,
                }
            )
    return rows


def forward_trace(layers, x):
    pre, post = [], []
    a = x
    for _name, w, b, act in layers:
        z = a @ w.T + b
        a = apply(act, z)
        pre.append(z)
        post.append(a)
    return pre, post


# ---------------------------------------------------------------------------------------


def build(name, description, x, y, feature_names, class_names, hidden, activation, seed):
    x = f32(x)
    clf = MLPClassifier(
        hidden_layer_sizes=hidden,
        activation=activation,
        solver="lbfgs",
        max_iter=3000,
        random_state=seed,
    )
    clf.fit(x, y)
    # Round the trained parameters to float32, so that sklearn predicts with exactly the
    # numbers stored in the JSON file.
    clf.coefs_ = [f32(c) for c in clf.coefs_]
    clf.intercepts_ = [f32(c) for c in clf.intercepts_]

    ours = {"relu": "relu", "tanh": "tanh", "logistic": "sigmoid", "identity": "identity"}[
        activation
    ]
    layers = []
    n_layers = len(clf.coefs_)
    for i, (c, b) in enumerate(zip(clf.coefs_, clf.intercepts_)):
        last = i == n_layers - 1
        # sklearn stores coefs_[i] as [inputs, units]; our schema is [units, inputs].
        w = c.T.copy()
        if last and w.shape[0] == 1:
            # Binary problem: sklearn has one logistic output unit p = sigmoid(z). The
            # two-unit softmax over (0, z) gives exactly (1 - p, p), sklearn's predict_proba
            # columns; a zero row and zero bias for class 0 keep the model equivalent.
            w = np.vstack([np.zeros_like(w), w])
            b = np.concatenate([[0.0], b])
        lname = "out" if last else f"h{i + 1}"
        layers.append((lname, w, b, "softmax" if last else ours))

    low, high = x.min(axis=0), x.max(axis=0)
    model = {
        "schema": "receptor-model/1",
        "name": name,
        "description": description,
        "input": {
            "size": int(x.shape[1]),
            "layout": {"kind": "vector"},
            "low": f32_json(low),
            "high": f32_json(high),
            "names": list(feature_names),
        },
        "layers": [],
        "generator": "scripts/make_reference_fixtures.py",
    }
    for lname, w, b, act in layers:
        entry = {
            "name": lname,
            "type": "dense",
            "activation": act,
            "weights": f32_json(w),
            "bias": f32_json(b),
        }
        if lname == "out":
            entry["labels"] = list(class_names)
        model["layers"].append(entry)

    OUT.mkdir(parents=True, exist_ok=True)
    with open(OUT / f"{name}.json", "w", encoding="utf-8") as fh:
        json.dump(model, fh, indent=1)
        fh.write("\n")

    with open(OUT / f"{name}_probe.csv", "w", encoding="utf-8", newline="\n") as fh:
        fh.write(",".join(list(feature_names) + ["label"]) + "\n")
        for row, label in zip(x, y):
            fh.write(",".join([fmt32(v) for v in row] + [class_names[label]]) + "\n")

    proba = clf.predict_proba(x)
    predict = clf.predict(x)
    pre, post = forward_trace(layers, x)
    # Our numpy forward pass must agree with sklearn's before it can serve as a reference.
    assert np.allclose(post[-1], proba, rtol=0, atol=1e-12), name
    stats, summaries = unit_stats(layers)
    lows, highs = interval_bounds(layers, low, high)
    # Soundness of the numpy bounds on the data itself (the data lie inside the box).
    for zl, zh, z in zip(lows, highs, pre):
        assert np.all(z >= zl[None, :] - 1e-9) and np.all(z <= zh[None, :] + 1e-9), name

    expected = {
        "generator": "scripts/make_reference_fixtures.py",
        "versions": versions(),
        "model": f"{name}.json",
        "probe": f"{name}_probe.csv",
        "samples": int(x.shape[0]),
        "train_accuracy": float(np.mean(predict == y)),
        "predict_proba": proba.tolist(),
        "predict": [int(p) for p in predict],
        "target": [int(t) for t in y],
        "stats": stats,
        "layer_summaries": summaries,
        "bounds": {"lower": [v.tolist() for v in lows], "upper": [v.tolist() for v in highs]},
        "screen": screen(layers, pre, post, highs),
        "trace": {
            "rows": TRACE_ROWS,
            "pre": [z[TRACE_ROWS].tolist() for z in pre],
            "post": [a[TRACE_ROWS].tolist() for a in post],
        },
    }
    with open(OUT / f"{name}_expected.json", "w", encoding="utf-8") as fh:
        json.dump(expected, fh, indent=1)
        fh.write("\n")
    print(f"{name}: {[w.shape for _, w, _, _ in layers]}, train accuracy {np.mean(predict == y):.4f}")


def versions():
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scikit-learn": sklearn.__version__,
        # sklearn's lbfgs solver is scipy's, so scipy's version shapes the trained weights.
        "scipy": scipy.__version__,
    }


def main():
    iris = load_iris()
    build(
        "iris_relu",
        "Iris (Fisher 1936, as shipped with scikit-learn), MLPClassifier (8, 6) relu, "
        "random_state 0; reference fixture for tests/reference.rs.",
        iris.data,
        iris.target,
        iris.feature_names,
        list(iris.target_names),
        (8, 6),
        "relu",
        0,
    )
    build(
        "iris_logistic",
        "Iris (as shipped with scikit-learn), MLPClassifier (5,) logistic, random_state 1; "
        "reference fixture for tests/reference.rs.",
        iris.data,
        iris.target,
        iris.feature_names,
        list(iris.target_names),
        (5,),
        "logistic",
        1,
    )
    cancer = load_breast_cancer()
    # The 30 raw features span very different scales; the probe holds them standardised
    # (mean 0, std 1 over the data set) as a user's pipeline would feed the network.
    xs = StandardScaler().fit_transform(cancer.data)
    build(
        "cancer_tanh",
        "Breast cancer Wisconsin (diagnostic, as shipped with scikit-learn), features "
        "standardised, MLPClassifier (10, 6) tanh, random_state 0; reference fixture for "
        "tests/reference.rs.",
        xs,
        cancer.target,
        cancer.feature_names,
        list(cancer.target_names),
        (10, 6),
        "tanh",
        0,
    )
    v = versions()
    with open(OUT / "VERSIONS.txt", "w", encoding="utf-8") as fh:
        fh.write("Generated by scripts/make_reference_fixtures.py with:\n")
        for k, val in v.items():
            fh.write(f"{k} {val}\n")
        fh.write(f"platform {platform.system()} {platform.machine()}\n")


if __name__ == "__main__":
    sys.exit(main())
