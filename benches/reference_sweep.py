#!/usr/bin/env python3
"""Reference side of the sweep benchmark: times the pinned scikit-learn's grid search
(tests/reference/requirements.txt) over a grid of tree limits, on a CSV made by
make_fit_data.py, with the folds pollard assigned (the file `pollard folds` prints).

Usage: reference_sweep.py CSV FOLDS OUT [LIMIT=V,V,..]... [sample=FRACTION] [sample_seed=N]

LIMIT and its values are written as for benches/sweep.rs (pollard's names; `none` = no
limit), so both sides read the grid from the same words:
  max_depth -> max_depth, min_split_rows -> min_samples_split,
  min_leaf_rows -> min_samples_leaf, max_leaves -> max_leaf_nodes.
A limit not given keeps the reference's default (the same as pollard's default).

The grid is expanded in pollard's grid order (max_depth, min_split_rows, min_leaf_rows,
max_leaves, the last varying fastest). With sample=F (0 < F < 1) a seeded sample of
round(F * settings) settings (numpy.random.default_rng(sample_seed), default seed 0, without
replacement, kept in grid order) is run instead of the whole grid; each sampled setting
becomes a one-point grid of its own in the list handed to GridSearchCV.

FOLDS is the CSV `row,repeat,fold` (rows from 1, repeat 0) and becomes a PredefinedSplit, so
the reference validates on exactly pollard's folds. The searcher is
GridSearchCV(DecisionTreeClassifier(random_state=0), grid, scoring="accuracy",
cv=PredefinedSplit(folds), n_jobs=2, refit=False). Features are read as float64 and cast to
float32 before the clock starts (the reference fits on float32 anyway); only the `fit` call of
the searcher is timed.

Writes every run setting's limits and mean validation accuracy (mean_test_score) to OUT, one
JSON object per line with pollard's names, and prints one JSON line:
  {"side": "reference", "rows", "features", "folds", "grid_settings", "settings_run",
   "sample_fraction", "sample_seed", "seconds", "n_jobs", "library"}
"""
import csv
import itertools
import json
import sys
import time

import numpy as np
import sklearn
from sklearn.model_selection import GridSearchCV, PredefinedSplit
from sklearn.tree import DecisionTreeClassifier

TARGET = "outcome"
N_JOBS = 2
# pollard's limit name -> the reference's parameter name, in pollard's grid order.
NAMES = [
    ("max_depth", "max_depth"),
    ("min_split_rows", "min_samples_split"),
    ("min_leaf_rows", "min_samples_leaf"),
    ("max_leaves", "max_leaf_nodes"),
]
DEFAULTS = {"max_depth": [None], "min_split_rows": [2], "min_leaf_rows": [1], "max_leaves": [None]}


def read(path):
    with open(path, newline="") as f:
        reader = csv.reader(f)
        header = next(reader)
        t = header.index(TARGET)
        rows = [r for r in reader if r]
    X = np.array([[float(v) for i, v in enumerate(r) if i != t] for r in rows], dtype=np.float64)
    X = np.ascontiguousarray(X.astype(np.float32))
    y = np.array([r[t] for r in rows])
    return X, y


def read_folds(path, n):
    folds = []
    with open(path, newline="") as f:
        reader = csv.reader(f)
        if next(reader) != ["row", "repeat", "fold"]:
            sys.exit(f"{path}: header must be row,repeat,fold")
        for i, (row, repeat, fold) in enumerate(reader):
            if int(row) != i + 1 or int(repeat) != 0:
                sys.exit(f"{path}: expected row {i + 1} of repeat 0, got {row},{repeat}")
            folds.append(int(fold))
    if len(folds) != n:
        sys.exit(f"{path}: {len(folds)} rows, the data has {n}")
    return np.array(folds)


def parse_values(name, text):
    out = []
    for part in text.split(","):
        part = part.strip()
        out.append(None if part.lower() == "none" else int(part))
    return out


def main():
    if len(sys.argv) < 4:
        print(__doc__, file=sys.stderr)
        sys.exit(2)
    path, folds_path, out_path = sys.argv[1:4]
    grid = dict(DEFAULTS)
    sample, sample_seed = None, 0
    for a in sys.argv[4:]:
        name, _, value = a.partition("=")
        if name in grid:
            grid[name] = parse_values(name, value)
        elif name == "sample":
            sample = float(value)
        elif name == "sample_seed":
            sample_seed = int(value)
        else:
            sys.exit(f"unknown argument {a!r}\n{__doc__}")

    X, y = read(path)
    folds = read_folds(folds_path, len(y))
    settings = list(itertools.product(*(grid[p] for p, _ in NAMES)))
    if sample is not None:
        if not 0.0 < sample < 1.0:
            sys.exit("sample must be a fraction between 0 and 1")
        m = max(1, round(sample * len(settings)))
        picked = np.sort(np.random.default_rng(sample_seed).choice(len(settings), size=m, replace=False))
        run = [settings[i] for i in picked]
    else:
        run = settings
    # One one-point grid per setting: the searcher runs exactly these, in this order.
    param_grid = [{r: [v] for (_, r), v in zip(NAMES, s)} for s in run]
    search = GridSearchCV(
        DecisionTreeClassifier(random_state=0),
        param_grid,
        scoring="accuracy",
        cv=PredefinedSplit(folds),
        n_jobs=N_JOBS,
        refit=False,
    )
    start = time.perf_counter()
    search.fit(X, y)
    seconds = time.perf_counter() - start

    res = search.cv_results_
    with open(out_path, "w") as f:
        for i, params in enumerate(res["params"]):
            row = {p: params[r] for p, r in NAMES}
            row = {p: (None if v is None else int(v)) for p, v in row.items()}
            row["valid_mean"] = float(res["mean_test_score"][i])
            f.write(json.dumps(row) + "\n")
    print(
        json.dumps(
            {
                "side": "reference",
                "rows": int(X.shape[0]),
                "features": int(X.shape[1]),
                "folds": int(PredefinedSplit(folds).get_n_splits()),
                "grid_settings": len(settings),
                "settings_run": len(run),
                "sample_fraction": sample,
                "sample_seed": sample_seed if sample is not None else None,
                "seconds": seconds,
                "n_jobs": N_JOBS,
                "library": f"scikit-learn {sklearn.__version__}",
            }
        )
    )


if __name__ == "__main__":
    main()
