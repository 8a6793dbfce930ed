"""Independent share of labelled marks in examined cells, and attention on the marks' cells
(numpy), from the definition in the README ("Where attention looked"):

A mark at frame point (x, y) lies in cell (floor(y / k), floor(x / k)) of a grid of
`rows x cols` cells of k = factor * stride pixels, clamped to the grid. It is seen when its
cell is among the examined cells. Per frame, the attention on marks is the attention summed
over the distinct cells holding a mark; the reported figure is its mean over frames with
marks. Recall is seen / all marks, overall and per class.

Reads {"cell": k, "rows": R, "cols": C, "classes": [...], "frames": [{"attention": [...],
"examined": [...], "marks": [[class, x, y], ...]}]} on stdin; writes {"recall": r,
"per_class": [...], "mass": m}.
"""
import json
import sys

import numpy as np


def main():
    case = json.load(sys.stdin)
    k, rows, cols, classes = case["cell"], case["rows"], case["cols"], case["classes"]
    seen = np.zeros(len(classes))
    total = np.zeros(len(classes))
    masses = []
    for f in case["frames"]:
        if not f["marks"]:
            continue
        att = np.asarray(f["attention"])
        examined = set(f["examined"])
        cells = set()
        for name, x, y in f["marks"]:
            c = classes.index(name)
            r = min(max(int(np.floor(y / k)), 0), rows - 1)
            q = min(max(int(np.floor(x / k)), 0), cols - 1)
            cell = r * cols + q
            total[c] += 1
            seen[c] += cell in examined
            cells.add(cell)
        masses.append(att[sorted(cells)].sum())
    per = [float(s / t) if t > 0 else None for s, t in zip(seen, total)]
    json.dump({"recall": float(seen.sum() / total.sum()), "per_class": per, "mass": float(np.mean(masses))}, sys.stdout)


if __name__ == "__main__":
    main()
