#!/usr/bin/env python3
"""Golden cross-validated scores from scikit-learn for pollard's sweep checks.

Usage: make_sweep_golden.py [OUTDIR]   (default: tests/reference/golden)

For each dataset, reads the committed CSV in tests/data with the csv module only (as
make_golden.py does) and the fold assignment pollard wrote to
tests/reference/golden/folds_<dataset>.csv (`pollard folds`, CSV row,repeat,fold, rows from
1). Those folds are given to the reference as PredefinedSplit(test_fold=fold), so both sides
score the same splits, and cross_validate(..., return_train_score=True) scores a grid of
limit settings with every metric pollard offers for the task. Writes
OUTDIR/sweep_<dataset>.json and prints a summary.

Inside this script scikit-learn is called with its own parameter names; the JSON it writes
uses pollard's names (VOCABULARY.md):
  max_depth -> max_depth, min_samples_split -> min_split_rows,
  min_samples_leaf -> min_leaf_rows, max_leaf_nodes -> max_leaves,
  min_impurity_decrease -> min_gain, ccp_alpha -> prune_alpha.
Metric names are pollard's too; the scorer behind each is in METRICS below. Losses are
stored as plain positive values (the reference's scorers negate them; undone here).

Output bytes are deterministic: json.dumps(indent=1, sort_keys=True), floats in Python repr
form, NaN written as null.
"""
import csv
import hashlib
import itertools
import json
import math
import multiprocessing
import os
import sys
import time
import warnings

import numpy as np
import sklearn
from sklearn.metrics import (accuracy_score, balanced_accuracy_score, brier_score_loss,
                             f1_score, log_loss, make_scorer, mean_absolute_error, r2_score,
                             roc_auc_score, root_mean_squared_error)
from sklearn.model_selection import PredefinedSplit, cross_validate
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

# The CSV reading rules are the single-tree golden script's (this folder is on sys.path
# when the script runs).
from make_golden import read_csv

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.normpath(os.path.join(HERE, "..", ".."))
DEFAULT_OUT = os.path.join(HERE, "golden")
RANDOM_STATES = [0, 1, 2, 3, 4]
PINNED = "1.9.1"
SEED = 20261202
K = 5

# (name, data file, task, fold scheme pollard used to write folds_<name>.csv)
DATASETS = [
    ("iris", "tests/data/iris.csv", "classify", "stratified"),
    ("wine", "tests/data/wine.csv", "classify", "stratified"),
    ("breast_cancer", "tests/data/breast_cancer.csv", "classify", "stratified"),
    ("diabetes", "tests/data/diabetes.csv", "regress", "shuffled"),
]

# The grid, in pollard's names and pollard's grid order (max_depth, min_split_rows,
# min_leaf_rows, max_leaves, min_gain, prune_alpha; the last varies fastest).
GRID_CLASSIFY = [
    ("max_depth", [1, 2, 3, 4, 6, None]),
    ("min_split_rows", [2, 10, 30]),
    ("min_leaf_rows", [1, 5]),
    ("max_leaves", [None, 8]),
    ("min_gain", [0.0]),
    ("prune_alpha", [0.0, 0.01]),
]
# Regression impurity is in squared target units (diabetes: variance about 5,930), so the
# non-zero prune_alpha is 30.0 rather than 0.01.
GRID_REGRESS = GRID_CLASSIFY[:-1] + [("prune_alpha", [0.0, 30.0])]

# pollard limit name -> scikit-learn parameter name
SKLEARN_NAME = {
    "max_depth": "max_depth",
    "min_split_rows": "min_samples_split",
    "min_leaf_rows": "min_samples_leaf",
    "max_leaves": "max_leaf_nodes",
    "min_gain": "min_impurity_decrease",
    "prune_alpha": "ccp_alpha",
}

# pollard clips probabilities to [1e-15, 1 - 1e-15] before the logarithm; the reference's
# log_loss clips at machine epsilon (2.2e-16) only. So the scorer clips to pollard's bounds
# first and then calls the reference's log_loss (whose own clip is then a no-op).
LOG_LOSS_CLIP = 1e-15


def clipped_log_loss(y_true, y_proba, labels):
    return log_loss(y_true, y_proba=np.clip(y_proba, LOG_LOSS_CLIP, 1 - LOG_LOSS_CLIP),
                    labels=labels)


def log_loss_scorer(estimator, X, y):
    """Scorer on the full predict_proba matrix. A make_scorer scorer hands a binary metric
    the class-1 column only and log_loss rebuilds class 0 as 1 - p1; after the clip that is
    1 - (1 - 1e-15) = 9.99e-16, not pollard's 1e-15 (34.5396 instead of 34.5388 per such row)."""
    return -clipped_log_loss(y, estimator.predict_proba(X), list(estimator.classes_))


def metrics_for(task, classes):
    """[(pollard metric name, scorer, sign)]: stored value = sign * scorer value."""
    if task == "regress":
        return [
            ("rmse", "neg_root_mean_squared_error", -1.0),
            ("mae", "neg_mean_absolute_error", -1.0),
            ("r2", "r2", 1.0),
        ]
    binary = len(classes) == 2
    # brier_score_loss with its default scale_by_half="auto": halved for 2 classes, i.e.
    # (p_1 - y)^2 on the class-1 probability, and the full sum over classes for 3 or more.
    # Both are pollard's definition.
    if binary:
        brier = make_scorer(brier_score_loss, greater_is_better=False,
                            response_method="predict_proba", pos_label=classes[1])
    else:
        brier = make_scorer(brier_score_loss, greater_is_better=False,
                            response_method="predict_proba", labels=classes)
    return [
        ("accuracy", "accuracy", 1.0),
        ("balanced_accuracy", "balanced_accuracy", 1.0),
        ("macro_f1", "f1_macro", 1.0),
        ("log_loss", log_loss_scorer, -1.0),
        ("brier", brier, -1.0),
        # Binary: area on the class-1 probability (the estimator has no decision_function).
        # 3+ classes: one-vs-rest, macro mean over classes.
        ("roc_auc", "roc_auc" if binary else "roc_auc_ovr", 1.0),
    ]


def read_folds(path, n):
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    if rows[0] != ["row", "repeat", "fold"]:
        raise SystemExit(f"{path}: header {rows[0]} is not row,repeat,fold")
    fold = np.full(n, -2, dtype=np.int64)
    for r in rows[1:]:
        row, rep, f = int(r[0]), int(r[1]), int(r[2])
        if rep != 0:
            raise SystemExit(f"{path}: only one repeat is expected")
        fold[row - 1] = f
    if (fold < 0).any() or sorted(set(fold.tolist())) != list(range(K)):
        raise SystemExit(f"{path}: every row needs a fold in 0..{K - 1}")
    return fold


def grid_settings(task):
    grid = GRID_CLASSIFY if task == "classify" else GRID_REGRESS
    names = [n for n, _ in grid]
    for values in itertools.product(*[v for _, v in grid]):
        limits = dict(zip(names, values))
        limits["min_gain"] = float(limits["min_gain"])
        limits["prune_alpha"] = float(limits["prune_alpha"])
        yield limits


def sklearn_params(limits):
    return {SKLEARN_NAME[k]: v for k, v in limits.items()}


def make_model(task, limits, rs):
    cls = DecisionTreeClassifier if task == "classify" else DecisionTreeRegressor
    return cls(random_state=rs, **sklearn_params(limits))


def fnum(v):
    v = float(v)
    return None if math.isnan(v) else v


def fold_scores(task, limits, rs, X, y, cv, metrics, train):
    """{metric: {"test": [per fold], "train": [per fold]}} for one random_state ("train"
    only when asked)."""
    res = cross_validate(make_model(task, limits, rs), X, y, cv=cv,
                         scoring={name: sc for name, sc, _ in metrics},
                         return_train_score=train, error_score="raise")
    sides = ("test", "train") if train else ("test",)
    return {name: {side: [sign * float(v) for v in res[f"{side}_{name}"]] for side in sides}
            for name, _, sign in metrics}


def fold_predictions(task, limits, rs, X, y, fold):
    """Per fold, the fitted tree's predictions on every row (its training and test rows):
    class probabilities (classify) or values (regress)."""
    out = []
    for f in range(K):
        train = fold != f
        m = make_model(task, limits, rs).fit(X[train], y[train])
        out.append(m.predict_proba(X) if task == "classify" else m.predict(X))
    return out


def predict_setting(job):
    """Per random_state, a digest of the setting's predictions on every row of every fold
    (its training and test rows)."""
    task, limits, X, y, fold = job
    keys = []
    for rs in RANDOM_STATES:
        pred = fold_predictions(task, limits, rs, X, y, fold)
        keys.append(hashlib.sha256(b"".join(np.ascontiguousarray(a).tobytes()
                                            for a in pred)).hexdigest())
    return keys


def score_setting(job):
    task, limits, rs, X, y, fold, classes, train = job
    warnings.simplefilter("ignore")
    return fold_scores(task, limits, rs, X, y, PredefinedSplit(test_fold=fold),
                       metrics_for(task, classes), train)


def pool_map(fn, jobs):
    return list(POOL.imap(fn, jobs, chunksize=2)) if POOL else [fn(j) for j in jobs]


def as_json_scores(scores):
    return {m: {s: [fnum(v) for v in vs] for s, vs in sides.items()}
            for m, sides in scores.items()}


def prediction_check(task, classes, X, y, fold):
    """One setting's per-fold test predictions (random_state 0) and the reference's metric
    values on exactly those predictions."""
    limits = {"max_depth": 3, "min_split_rows": 2, "min_leaf_rows": 1, "max_leaves": None,
              "min_gain": 0.0, "prune_alpha": 0.0}
    out = []
    for f in range(K):
        test = np.flatnonzero(fold == f)
        train = np.flatnonzero(fold != f)
        m = make_model(task, limits, 0).fit(X[train], y[train])
        yt = y[test]
        entry = {"fold": f, "rows": [int(i) + 1 for i in test]}
        if task == "classify":
            if list(m.classes_) != list(classes):
                raise SystemExit(f"classes_ {m.classes_} != {classes}")
            p = m.predict_proba(X[test])
            pred = m.predict(X[test])
            entry["truth"] = [str(v) for v in yt]
            entry["proba"] = [[float(v) for v in row] for row in p]
            values = {
                "accuracy": accuracy_score(yt, pred),
                "balanced_accuracy": balanced_accuracy_score(yt, pred),
                "macro_f1": f1_score(yt, pred, average="macro"),
                "log_loss": clipped_log_loss(yt, p, classes),
                "brier": (brier_score_loss(yt, p[:, 1], pos_label=classes[1])
                          if len(classes) == 2 else brier_score_loss(yt, p, labels=classes)),
                "roc_auc": (roc_auc_score(yt, p[:, 1]) if len(classes) == 2
                            else roc_auc_score(yt, p, multi_class="ovr", labels=classes)),
            }
        else:
            pred = m.predict(X[test])
            entry["truth"] = [float(v) for v in yt]
            entry["predictions"] = [float(v) for v in pred]
            values = {
                "rmse": root_mean_squared_error(yt, pred),
                "mae": mean_absolute_error(yt, pred),
                "r2": r2_score(yt, pred),
            }
        entry["metrics"] = {k: fnum(v) for k, v in values.items()}
        out.append(entry)
    return {"limits": limits, "random_state": 0, "folds": out}


def run_dataset(name, rel, task, scheme):
    features, X, y = read_csv(os.path.join(REPO, rel), task)
    folds_rel = f"tests/reference/golden/folds_{name}.csv"
    fold = read_folds(os.path.join(REPO, folds_rel), len(y))
    classes = [str(c) for c in np.unique(y)] if task == "classify" else None
    metrics = metrics_for(task, classes)
    grid_limits = list(grid_settings(task))
    keys = pool_map(predict_setting, [(task, lim, X, y, fold) for lim in grid_limits])
    # Each metric is a function of the truth and the predictions only, so (setting, state)
    # pairs whose trees predict exactly the same on every row of every fold get the same
    # scores from any scorer: cross_validate runs once per distinct prediction set (the first
    # pair with it, settings in grid order, states ascending) and its scores serve all.
    # Training scores are recorded for random_state 0 only, so only prediction sets that
    # some setting has at random_state 0 are scored on the training rows too.
    with_train = {ks[0] for ks in keys}
    first = {}
    for i, ks in enumerate(keys):
        for rs, key in zip(RANDOM_STATES, ks):
            first.setdefault(key, (i, rs))
    distinct = sorted(first.values())
    scored = dict(zip(distinct, pool_map(
        score_setting, [(task, grid_limits[i], rs, X, y, fold, classes, keys[i][rs] in with_train)
                        for i, rs in distinct])))
    by_key = {key: scored[at] for key, at in first.items()}
    settings = []
    for lim, ks in zip(grid_limits, keys):
        states = [by_key[key] for key in ks]
        settings.append({
            "limits": lim,
            # tie_free: every state predicts exactly the same on every fold's training and
            # test rows, so every per-fold test and train score is identical across the
            # states too (stricter than equal scores, which different predictions can give).
            "tie_free": all(key == ks[0] for key in ks),
            "scores": as_json_scores(states[0]),
            # Per metric, the mean test score over the folds of each state (the spread the
            # reference's own tie-breaking gives).
            "test_mean_by_state": {m: [fnum(np.mean(st[m]["test"])) for st in states]
                                   for m in states[0]},
        })
    grid = GRID_CLASSIFY if task == "classify" else GRID_REGRESS
    doc = {
        "reference": f"scikit-learn {sklearn.__version__}",
        "dataset": name,
        "file": rel,
        "target": "target",
        "task": task,
        "features": features,
        "folds": {"file": folds_rel, "scheme": scheme, "k": K, "repeats": 1, "seed": SEED},
        "grid": {n: v for n, v in grid},
        "metrics": [m for m, _, _ in metrics],
        "random_states": RANDOM_STATES,
        "cross_validate_runs": len(distinct),
        "settings": settings,
        "predictions": prediction_check(task, classes, X, y, fold),
    }
    if task == "classify":
        doc["classes"] = classes
    return doc


# Settings are independent, so they are scored on a small process pool (results kept in grid
# order, so the output does not depend on it); POLLARD_REF_JOBS=1 runs in this process.
POOL = None


def main(outdir):
    global POOL
    if sklearn.__version__ != PINNED:
        raise SystemExit(f"scikit-learn {sklearn.__version__} installed, {PINNED} required")
    # Warnings (e.g. a fold where a class is never predicted) do not change the values.
    warnings.simplefilter("ignore")
    os.makedirs(outdir, exist_ok=True)
    jobs = int(os.environ.get("POLLARD_REF_JOBS", min(2, os.cpu_count() or 1)))
    if jobs > 1:
        POOL = multiprocessing.get_context("fork").Pool(jobs)
    total = total_tf = 0
    for name, rel, task, scheme in DATASETS:
        t0 = time.perf_counter()
        doc = run_dataset(name, rel, task, scheme)
        text = json.dumps(doc, indent=1, sort_keys=True, allow_nan=False) + "\n"
        with open(os.path.join(outdir, f"sweep_{name}.json"), "w", encoding="utf-8",
                  newline="\n") as fh:
            fh.write(text)
        n = len(doc["settings"])
        tf = sum(s["tie_free"] for s in doc["settings"])
        total += n
        total_tf += tf
        print(f"sweep_{name}.json: {n} settings, {tf} tie-free, {len(doc['metrics'])} metrics, "
              f"{doc['cross_validate_runs']} cross_validate runs, {len(text)} bytes, "
              f"{time.perf_counter() - t0:.1f} s")
    print(f"total: {total} settings, {total_tf} tie-free")
    if POOL:
        POOL.close()
        POOL.join()


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else DEFAULT_OUT)
