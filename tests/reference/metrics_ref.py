"""Independent F1 and expected calibration error on the same predictions.

F1: scikit-learn's f1_score on multilabel indicator matrices (frames x classes), per class
(average=None) and macro (average="macro"), zero_division=0.

ECE: numpy, written from C. Guo, G. Pleiss, Y. Sun, K. Q. Weinberger, "On Calibration of
Modern Neural Networks", ICML 2017: ECE = sum_b |B_b|/n * |acc(B_b) - conf(B_b)| over M
equal-width bins (i/M, (i+1)/M] (p = 0 in the first bin), with every (frame, class)
probability a binary event: acc = fraction of positives in the bin, conf = mean probability.

Reads a JSON list of cases {"truth": [[0/1]], "pred": [[0/1]], "probs": [[p]], "bins": M}
on stdin and writes a list of {"per_class": [...], "macro": x, "ece": y}.
"""
import json
import sys

import numpy as np
from sklearn.metrics import f1_score


def ece(probs, truth, bins):
    p = np.asarray(probs, dtype=np.float64).ravel()
    y = np.asarray(truth, dtype=np.float64).ravel()
    edges = np.arange(bins + 1) / bins
    total = 0.0
    for i in range(bins):
        lo, hi = edges[i], edges[i + 1]
        inside = (p <= hi) & ((p > lo) if i > 0 else (p >= lo))
        if inside.any():
            total += inside.mean() * abs(y[inside].mean() - p[inside].mean())
    return total


def main():
    out = []
    for case in json.load(sys.stdin):
        t = np.asarray(case["truth"], dtype=int)
        pr = np.asarray(case["pred"], dtype=int)
        per = f1_score(t, pr, average=None, zero_division=0)
        mac = f1_score(t, pr, average="macro", zero_division=0)
        out.append({"per_class": [float(v) for v in per], "macro": float(mac), "ece": ece(case["probs"], case["truth"], case["bins"])})
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
