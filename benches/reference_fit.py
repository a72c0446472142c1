#!/usr/bin/env python3
"""Reference side of the fit benchmark: times one full-depth tree fit with the pinned
scikit-learn (tests/reference/requirements.txt) on a CSV made by make_fit_data.py.

Usage: reference_fit.py CSV TASK [REPEATS]     TASK is classify or regress; REPEATS default 3

Reads the CSV with the csv module (header row; the column "outcome" is the target, every
other column a float feature), converts the features to a float32 array before timing (the
reference fits on float32 anyway) and times only the fit call, REPEATS times, with at most
one thread in any native thread pool (threadpoolctl; the tree fit is single-threaded by
itself). Prints one JSON line:
  {"side": "reference", "task": ..., "rows": ..., "features": ...,
   "single_seconds": median, "single_runs": [...], "nodes": ..., "leaves": ..., "depth": ...,
   "library": "scikit-learn <version>"}
"""
import csv
import json
import statistics
import sys
import time

import numpy as np
import sklearn
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor
from threadpoolctl import threadpool_limits

TARGET = "outcome"


def read(path, task):
    with open(path, newline="") as f:
        reader = csv.reader(f)
        header = next(reader)
        t = header.index(TARGET)
        rows = [r for r in reader if r]
    X = np.array([[float(v) for i, v in enumerate(r) if i != t] for r in rows], dtype=np.float64)
    X = np.ascontiguousarray(X.astype(np.float32))
    labels = [r[t] for r in rows]
    y = np.array(labels) if task == "classify" else np.array([float(v) for v in labels])
    return X, y


def main():
    if len(sys.argv) not in (3, 4) or sys.argv[2] not in ("classify", "regress"):
        print(__doc__, file=sys.stderr)
        sys.exit(2)
    path, task = sys.argv[1], sys.argv[2]
    repeats = int(sys.argv[3]) if len(sys.argv) == 4 else 3
    X, y = read(path, task)
    make = DecisionTreeClassifier if task == "classify" else DecisionTreeRegressor
    times = []
    model = None
    with threadpool_limits(limits=1):
        for _ in range(repeats):
            # full depth: max_depth=None, min_samples_split=2, min_samples_leaf=1 (the defaults)
            model = make(random_state=0)
            start = time.perf_counter()
            model.fit(X, y)
            times.append(time.perf_counter() - start)
    tree = model.tree_
    print(
        json.dumps(
            {
                "side": "reference",
                "task": task,
                "rows": int(X.shape[0]),
                "features": int(X.shape[1]),
                "single_seconds": statistics.median(times),
                "single_runs": times,
                "nodes": int(tree.node_count),
                "leaves": int(tree.n_leaves),
                "depth": int(tree.max_depth),
                "library": f"scikit-learn {sklearn.__version__}",
            }
        )
    )


if __name__ == "__main__":
    main()
