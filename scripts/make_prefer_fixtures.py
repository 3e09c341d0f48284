#!/usr/bin/env python3
"""Generate the preferred-input reference fixtures in tests/fixtures/prefer/.

The Rust test tests/prefer_reference.rs loads these models through receptor's own importer,
runs receptor's preferred-input search at its default settings on every hidden unit, and
checks that each unit reaches at least 99% of the best pre-activation found here by an
independent plain numpy search: projected gradient ascent from 32 uniform random starts per
unit (best point of every trajectory kept, best start reported).

Generated with (pinned; the versions actually used are also written to VERSIONS.txt):
    Python 3.11.7, numpy 2.4.6, scikit-learn 1.9.1 (scipy 1.17.1)
Install:  pip install numpy==2.4.6 scikit-learn==1.9.1 scipy==1.17.1
Run from the repository root:  python3 scripts/make_prefer_fixtures.py

Data sets (all shipped inside scikit-learn, no download): optical digits (8 x 8 images,
grey levels 0..16, box [0, 16]), iris and breast cancer (features standardised with
StandardScaler; box = the standardised data's per-feature minimum and maximum).
Models: MLPClassifier with two hidden layers, relu and tanh, lbfgs, random_state 0.

The reference search, per unit, in scaled coordinates u = (x - low) / (high - low) in
[0, 1]: g_u = (dz/dx) * (high - low); u <- clip(u + eta_t * g_u / max_i |g_u,i|, 0, 1),
eta_t falling linearly from 0.1 to 0.001 over STEPS steps (the largest coordinate moves
eta_t of the box per step; plain projected ascent with a normalised step, so one rule
serves any scale). Gradients are exact (backpropagation in float64, derivative of relu
taken as 0 at 0). All weights and inputs are rounded to float32 first, so receptor sees the
same numbers.

Per model NAME the folder holds NAME.json (our schema "receptor-model/1") and
NAME_expected.json (per hidden layer and unit: the best z of the reference search and the
start it came from); per data set DATA, DATA_probe.csv holds its samples (float32, no
labels), for searches that use reference data; ledoit_wolf.json holds, per data set, the
mean, the Ledoit-Wolf covariance and shrinkage of sklearn.covariance.ledoit_wolf (the data
prior's covariance, O. Ledoit & M. Wolf 2004).
"""

import json
import platform
import sys
from pathlib import Path

import numpy as np
import scipy
import sklearn
from sklearn.covariance import ledoit_wolf
from sklearn.datasets import load_breast_cancer, load_digits, load_iris
from sklearn.neural_network import MLPClassifier
from sklearn.preprocessing import StandardScaler

OUT = Path(__file__).resolve().parent.parent / "tests" / "fixtures" / "prefer"

RESTARTS = 32
STEPS = 1000
ETA_START = 0.1
ETA_END = 0.001
SEED = 12


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


def act(name, z):
    return np.maximum(z, 0.0) if name == "relu" else np.tanh(z)


def dact(name, z):
    return (z > 0.0).astype(np.float64) if name == "relu" else 1.0 - np.tanh(z) ** 2


def z_and_grad(layers, acts, layer, unit, x):
    """z of `unit` of `layer` for every row of x [rows, inputs], and dz/dx [rows, inputs]."""
    zs = []
    a = x
    for l in range(layer):
        w, b = layers[l]
        z = a @ w.T + b
        zs.append(z)
        a = act(acts[l], z)
    w, b = layers[layer]
    z = a @ w[unit] + b[unit]
    if layer == 0:
        return z, np.tile(w[unit], (x.shape[0], 1))
    delta = w[unit][None, :] * dact(acts[layer - 1], zs[layer - 1])
    for l in range(layer - 1, 0, -1):
        delta = (delta @ layers[l][0]) * dact(acts[l - 1], zs[l - 1])
    return z, delta @ layers[0][0]


def reference_search(layers, acts, layer, unit, low, high, rng):
    width = high - low
    n = low.size
    u = rng.uniform(0.0, 1.0, size=(RESTARTS, n))
    best = np.full(RESTARTS, -np.inf)
    best_u = u.copy()
    for t in range(STEPS + 1):
        x = low + u * width
        z, g = z_and_grad(layers, acts, layer, unit, x)
        better = z > best
        best[better] = z[better]
        best_u[better] = u[better]
        if t == STEPS:
            break
        gu = g * width
        scale = np.max(np.abs(gu), axis=1, keepdims=True)
        scale[scale == 0.0] = 1.0
        eta = ETA_START + (ETA_END - ETA_START) * t / (STEPS - 1)
        u = np.clip(u + eta * gu / scale, 0.0, 1.0)
    r = int(np.argmax(best))
    return float(best[r]), r


def versions():
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scikit-learn": sklearn.__version__,
        "scipy": scipy.__version__,
    }


def data_sets():
    d = load_digits()
    x = f32(d.data)
    yield "digits", x, d.target, [str(c) for c in range(10)], np.zeros(64), np.full(64, 16.0), (32, 16)
    for name, loader in (("iris", load_iris), ("cancer", load_breast_cancer)):
        d = loader()
        x = f32(StandardScaler().fit_transform(d.data))
        classes = [str(c) for c in d.target_names]
        yield name, x, d.target, classes, x.min(axis=0), x.max(axis=0), (16, 8)


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)
    summary = []
    shrunk = {}
    for data_name, x, y, classes, low, high, hidden in data_sets():
        cov, shrinkage = ledoit_wolf(x)
        shrunk[data_name] = {
            "probe": f"{data_name}_probe.csv",
            "shrinkage": float(shrinkage),
            "mean": x.mean(axis=0).tolist(),
            "covariance": cov.tolist(),
        }
        for activation in ("relu", "tanh"):
            name = f"{data_name}_{activation}"
            clf = MLPClassifier(
                hidden_layer_sizes=hidden,
                activation=activation,
                solver="lbfgs",
                max_iter=2000,
                random_state=0,
            )
            clf.fit(x, y)
            layers = [(f32(c.T), f32(b)) for c, b in zip(clf.coefs_, clf.intercepts_)]
            low32, high32 = f32(low), f32(high)
            names = [f"h{i + 1}" for i in range(len(layers) - 1)] + ["out"]
            acts = [activation] * (len(layers) - 1)
            out_act = "softmax" if len(classes) > 2 else "sigmoid"
            model = {
                "schema": "receptor-model/1",
                "name": name,
                "description": f"{data_name} (as shipped with scikit-learn), MLPClassifier "
                f"{hidden} {activation}, lbfgs, random_state 0; reference fixture for "
                "tests/prefer_reference.rs.",
                "input": {
                    "size": int(x.shape[1]),
                    "layout": {"kind": "vector"},
                    "low": f32_json(low32),
                    "high": f32_json(high32),
                },
                "layers": [],
                "generator": "scripts/make_prefer_fixtures.py",
            }
            for i, (lname, (w, b)) in enumerate(zip(names, layers)):
                model["layers"].append(
                    {
                        "name": lname,
                        "type": "dense",
                        "activation": out_act if lname == "out" else activation,
                        "weights": f32_json(w),
                        "bias": f32_json(b),
                    }
                )
            with open(OUT / f"{name}.json", "w", encoding="utf-8") as fh:
                json.dump(model, fh)
                fh.write("\n")
            with open(OUT / f"{data_name}_probe.csv", "w", encoding="utf-8", newline="\n") as fh:
                fh.write(",".join(f"f{i}" for i in range(x.shape[1])) + "\n")
                for row in x:
                    fh.write(",".join(fmt32(v) for v in row) + "\n")
            units = []
            for layer in range(len(layers) - 1):
                for unit in range(layers[layer][0].shape[0]):
                    z, start = reference_search(layers, acts, layer, unit, low32, high32, rng)
                    units.append({"layer": names[layer], "unit": unit, "best_z": z, "start": start})
            expected = {
                "generator": "scripts/make_prefer_fixtures.py",
                "versions": versions(),
                "model": f"{name}.json",
                "probe": f"{data_name}_probe.csv",
                "restarts": RESTARTS,
                "steps": STEPS,
                "eta": [ETA_START, ETA_END],
                "seed": SEED,
                "units": units,
            }
            with open(OUT / f"{name}_expected.json", "w", encoding="utf-8") as fh:
                json.dump(expected, fh, indent=1)
                fh.write("\n")
            summary.append(f"{name}: {len(units)} hidden units, train accuracy {clf.score(x, y):.3f}")
    with open(OUT / "ledoit_wolf.json", "w", encoding="utf-8") as fh:
        json.dump({"generator": "scripts/make_prefer_fixtures.py",
                   "function": "sklearn.covariance.ledoit_wolf (assume_centered=False)",
                   "versions": versions(), "data": shrunk}, fh)
        fh.write("\n")
    with open(OUT / "VERSIONS.txt", "w", encoding="utf-8") as fh:
        fh.write("Generated by scripts/make_prefer_fixtures.py with:\n")
        for k, val in versions().items():
            fh.write(f"{k} {val}\n")
        fh.write(f"platform {platform.system()} {platform.machine()}\n")
    print("\n".join(summary))


if __name__ == "__main__":
    sys.exit(main())
