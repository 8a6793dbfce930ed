"""Independent priority-sampling weights and covariance terms.

Reference: N. Duffield, C. Lund, M. Thorup, "Priority sampling for estimation of
arbitrary subset sums", J. ACM 54(6), 2007. Priorities q_i = a_i / u_i; the k items of
highest priority are kept; tau is the (k+1)-th highest priority (0 if none); weights
w_i = max(a_i, tau); per-item variance estimates v_i = tau * max(0, tau - a_i).

Reads JSON {"attention": [...], "uniforms": [...], "k": [k1, k2, ...], "features": [[...]]}
on stdin and writes, per k, the kept cells, weights, variances, the estimate and the
covariance estimate sum_i v_i f_i f_i^T.
"""
import json
import sys

import numpy as np


def priority(a, u, k):
    a = np.asarray(a, dtype=np.float64)
    u = np.asarray(u, dtype=np.float64)
    pos = np.flatnonzero(a > 0)
    q = a[pos] / u[pos]
    # Decreasing priority, ties by index (stable sort on the negated priority).
    order = pos[np.argsort(-q, kind="stable")]
    qs = a[order] / u[order]
    tau = qs[k] if k < len(order) else 0.0
    kept = order[:k]
    w = np.maximum(a[kept], tau)
    v = tau * np.maximum(0.0, tau - a[kept])
    return kept, w, v, tau


def main():
    req = json.load(sys.stdin)
    f = np.asarray(req["features"], dtype=np.float64)
    out = []
    for k in req["k"]:
        kept, w, v, tau = priority(req["attention"], req["uniforms"], k)
        fk = f[kept]
        est = w @ fk
        cov = (fk * v[:, None]).T @ fk
        out.append({"k": k, "cells": kept.tolist(), "w": w.tolist(), "v": v.tolist(), "tau": float(tau),
                    "estimate": est.tolist(), "covariance": cov.ravel().tolist()})
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
