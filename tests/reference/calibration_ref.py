"""Independent Platt scaling and Clopper-Pearson bounds on the same inputs.

Platt scaling (J. Platt, "Probabilistic outputs for support vector machines", 1999):
p' = sigmoid(a * logit(p) + b), fitted by maximum likelihood against Platt's targets
t+ = (N+ + 1) / (N+ + 2) for positives and t- = 1 / (N- + 2) for negatives. Here with
scikit-learn's LogisticRegression (no penalty, lbfgs) on x = logit(p): each frame enters
twice, as a positive with weight t and as a negative with weight 1 - t, which is the same
cross-entropy.

Clopper-Pearson upper bound (C. Clopper and E. Pearson, Biometrika 26, 1934): after k
events in n trials, the one-sided upper bound at confidence c is the c-quantile of
Beta(k + 1, n - k) (1 when k = n), here scipy.stats.beta.ppf.

Reads {"platt": [{"p": [...], "y": [0/1...]}], "cp": [[k, n, c], ...]} on stdin and writes
{"platt": [{"a": a, "b": b}], "cp": [u, ...]}.
"""
import json
import sys

import numpy as np
from scipy.stats import beta
from sklearn.linear_model import LogisticRegression

EPS = 1e-7


def platt(p, y):
    p = np.clip(np.asarray(p, dtype=np.float64), EPS, 1 - EPS)
    y = np.asarray(y, dtype=int)
    x = np.log(p / (1 - p)).reshape(-1, 1)
    pos, neg = y.sum(), len(y) - y.sum()
    t = np.where(y == 1, (pos + 1) / (pos + 2), 1 / (neg + 2))
    X = np.vstack([x, x])
    Y = np.concatenate([np.ones(len(y)), np.zeros(len(y))])
    W = np.concatenate([t, 1 - t])
    m = LogisticRegression(penalty=None, solver="lbfgs", tol=1e-12, max_iter=100000)
    m.fit(X, Y, sample_weight=W)
    return {"a": float(m.coef_[0][0]), "b": float(m.intercept_[0])}


def main():
    req = json.load(sys.stdin)
    out = {
        "platt": [platt(c["p"], c["y"]) for c in req["platt"]],
        "cp": [1.0 if k >= n else float(beta.ppf(c, k + 1, n - k)) for k, n, c in req["cp"]],
    }
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
