#!/usr/bin/env python3
"""Golden feature importances from scikit-learn for pollard's importance checks.

Usage: make_importance_golden.py [OUTDIR]   (default: tests/reference/golden)

For every dataset and limit setting of make_golden.py it fits the reference tree
(random_state 0, the tree the tree golden files describe) on all rows and writes
OUTDIR/importance_<dataset>.json with, per case:

- "impurity": the tree's feature_importances_ (mean decrease in impurity);
- for the datasets in PERMUTED only, "permutation": the score of the tree on all
  rows ("base", the estimator's own score: accuracy or R^2), then per feature and
  shuffle the score with that feature's column replaced by X[order, j], where the
  orders are read from OUTDIR/permutations_<dataset>.csv -- written by pollard
  (tests/reference_tree.rs), so both sides score the very same shuffles and the
  Rust check can be exact ("by_hand"); and, for the spread check, what
  sklearn.inspection.permutation_importance itself reports with its own seeded
  shuffles (n_repeats = the repeats of the order file, random_state 0):
  importances_mean and importances_std ("reference").

Output bytes are deterministic: json.dumps(indent=1, sort_keys=True).
"""
import csv
import json
import os
import sys

import numpy as np
import sklearn
from sklearn.inspection import permutation_importance

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from make_golden import DATASETS, DEFAULT_OUT, PINNED, REPO, make_model, read_csv, settings  # noqa: E402

PERMUTED = ("iris", "wine", "diabetes")


def read_orders(path):
    """feature,repeat,rows (space-separated row order) -> {feature: [orders by repeat]}."""
    out = {}
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == ["feature", "repeat", "rows"], rows[0]
    for f, r, order in rows[1:]:
        reps = out.setdefault(int(f), [])
        assert int(r) == len(reps)
        reps.append(np.array([int(x) for x in order.split()], dtype=np.int64))
    return out


def permuted(model, X, y, orders):
    base = float(model.score(X, y))
    scores = []
    for j in range(X.shape[1]):
        per = []
        for order in orders[j]:
            Xp = X.copy()
            Xp[:, j] = X[order, j]
            per.append(float(model.score(Xp, y)))
        scores.append(per)
    n_repeats = len(orders[0])
    ref = permutation_importance(model, X, y, n_repeats=n_repeats, random_state=0)
    return {
        "base": base,
        "by_hand": scores,
        "repeats": n_repeats,
        "reference": {"mean": [float(v) for v in ref.importances_mean],
                      "std": [float(v) for v in ref.importances_std]},
    }


def main(outdir):
    if sklearn.__version__ != PINNED:
        raise SystemExit(f"scikit-learn {sklearn.__version__} installed, {PINNED} required")
    for name, rel, task in DATASETS:
        features, X, y = read_csv(os.path.join(REPO, rel), task)
        orders = None
        if name in PERMUTED:
            orders = read_orders(os.path.join(outdir, f"permutations_{name}.csv"))
        cases = []
        for suffix, kw in settings(task, y):
            model = make_model(task, kw, 0).fit(X, y)
            case = {"name": f"{name}_{suffix}",
                    "impurity": [float(v) for v in model.feature_importances_]}
            if orders is not None:
                case["permutation"] = permuted(model, X, y, orders)
            cases.append(case)
        doc = {"dataset": name, "features": features, "sklearn": sklearn.__version__, "cases": cases}
        text = json.dumps(doc, indent=1, sort_keys=True, allow_nan=False) + "\n"
        with open(os.path.join(outdir, f"importance_{name}.json"), "w", encoding="utf-8",
                  newline="\n") as fh:
            fh.write(text)
        print(f"importance_{name}.json: {len(cases)} cases, {len(text)} bytes")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else DEFAULT_OUT)
