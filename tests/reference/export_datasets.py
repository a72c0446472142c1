#!/usr/bin/env python3
"""Write the four open datasets that ship inside scikit-learn as plain CSV files.

Usage: export_datasets.py [OUTDIR]   (default: tests/data next to this folder)

Files written: iris.csv, wine.csv, breast_cancer.csv, diabetes.csv.
- header row; feature columns named from scikit-learn's feature_names, made
  lowercase snake_case ([a-z0-9_] only, unique); last column `target`;
- classification targets as class-name strings, the regression target as a number;
- every number written with Python repr(float) (shortest round-trip form).

The diabetes table is written unscaled (load_diabetes(scaled=False)): the
original measurements, not the mean-centred / unit-norm columns, so the CSV
holds the source values exactly and no floating-point scaling step is involved.
"""
import csv
import os
import re
import sys

from sklearn import datasets

HERE = os.path.dirname(os.path.abspath(__file__))
DEFAULT_OUT = os.path.normpath(os.path.join(HERE, "..", "data"))


def sanitize(names):
    """Lowercase snake_case, [a-z0-9_] only, unique (suffix _2, _3 ... on clashes)."""
    out = []
    seen = set()
    for raw in names:
        s = re.sub(r"[^a-z0-9]+", "_", str(raw).lower()).strip("_")
        if not s:
            s = "column"
        if s[0].isdigit():
            s = "c_" + s
        base, k = s, 2
        while s in seen or s == "target":
            s = f"{base}_{k}"
            k += 1
        seen.add(s)
        out.append(s)
    return out


def num(v):
    return repr(float(v))


def write_csv(path, header, rows):
    # newline="" + lineterminator "\n": identical bytes on every platform.
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(header)
        for r in rows:
            w.writerow(r)


def export(outdir):
    os.makedirs(outdir, exist_ok=True)
    specs = [
        ("iris", datasets.load_iris, "classify"),
        ("wine", datasets.load_wine, "classify"),
        ("breast_cancer", datasets.load_breast_cancer, "classify"),
        ("diabetes", lambda **kw: datasets.load_diabetes(scaled=False, **kw), "regress"),
    ]
    for name, loader, task in specs:
        b = loader(as_frame=False)
        X, y = b.data, b.target
        header = sanitize(b.feature_names) + ["target"]
        rows = []
        for i in range(X.shape[0]):
            feats = [num(v) for v in X[i]]
            if task == "classify":
                t = str(b.target_names[int(y[i])])
            else:
                t = num(y[i])
            rows.append(feats + [t])
        path = os.path.join(outdir, f"{name}.csv")
        write_csv(path, header, rows)
        print(f"{path}: {X.shape[0]} rows, {X.shape[1]} features + target")


if __name__ == "__main__":
    export(sys.argv[1] if len(sys.argv) > 1 else DEFAULT_OUT)
