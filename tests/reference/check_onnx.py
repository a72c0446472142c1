"""Cross-check of pollard's ONNX export against onnxruntime (pinned in requirements-onnx.txt).

    python tests/reference/check_onnx.py CASEDIR

CASEDIR holds one folder per case, written by `cargo run --release --example onnx_cases --
CASEDIR` (model.onnx, inputs.csv, predictions.csv, case.json; see examples/onnx_cases.rs).
For each case: the model must pass onnx.checker (full check), onnxruntime must load it, and
its outputs on inputs.csv must agree with pollard's predictions row for row:
classify - `label` equal to pollard's class index exactly, every `probabilities` cell within
PROB_TOL of pollard's; for a model with a decision threshold (decision costs), some rows must
get a label other than the most likely class, so the case exercises the threshold; regress - `variable` within VALUE_REL relative of pollard's value.
Exits 1 on any mismatch, printing the first rows that differ.
"""

import csv
import json
import math
import sys
from pathlib import Path

import numpy as np
import onnx
import onnxruntime

# Tolerances: pollard predicts in f64, the ONNX model carries leaf weights as float32 and
# onnxruntime outputs float32, so values differ by float32 rounding (relative 2^-24 ~ 6e-8).
PROB_TOL = 1e-6
VALUE_REL = 1e-5


def read_rows(path):
    with open(path, newline="") as f:
        r = csv.reader(f)
        header = next(r)
        rows = [[float(x) for x in row] for row in r]
    return header, rows


def check_case(d):
    info = json.loads((d / "case.json").read_text())
    model = onnx.load(str(d / "model.onnx"))
    onnx.checker.check_model(model, full_check=True)
    sess = onnxruntime.InferenceSession(str(d / "model.onnx"), providers=["CPUExecutionProvider"])
    names, xs = read_rows(d / "inputs.csv")
    # Every cell was written as the f64 widening of a float32, so the cast is exact.
    x = np.array(xs, dtype=np.float64).astype(np.float32)
    assert x.shape == (info["rows"], info["n_features"]), (x.shape, info)
    assert np.array_equal(x.astype(np.float64), np.array(xs), equal_nan=True), "inputs are not float32 values"
    _, want = read_rows(d / "predictions.csv")
    want = np.array(want, dtype=np.float64)
    out = dict(zip([o.name for o in sess.get_outputs()], sess.run(None, {"X": x})))
    bad = []
    if info["task"] == "classify":
        k = info["n_classes"]
        label, prob = out["label"], out["probabilities"]
        assert label.shape == (len(xs),) and prob.shape == (len(xs), k), (label.shape, prob.shape)
        diff = np.abs(prob.astype(np.float64) - want[:, 1:])
        for i in range(len(xs)):
            if label[i] != int(want[i, 0]) or not (diff[i] <= PROB_TOL).all():
                bad.append(f"row {i + 1}: onnxruntime label {label[i]} p {prob[i].tolist()}, pollard label {int(want[i, 0])} p {want[i, 1:].tolist()}")
        worst = float(diff.max())
        if info.get("decision_threshold") is not None:
            moved = int((label != np.argmax(prob, axis=1)).sum())
            info["moved"] = moved
            if moved == 0:
                bad.append(f"no row's label differs from its most likely class at threshold {info['decision_threshold']}")
    else:
        v = out["variable"]
        assert v.shape == (len(xs), 1), v.shape
        got = v[:, 0].astype(np.float64)
        rel = np.abs(got - want[:, 0]) / np.maximum(np.maximum(np.abs(got), np.abs(want[:, 0])), 1e-300)
        rel[got == want[:, 0]] = 0.0
        for i in np.nonzero(~(rel <= VALUE_REL))[0]:
            bad.append(f"row {i + 1}: onnxruntime {float(got[i])!r}, pollard {float(want[i, 0])!r} (relative {rel[i]:.3g})")
        worst = float(rel.max())
    return info, bad, worst


def main():
    root = Path(sys.argv[1])
    cases = sorted(p for p in root.iterdir() if (p / "model.onnx").exists())
    if not cases:
        print(f"check_onnx: FAIL: no cases under {root}", file=sys.stderr)
        return 1
    failed = 0
    rows = 0
    for d in cases:
        info, bad, worst = check_case(d)
        rows += info["rows"]
        what = "max |p diff|" if info["task"] == "classify" else "max relative diff"
        print(f"check_onnx: {info['case']}: {info['rows']} rows, {info['tree_nodes']} tree nodes, "
              f"{info['set_splits']} set splits, {info['onnx_nodes']} ONNX nodes, {len(bad)} mismatches, {what} {worst:.3g}"
              + (f", threshold {info['decision_threshold']:.6g} moves {info['moved']} labels off the most likely class" if "moved" in info else ""))
        if bad:
            failed += 1
            for line in bad[:10]:
                print(f"check_onnx:   {line}", file=sys.stderr)
    summary = (f"{len(cases)} models, {rows} rows, onnx {onnx.__version__}, onnxruntime {onnxruntime.__version__}")
    if failed:
        print(f"check_onnx: FAIL: {failed} of {len(cases)} models disagree ({summary})", file=sys.stderr)
        return 1
    print(f"check_onnx: OK: every row agrees ({summary})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
