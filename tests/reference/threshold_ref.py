"""Independent best-F1 threshold per class: scikit-learn's precision_recall_curve.

For scores s and labels y, precision_recall_curve gives precision and recall at every
distinct score t (predicted positive when s >= t). F1 = 2PR / (P + R); the best threshold
is the one with the highest F1, ties to the highest threshold.

Reads a JSON list of {"scores": [...], "truth": [0/1, ...]} on stdin and writes a list of
{"at": t, "f1": f} (null where no label is positive).
"""
import json
import sys

import numpy as np
from sklearn.metrics import precision_recall_curve


def main():
    out = []
    for case in json.load(sys.stdin):
        y = np.asarray(case["truth"], dtype=int)
        s = np.asarray(case["scores"], dtype=np.float64)
        if y.sum() == 0:
            out.append(None)
            continue
        p, r, t = precision_recall_curve(y, s)
        p, r = p[:-1], r[:-1]  # the last point (recall 0) has no threshold
        f1 = np.where(p + r > 0, 2 * p * r / np.maximum(p + r, 1e-300), 0.0)
        best = np.flatnonzero(f1 == f1.max())[-1]  # thresholds increase: the last is the highest
        out.append({"at": float(t[best]), "f1": float(f1[best])})
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
