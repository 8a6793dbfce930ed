"""Runs ONNX files in onnxruntime (CPU, one thread) for comparison with tract, after
checking each file with the ONNX standard's reference checker (onnx.checker, full check
with shape inference), which raises on any violation.

Reads JSON [{"model": path, "input": name, "shape": [...], "data": [...]}, ...] on stdin
and writes [{"shape": [...], "data": [...]}, ...] with each model's first output.
"""
import json
import sys

import numpy as np
import onnx
import onnxruntime as ort


def main():
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    results = []
    for job in json.load(sys.stdin):
        onnx.checker.check_model(onnx.load(job["model"]), full_check=True)
        sess = ort.InferenceSession(job["model"], opts, providers=["CPUExecutionProvider"])
        x = np.asarray(job["data"], dtype=np.float32).reshape(job["shape"])
        (y,) = sess.run(None, {job["input"]: x})[:1]
        results.append({"shape": list(y.shape), "data": y.astype(np.float64).ravel().tolist()})
    json.dump(results, sys.stdout)


if __name__ == "__main__":
    main()
