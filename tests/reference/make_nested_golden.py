#!/usr/bin/env python3
"""Golden nested cross-validation from scikit-learn for pollard's nested sweep check.

Usage: make_nested_golden.py [OUTDIR]   (default: tests/reference/golden)

The reference's own nested loop: for each outer split, GridSearchCV(refit=True) over the
grid below on the outer training rows, with the inner folds given as a PredefinedSplit, then
the refit best tree scored once on the outer validation rows. Outer and inner folds are the
ones pollard assigned: tests/reference/golden/nested_folds_<dataset>.csv, written by
`pollard folds --outer-k 5` (CSV outer_repeat,outer_fold,row,repeat,fold; rows from 1; fold
−2 marks the outer split's own validation rows). Writes OUTDIR/nested_<dataset>.json.

The loop runs once per random_state in RANDOM_STATES. An outer split is `comparable` when
every state picks the same setting and the picked trees predict exactly the same on the
outer validation rows in every state: then the reference's answer does not depend on how it
breaks ties between equal splits. Settings whose inner means tie exactly (as settings that
grow the same tree do) are picked first in grid order by GridSearchCV; the Rust side accepts
any of the tied settings and compares the outer score when it picked the same one.

Parameter names are pollard's in the JSON (see make_sweep_golden.py for the mapping). Output
bytes are deterministic: json.dumps(indent=1, sort_keys=True), floats in Python repr form.
"""
import csv
import hashlib
import itertools
import json
import os
import sys
import warnings

import numpy as np
import sklearn
from sklearn.model_selection import GridSearchCV, PredefinedSplit

from make_golden import read_csv
from make_sweep_golden import PINNED, RANDOM_STATES, SEED, log_loss_scorer, make_model, sklearn_params

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.normpath(os.path.join(HERE, "..", ".."))
DEFAULT_OUT = os.path.join(HERE, "golden")

# (name, data file, task, pollard metric, scorer, sign: stored value = sign * scorer value).
# Metrics whose values rarely tie between different trees, so most outer splits have a
# unique best setting.
DATASETS = [
    ("wine", "tests/data/wine.csv", "classify", "log_loss", log_loss_scorer, -1.0),
    ("iris", "tests/data/iris.csv", "classify", "log_loss", log_loss_scorer, -1.0),
    ("breast_cancer", "tests/data/breast_cancer.csv", "classify", "log_loss", log_loss_scorer, -1.0),
    ("diabetes", "tests/data/diabetes.csv", "regress", "rmse", "neg_root_mean_squared_error", -1.0),
]

# pollard's grid order: max_depth, then min_leaf_rows (the last varies fastest).
GRID = [
    ("max_depth", [1, 2, 3, 4, 6, None]),
    ("min_leaf_rows", [1, 5, 20]),
]


def read_nested_folds(path, n):
    """{(outer_repeat, outer_fold): array of inner folds per row (−2: outer validation)}."""
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    if rows[0] != ["outer_repeat", "outer_fold", "row", "repeat", "fold"]:
        raise SystemExit(f"{path}: header {rows[0]} is not outer_repeat,outer_fold,row,repeat,fold")
    out = {}
    for r in rows[1:]:
        o_rep, o_fold, row, rep, f = map(int, r)
        if rep != 0:
            raise SystemExit(f"{path}: only one inner repeat is expected")
        out.setdefault((o_rep, o_fold), np.full(n, -3, dtype=np.int64))[row - 1] = f
    for key, fold in out.items():
        if (fold == -3).any():
            raise SystemExit(f"{path}: outer split {key} misses rows")
    return out


def settings():
    names = [n for n, _ in GRID]
    return [dict(zip(names, values)) for values in itertools.product(*[v for _, v in GRID])]


def outer_split(task, scorer, sign, X, y, fold, grid, rs):
    train = np.flatnonzero(fold != -2)
    valid = np.flatnonzero(fold == -2)
    params = [{k: [v] for k, v in sklearn_params(g).items()} for g in grid]
    # The parameter list keeps pollard's grid order (a list of one-point grids is searched
    # in list order), so best_index_ is an index into `grid`.
    search = GridSearchCV(make_model(task, {}, rs), params, scoring=scorer, refit=True,
                          cv=PredefinedSplit(test_fold=fold[train]), error_score="raise")
    search.fit(X[train], y[train])
    means = [sign * float(v) for v in search.cv_results_["mean_test_score"]]
    best = int(search.best_index_)
    pred = (search.best_estimator_.predict_proba(X[valid]) if task == "classify"
            else search.best_estimator_.predict(X[valid]))
    # The scorer on the outer validation rows: exactly GridSearchCV's own score(...).
    outer = sign * float(search.score(X[valid], y[valid]))
    digest = hashlib.sha256(np.ascontiguousarray(pred).tobytes()).hexdigest()
    return {"best": best, "means": means, "outer": outer, "digest": digest}


def run_dataset(name, rel, task, metric, scorer, sign):
    _, X, y = read_csv(os.path.join(REPO, rel), task)
    folds_rel = f"tests/reference/golden/nested_folds_{name}.csv"
    nested = read_nested_folds(os.path.join(REPO, folds_rel), len(y))
    grid = settings()
    splits = []
    for (o_rep, o_fold), fold in sorted(nested.items()):
        states = [outer_split(task, scorer, sign, X, y, fold, grid, rs) for rs in RANDOM_STATES]
        first = states[0]
        comparable = all(s["best"] == first["best"] and s["digest"] == first["digest"]
                         for s in states)
        splits.append({
            "outer_repeat": o_rep,
            "outer_fold": o_fold,
            "comparable": comparable,
            "picked": grid[first["best"]],
            "inner_best": first["means"][first["best"]],
            "inner_means": first["means"],
            "outer_score": first["outer"],
        })
    return {
        "reference": f"scikit-learn {sklearn.__version__}",
        "dataset": name,
        "file": rel,
        "task": task,
        "metric": metric,
        "folds": {"file": folds_rel, "k": 5, "outer_k": 5, "seed": SEED},
        "grid": {n: v for n, v in GRID},
        "random_states": RANDOM_STATES,
        "outer_splits": splits,
    }


def main(outdir):
    if sklearn.__version__ != PINNED:
        raise SystemExit(f"scikit-learn {sklearn.__version__} installed, {PINNED} required")
    warnings.simplefilter("ignore")
    os.makedirs(outdir, exist_ok=True)
    for args in DATASETS:
        doc = run_dataset(*args)
        text = json.dumps(doc, indent=1, sort_keys=True, allow_nan=False) + "\n"
        with open(os.path.join(outdir, f"nested_{args[0]}.json"), "w", encoding="utf-8", newline="\n") as fh:
            fh.write(text)
        n = len(doc["outer_splits"])
        c = sum(s["comparable"] for s in doc["outer_splits"])
        print(f"nested_{args[0]}.json: {n} outer splits, {c} comparable, {len(text)} bytes")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else DEFAULT_OUT)
