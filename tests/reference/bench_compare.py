"""Timings of the independent references on the same inputs as `saccade bench`.

Usage: bench_compare.py FRAME BUNDLE_DIR [REPEATS]
Prints median times of Pillow's Image.reduce on FRAME at the bundle's thumbnail factor,
and of onnxruntime (CPU provider, one thread) running the bundle's attention network on
the thumbnail and its feature network per patch at batch 1, 4 and 16. Compare with the
lines of `saccade bench --frame FRAME --bundle BUNDLE_DIR` run just before or after.
"""
import sys
import time
import tomllib

import numpy as np
import onnxruntime as ort
from PIL import Image


def median_ms(fn, repeats):
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append((time.perf_counter() - t) * 1000.0)
    times.sort()
    return times[len(times) // 2]


def main():
    frame, bundle = sys.argv[1], sys.argv[2]
    repeats = int(sys.argv[3]) if len(sys.argv) > 3 else 15
    with open(f"{bundle}/bundle.toml", "rb") as f:
        m = tomllib.load(f)
    img = Image.open(frame).convert("RGB")
    img.load()
    s = m["thumbnail_factor"]
    print(f"pillow reduce({s}) on {img.width}x{img.height}: {median_ms(lambda: img.reduce(s), repeats):.3f} ms")

    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    rng = np.random.default_rng(1)
    att = ort.InferenceSession(f"{bundle}/{m['attention']['file']}", opts, providers=["CPUExecutionProvider"])
    th, tw = -(-img.height // s), -(-img.width // s)
    x = rng.standard_normal((1, 3, th, tw), dtype=np.float32)
    name = m["attention"]["input"]
    print(f"onnxruntime attention network on 1x3x{th}x{tw}: {median_ms(lambda: att.run(None, {name: x}), repeats):.3f} ms")
    feat = ort.InferenceSession(f"{bundle}/{m['features']['file']}", opts, providers=["CPUExecutionProvider"])
    p = m["patch_size"]
    name = m["features"]["input"]
    for b in (1, 4, 16):
        x = rng.standard_normal((b, 3, p, p), dtype=np.float32)
        t = median_ms(lambda: feat.run(None, {name: x}), repeats)
        print(f"onnxruntime feature network per patch, batch {b}: {t / b:.3f} ms")


if __name__ == "__main__":
    main()
