#!/usr/bin/env python3
"""Seeded SYNTHETIC test sets with missing values (invented data, for testing only).

Usage: make_synthetic.py [OUTDIR]   (default: tests/data next to this folder)

Writes
  synthetic_missing.csv      600 rows, 6 numeric features, target "yes"/"no"
  synthetic_missing_reg.csv  500 rows, 6 numeric features, numeric target

Generator: numpy.random.default_rng(20261202); one generator, the classification
set drawn first, then the regression set. Features:
  grade     integers 0..4            (few distinct values)   -- has missing cells
  flag      0 / 1                    (two values)
  x_norm    normal(0, 1)             (continuous)            -- has missing cells
  x_unif    uniform(0, 10)           (continuous)
  x_skew    gamma(2, 1.5)            (continuous, skewed)    -- has missing cells
  n_events  poisson(2), capped at 8  (few distinct values)
Missing cells (empty CSV cells) appear in grade, x_norm and x_skew:
  x_norm  ~12 % completely at random;
  grade   missing more often when the target is high ("yes" / large y): informative;
  x_skew  missing more often when x_unif is large (depends on another feature).
Every number is rounded to 3 decimals before it is written with repr(float), so
distinct values stay distinct after a float32 cast (all |values| < 100).
"""
import csv
import os
import sys

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
DEFAULT_OUT = os.path.normpath(os.path.join(HERE, "..", "data"))
SEED = 20261202
FEATURES = ["grade", "flag", "x_norm", "x_unif", "x_skew", "n_events"]


def draw_features(rng, n):
    grade = rng.integers(0, 5, size=n).astype(float)
    flag = rng.integers(0, 2, size=n).astype(float)
    x_norm = rng.normal(0.0, 1.0, size=n)
    x_unif = rng.uniform(0.0, 10.0, size=n)
    x_skew = rng.gamma(2.0, 1.5, size=n)
    n_events = np.minimum(rng.poisson(2.0, size=n), 8).astype(float)
    return np.column_stack([grade, flag, x_norm, x_unif, x_skew, n_events])


def add_missing(rng, X, high):
    """high: boolean array, the rows whose target is 'high' (informative missingness)."""
    n = X.shape[0]
    X = X.copy()
    u = rng.uniform(size=(n, 3))
    # x_norm: completely at random
    X[u[:, 0] < 0.12, 2] = np.nan
    # grade: 22 % of high-target rows, 6 % of the others
    X[u[:, 1] < np.where(high, 0.22, 0.06), 0] = np.nan
    # x_skew: depends on x_unif (observed, never missing): 4 % .. 30 %
    p = 0.04 + 0.026 * X[:, 3]
    X[u[:, 2] < p, 4] = np.nan
    return X


def make_classify(rng, n=600):
    X = draw_features(rng, n)
    grade, flag, x_norm, x_unif, x_skew, n_events = X.T
    signal = (1.3 * x_norm + 0.7 * (grade - 2.0) + 1.0 * (x_unif > 6.0)
              - 0.8 * flag + 0.25 * (x_skew - 3.0) - 0.3)
    noise = rng.logistic(0.0, 1.0, size=n)
    yes = signal + noise > 0.0
    Xm = add_missing(rng, X, yes)
    labels = np.where(yes, "yes", "no")
    return Xm, labels


def make_regress(rng, n=500):
    X = draw_features(rng, n)
    grade, flag, x_norm, x_unif, x_skew, n_events = X.T
    y = (10.0 + 3.0 * x_norm + 2.0 * grade + 4.0 * (x_unif > 6.0)
         + 1.5 * flag * x_norm + 0.5 * n_events + rng.normal(0.0, 1.5, size=n))
    y = np.round(y, 3)
    high = y > np.median(y)
    Xm = add_missing(rng, X, high)
    return Xm, y


def cell(v):
    if np.isnan(v):
        return ""
    return repr(float(np.round(v, 3)))


def write(path, X, y, numeric_target):
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(FEATURES + ["target"])
        for i in range(X.shape[0]):
            t = repr(float(y[i])) if numeric_target else str(y[i])
            w.writerow([cell(v) for v in X[i]] + [t])
    miss = np.isnan(X).mean(axis=0)
    desc = ", ".join(f"{f} {m:.1%}" for f, m in zip(FEATURES, miss) if m > 0)
    print(f"{path}: {X.shape[0]} rows, {X.shape[1]} features + target; missing: {desc}")


def main(outdir):
    os.makedirs(outdir, exist_ok=True)
    rng = np.random.default_rng(SEED)
    Xc, yc = make_classify(rng)
    Xr, yr = make_regress(rng)
    # round before writing so the CSV is the data (cell() rounds again, harmlessly)
    Xc = np.round(Xc, 3)
    Xr = np.round(Xr, 3)
    write(os.path.join(outdir, "synthetic_missing.csv"), Xc, yc, False)
    write(os.path.join(outdir, "synthetic_missing_reg.csv"), Xr, yr, True)
    print(f"classification: {int((yc == 'yes').sum())} yes / {int((yc == 'no').sum())} no")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else DEFAULT_OUT)
