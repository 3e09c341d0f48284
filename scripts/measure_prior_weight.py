#!/usr/bin/env python3
"""Measure the data prior's effect on scikit-learn's digits to choose its default weight.

Runs `receptor prefer MODEL --layer out --all` on the digits MLP of the preferred-input
fixtures (tests/fixtures/prefer/digits_relu.json, written by make_prefer_fixtures.py) with
the prior fitted to the digits (tests/fixtures/prefer/digits_probe.csv) at several weights,
and without it, and reports per weight, over the ten class units:
  recognised  how many preferred inputs a 1-nearest-neighbour classifier trained on the
              digits (sklearn.neighbors.KNeighborsClassifier, Euclidean) assigns to the unit's
              own class;
  dist_ratio  the mean distance from a preferred input to its nearest real digit, divided by
              the mean distance from a real digit to its nearest other real digit (1 means
              "as close to the data as real digits are to each other");
  drive       the mean of z(with prior) / z(without prior): how much of the unit's drive is kept.

Usage (from the repository root, after `cargo build --release`):
    python3 scripts/measure_prior_weight.py target/release/receptor
Needs numpy and scikit-learn (the versions of make_prefer_fixtures.py).
"""

import csv
import io
import subprocess
import sys
from pathlib import Path

import numpy as np
from sklearn.datasets import load_digits
from sklearn.neighbors import KNeighborsClassifier, NearestNeighbors

ROOT = Path(__file__).resolve().parent.parent
FIX = ROOT / "tests" / "fixtures" / "prefer"
WEIGHTS = [0.1, 0.3, 1.0, 2.0, 3.0, 10.0]


def run(binary, extra):
    cmd = [binary, "prefer", str(FIX / "digits_relu.json"), "--layer", "out", "--all"] + extra
    out = subprocess.run(cmd, check=True, capture_output=True, text=True).stdout
    rows = list(csv.DictReader(io.StringIO(out)))
    z = np.array([float(r["preactivation"]) for r in rows])
    x = np.array([[float(r[f"x{i}"]) for i in range(64)] for r in rows])
    return z, x


def main():
    binary = sys.argv[1] if len(sys.argv) > 1 else str(ROOT / "target" / "release" / "receptor")
    d = load_digits()
    data = d.data.astype(np.float32).astype(np.float64)
    knn = KNeighborsClassifier(n_neighbors=1).fit(data, d.target)
    nn = NearestNeighbors(n_neighbors=2).fit(data)
    real = nn.kneighbors(data)[0][:, 1].mean()
    z0, x0 = run(binary, [])

    def report(label, z, x):
        pred = knn.predict(x)
        dist = nn.kneighbors(x, n_neighbors=1)[0][:, 0].mean()
        print(
            f"{label:>12}  recognised {int(np.sum(pred == np.arange(10))):2d}/10  "
            f"dist_ratio {dist / real:5.2f}  drive {np.mean(z / z0):5.3f}"
        )

    print(f"real digits: mean distance to the nearest other digit {real:.2f}")
    report("no prior", z0, x0)
    for w in WEIGHTS:
        z, x = run(binary, ["--prior", str(FIX / "digits_probe.csv"), "--prior-weight", str(w)])
        report(f"W = {w}", z, x)


if __name__ == "__main__":
    sys.exit(main())
