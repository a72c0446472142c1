#!/usr/bin/env python3
"""Golden reference trees from scikit-learn for pollard's tree-engine checks.

Usage: make_golden.py [OUTDIR]   (default: tests/reference/golden)

Reads the committed CSV files in tests/data with the csv module only (an empty
cell is NaN; features parsed as float64, scikit-learn casts them to float32
itself), fits DecisionTreeClassifier / DecisionTreeRegressor for a list of
limit settings per dataset, and writes OUTDIR/tree_<dataset>.json. The same
settings under monotone limits (monotonic_cst; regress and two-class datasets,
a few features limited each way) go to OUTDIR/monotone_<dataset>.json, each
case with a "monotone" list (+1 / -1 / 0 per feature).

Inside this script scikit-learn is called with its own parameter names; the
JSON it writes uses pollard's names (VOCABULARY.md):
  max_depth -> max_depth, min_samples_split -> min_split_rows,
  min_samples_leaf -> min_leaf_rows, max_leaf_nodes -> max_leaves,
  min_impurity_decrease -> min_gain, ccp_alpha -> prune_alpha.

Output bytes are deterministic: json.dumps(indent=1, sort_keys=True), floats
in Python repr form, no NaN (allow_nan=False makes that an error).
"""
import csv
import json
import math
import os
import sys

import numpy as np
import sklearn
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.normpath(os.path.join(HERE, "..", ".."))
DEFAULT_OUT = os.path.join(HERE, "golden")
RANDOM_STATES = [0, 1, 2, 3, 4]
PINNED = "1.9.1"

DATASETS = [
    ("iris", "tests/data/iris.csv", "classify"),
    ("wine", "tests/data/wine.csv", "classify"),
    ("breast_cancer", "tests/data/breast_cancer.csv", "classify"),
    ("synthetic_missing", "tests/data/synthetic_missing.csv", "classify"),
    ("diabetes", "tests/data/diabetes.csv", "regress"),
    ("synthetic_missing_reg", "tests/data/synthetic_missing_reg.csv", "regress"),
]


def read_csv(path, task):
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    header, body = rows[0], rows[1:]
    ti = header.index("target")
    features = [h for i, h in enumerate(header) if i != ti]
    X = np.array([[float(c) if c != "" else math.nan
                   for i, c in enumerate(r) if i != ti] for r in body], dtype=np.float64)
    if task == "classify":
        y = np.array([r[ti] for r in body], dtype=object).astype(str)
    else:
        y = np.array([float(r[ti]) for r in body], dtype=np.float64)
    return features, X, y


def sig3(v):
    """Round to 3 significant digits so derived limits are clean constants."""
    return float(f"{v:.3g}")


def settings(task, y):
    """(suffix, sklearn keyword arguments) in a fixed order."""
    if task == "classify":
        gain, a_lo, a_hi = 0.01, 0.005, 0.02
    else:
        var = float(np.var(y))
        gain, a_lo, a_hi = sig3(0.005 * var), sig3(0.005 * var), sig3(0.02 * var)
    s = [
        ("full", {}),
        ("depth1", {"max_depth": 1}),
        ("depth2", {"max_depth": 2}),
        ("depth3", {"max_depth": 3}),
        ("depth5", {"max_depth": 5}),
        ("split10", {"min_samples_split": 10}),
        ("split40", {"min_samples_split": 40}),
        ("leaf5", {"min_samples_leaf": 5}),
        ("leaf20", {"min_samples_leaf": 20}),
        ("leaves4", {"max_leaf_nodes": 4}),
        ("leaves8", {"max_leaf_nodes": 8}),
        ("leaves16", {"max_leaf_nodes": 16}),
        ("leaves8_depth3", {"max_leaf_nodes": 8, "max_depth": 3}),
        ("gain", {"min_impurity_decrease": gain}),
        ("alpha_lo", {"ccp_alpha": a_lo}),
        ("alpha_hi", {"ccp_alpha": a_hi}),
    ]
    if task == "classify":
        s += [
            ("balanced", {"class_weight": "balanced"}),
            ("balanced_depth3", {"class_weight": "balanced", "max_depth": 3}),
            ("entropy", {"criterion": "entropy"}),
            ("entropy_depth3", {"criterion": "entropy", "max_depth": 3}),
        ]
    s += [
        ("depth5_leaf5", {"max_depth": 5, "min_samples_leaf": 5}),
        ("leaves16_split20_alpha_lo", {"max_leaf_nodes": 16, "min_samples_split": 20,
                                       "ccp_alpha": a_lo}),
    ]
    return s


# Monotone limits per dataset: named sets of feature -> +1 (the prediction, or the
# probability of the class at index 1, never falls as the feature grows) / -1.
# Some go with the data's trend, some against it, so both kinds of constrained
# splits (and rejected ones) occur.
MONOTONE = {
    "diabetes": [("up", {"bmi": 1, "bp": 1, "s5": 1, "s3": -1}), ("against", {"bmi": -1, "s4": 1})],
    "breast_cancer": [("up", {"mean_radius": 1, "worst_concave_points": 1, "worst_texture": 1}),
                      ("against", {"worst_perimeter": -1, "mean_texture": -1})],
    "synthetic_missing": [("mixed", {"grade": 1, "x_norm": -1, "n_events": 1})],
    "synthetic_missing_reg": [("mixed", {"grade": 1, "x_norm": -1, "n_events": 1})],
}


def monotone_settings(name, task, y, features):
    """The dataset's settings under each of its monotone sets."""
    out = []
    for set_name, limits in MONOTONE[name]:
        cst = [limits.get(f, 0) for f in features]
        if sorted(limits) != sorted(f for f in features if f in limits):
            raise SystemExit(f"{name}: a monotone set names an unknown feature")
        out += [(f"{set_name}_{suffix}", dict(kw, monotonic_cst=cst)) for suffix, kw in settings(task, y)]
    return out


def limits_of(kw):
    return {
        "max_depth": kw.get("max_depth"),
        "min_split_rows": kw.get("min_samples_split", 2),
        "min_leaf_rows": kw.get("min_samples_leaf", 1),
        "max_leaves": kw.get("max_leaf_nodes"),
        "min_gain": float(kw.get("min_impurity_decrease", 0.0)),
        "prune_alpha": float(kw.get("ccp_alpha", 0.0)),
    }


def make_model(task, kw, rs):
    cls = DecisionTreeClassifier if task == "classify" else DecisionTreeRegressor
    return cls(random_state=rs, **kw)


SPLIT_ATTRS = ("children_left", "children_right", "feature", "threshold",
               "missing_go_to_left", "n_node_samples")


def same_arrays(a, b, attrs):
    ta, tb = a.tree_, b.tree_
    if ta.node_count != tb.node_count:
        return False
    return all(np.array_equal(getattr(ta, k), getattr(tb, k)) for k in attrs)


def same_tree(a, b):
    """Identical: structure, features, thresholds, missing_go_to_left, rows, values (exact)."""
    return same_arrays(a, b, SPLIT_ATTRS + ("value",))


def same_splits(a, b):
    """Identical structure, features, thresholds, missing_go_to_left and rows; the
    values may differ by floating-point summation order only (relative 1e-12)."""
    return (same_arrays(a, b, SPLIT_ATTRS)
            and np.allclose(a.tree_.value, b.tree_.value, rtol=1e-12, atol=0.0))


def same_partition(a, b, X):
    """Same shape and the same training rows at every node; the feature / threshold
    chosen may differ (ties between features that split the rows identically)."""
    if not same_arrays(a, b, ("children_left", "children_right", "n_node_samples")):
        return False
    pa, pb = a.decision_path(X).tocsc(), b.decision_path(X).tocsc()
    pa.sort_indices()
    pb.sort_indices()
    return (np.array_equal(pa.indptr, pb.indptr) and np.array_equal(pa.indices, pb.indices))


def fnum(v):
    v = float(v)
    if math.isnan(v):
        return None
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return v


def node_list(model, X, y_codes):
    t = model.tree_
    path = model.decision_path(X).tocsc()
    nodes = []
    for i in range(t.node_count):
        rows = path.indices[path.indptr[i]:path.indptr[i + 1]]
        if len(rows) != int(t.n_node_samples[i]):
            raise SystemExit(f"decision_path rows {len(rows)} != n_node_samples "
                             f"{int(t.n_node_samples[i])} at node {i}")
        vals = y_codes[rows]
        constant = bool(np.all(vals == vals[0]))
        leaf = t.children_left[i] == -1
        nodes.append({
            "id": i,
            "left": int(t.children_left[i]),
            "right": int(t.children_right[i]),
            "feature": -1 if leaf else int(t.feature[i]),
            "threshold": None if leaf else fnum(t.threshold[i]),
            "missing_left": None if leaf else bool(t.missing_go_to_left[i]),
            "rows": int(t.n_node_samples[i]),
            "weighted_rows": float(t.weighted_n_node_samples[i]),
            "impurity": float(t.impurity[i]),
            "value": [float(v) for v in t.value[i][0]],
            "constant_target": constant,
        })
    return nodes


def run_dataset(name, rel, task, monotone=False):
    features, X, y = read_csv(os.path.join(REPO, rel), task)
    if task == "classify":
        classes, y_codes = np.unique(y, return_inverse=True)
    else:
        classes, y_codes = None, y
    cases, variation = [], {}
    cases_kw = monotone_settings(name, task, y, features) if monotone else settings(task, y)
    for suffix, kw in cases_kw:
        case_name = f"{name}_{suffix}"
        fits = [make_model(task, kw, rs).fit(X, y) for rs in RANDOM_STATES]
        m0 = fits[0]
        if task == "classify" and list(m0.classes_) != list(classes):
            raise SystemExit(f"{case_name}: classes_ {m0.classes_} != {classes}")
        tie_free = all(same_tree(m0, m) for m in fits[1:])
        splits_stable = all(same_splits(m0, m) for m in fits[1:])
        partition_stable = all(same_partition(m0, m, X) for m in fits[1:])
        pred = m0.predict(X)
        path = make_model(task, kw, 0).cost_complexity_pruning_path(X, y)
        case = {
            "name": case_name,
            "limits": limits_of(kw),
            "criterion": kw.get("criterion", "gini" if task == "classify" else "squared_error"),
            "class_weight": kw.get("class_weight"),
            "tie_free": tie_free,
            "same_splits": splits_stable,
            "same_partition": partition_stable,
            "tree": {
                "node_count": int(m0.tree_.node_count),
                "depth": int(m0.get_depth()),
                "leaves": int(m0.get_n_leaves()),
                "nodes": node_list(m0, X, y_codes),
            },
            "train_predictions": ([str(p) for p in pred] if task == "classify"
                                  else [float(p) for p in pred]),
            "train_score": float(m0.score(X, y)),
            "pruning_path": {
                "alphas": [float(a) for a in path.ccp_alphas],
                "impurities": [float(v) for v in path.impurities],
            },
        }
        if "monotonic_cst" in kw:
            case["monotone"] = [int(c) for c in kw["monotonic_cst"]]
        cases.append(case)
        if not tie_free:
            leaves = [int(m.get_n_leaves()) for m in fits]
            depth = [int(m.get_depth()) for m in fits]
            score = [float(m.score(X, y)) for m in fits]
            variation[case_name] = {
                "leaves": {"min": min(leaves), "max": max(leaves)},
                "depth": {"min": min(depth), "max": max(depth)},
                "train_score": {"min": min(score), "max": max(score)},
            }
    doc = {
        "reference": f"scikit-learn {sklearn.__version__}",
        "dataset": name,
        "file": rel,
        "target": "target",
        "task": task,
        "features": features,
        "random_states": RANDOM_STATES,
        "cases": cases,
        "random_state_variation": variation,
    }
    if task == "classify":
        doc["classes"] = [str(c) for c in classes]
    return doc


def main(outdir):
    if sklearn.__version__ != PINNED:
        raise SystemExit(f"scikit-learn {sklearn.__version__} installed, {PINNED} required")
    os.makedirs(outdir, exist_ok=True)
    total = total_tf = 0
    runs = [(name, rel, task, False) for name, rel, task in DATASETS]
    runs += [(name, rel, task, True) for name, rel, task in DATASETS if name in MONOTONE]
    for name, rel, task, monotone in runs:
        doc = run_dataset(name, rel, task, monotone)
        text = json.dumps(doc, indent=1, sort_keys=True, allow_nan=False) + "\n"
        stem = "monotone" if monotone else "tree"
        name = f"{stem}_{name}"
        with open(os.path.join(outdir, f"{name}.json"), "w", encoding="utf-8",
                  newline="\n") as fh:
            fh.write(text)
        n = len(doc["cases"])
        tf = sum(c["tie_free"] for c in doc["cases"])
        ss = sum(c["same_splits"] for c in doc["cases"])
        sp = sum(c["same_partition"] for c in doc["cases"])
        total += n
        total_tf += tf
        print(f"{name}.json: {n} cases, {tf} tie-free, {ss} same-splits, "
              f"{sp} same-partition, {len(text)} bytes")
    print(f"total: {total} cases, {total_tf} tie-free")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else DEFAULT_OUT)
