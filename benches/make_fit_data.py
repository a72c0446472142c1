#!/usr/bin/env python3
"""Seeded SYNTHETIC data for the single-tree fit benchmark (invented data, for timing only).

Usage: make_fit_data.py OUTDIR [ROWS]     (ROWS defaults to 100000)

Writes
  fit_classify.csv   ROWS rows, 20 numeric features f00..f19, target "outcome" = "yes"/"no"
  fit_regress.csv    ROWS rows, 20 numeric features f00..f19, target "outcome" = a real number

Generator: numpy.random.default_rng(SEED) with SEED = 20261203; one generator, the
classification set drawn first, then the regression set, so a given ROWS always gives the
same files. Features (both sets, drawn the same way):
  f00..f07  normal(0, 1)
  f08..f13  uniform(-3, 3)
  f14..f19  normal(0, 2)
The signal uses f00..f05 only; f06..f19 are pure noise features.
  classify: score = 1.5 f00 - f01 + 0.8 f02 f03 + sin(2 f04) + 0.5 |f05|
            outcome = "yes" when score + normal(0, 1) > 0.4, else "no"
            (the noise makes the labels overlap, so a full-depth tree is large)
  regress:  outcome = 2 f00 - 1.5 f01 + f02 f03 + 2 sin(f04) + 0.5 f05^2 + normal(0, 1)
Every feature value is rounded to 4 decimals (|value| < 100, so at most 6 significant
digits) and written in plain decimal notation; distinct decimals stay distinct after the
float32 cast both sides make, and both sides read this same file. Targets of the regression
set are rounded to 6 decimals.
"""
import os
import sys

import numpy as np

SEED = 20261203
N_FEATURES = 20
DEFAULT_ROWS = 100_000


def draw_features(rng, n):
    a = rng.normal(0.0, 1.0, size=(n, 8))
    b = rng.uniform(-3.0, 3.0, size=(n, 6))
    c = rng.normal(0.0, 2.0, size=(n, 6))
    X = np.hstack([a, b, c])
    # round to 4 decimals; "+ 0.0" turns -0.0 into 0.0 so no cell reads "-0.0000"
    return np.round(X, 4) + 0.0


def classify_set(rng, n):
    X = draw_features(rng, n)
    score = 1.5 * X[:, 0] - X[:, 1] + 0.8 * X[:, 2] * X[:, 3] + np.sin(2.0 * X[:, 4]) + 0.5 * np.abs(X[:, 5])
    y = score + rng.normal(0.0, 1.0, size=n) > 0.4
    return X, np.where(y, "yes", "no")


def regress_set(rng, n):
    X = draw_features(rng, n)
    y = (
        2.0 * X[:, 0]
        - 1.5 * X[:, 1]
        + X[:, 2] * X[:, 3]
        + 2.0 * np.sin(X[:, 4])
        + 0.5 * X[:, 5] ** 2
        + rng.normal(0.0, 1.0, size=n)
    )
    y = np.round(y, 6) + 0.0
    return X, np.array([f"{v:.6f}" for v in y])


def write_csv(path, X, y):
    names = [f"f{j:02d}" for j in range(X.shape[1])] + ["outcome"]
    with open(path, "w", newline="\n") as f:
        f.write(",".join(names) + "\n")
        for row, label in zip(X, y):
            f.write(",".join(f"{v:.4f}" for v in row) + "," + label + "\n")


def main():
    if len(sys.argv) not in (2, 3):
        print(__doc__, file=sys.stderr)
        sys.exit(2)
    out = sys.argv[1]
    n = int(sys.argv[2]) if len(sys.argv) == 3 else DEFAULT_ROWS
    if n < 2:
        sys.exit("ROWS must be at least 2")
    os.makedirs(out, exist_ok=True)
    rng = np.random.default_rng(SEED)
    X, y = classify_set(rng, n)
    write_csv(os.path.join(out, "fit_classify.csv"), X, y)
    X, y = regress_set(rng, n)
    write_csv(os.path.join(out, "fit_regress.csv"), X, y)
    print(f"wrote fit_classify.csv and fit_regress.csv ({n} rows x {N_FEATURES} features) to {out}")


if __name__ == "__main__":
    main()
