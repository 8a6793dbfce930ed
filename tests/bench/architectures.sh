#!/usr/bin/env bash
# Times the trainer's feature-network shapes (saccade train --arch) per patch in tract
# (saccade bench) and in onnxruntime with one thread (tests/reference/bench_compare.py),
# on the very same ONNX files, and prints the tract / onnxruntime ratios.
# Usage: tests/bench/architectures.sh [REPEATS]   (needs a build with --features train
# and the .venv that tests/run creates)
set -euo pipefail
cd "$(dirname "$0")/../.."
repeats=${1:-21}
bin=target/release/saccade
py=${SACCADE_PYTHON:-.venv/bin/python}
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
"$bin" scene --out "$work/tiny" --count 4 --seed 7 --size 512x384 --format png 2>/dev/null
"$bin" scene --out "$work/frame" --count 1 --seed 8 --size 2448x2048 2>/dev/null
for arch in standard small wide; do
  "$bin" train --labels "$work/tiny/labels.jsonl" --out "$work/$arch" --arch "$arch" \
    --warmup-epochs 0 --attention-epochs 0 --epochs 1 --batch 2 --top 2 --tail 1 --val-patches 2 --no-baseline 2>/dev/null
  "$bin" bench --bundle "$work/$arch" --frame "$work/frame/sheet-000000.jpg" --repeats "$repeats" --json >"$work/$arch.json"
  "$py" tests/reference/bench_compare.py "$work/frame/sheet-000000.jpg" "$work/$arch" "$repeats" >"$work/$arch.ort"
  "$py" - "$arch" "$work/$arch.json" "$work/$arch.ort" <<'PY'
import json, re, sys
arch, ours, theirs = sys.argv[1], json.load(open(sys.argv[2])), open(sys.argv[3]).read()
for b in (1, 4, 16):
    t = next(s["median_ms"] for s in ours["stages"] if s["stage"] == f"feature network only, per patch, batch {b}")
    o = float(re.search(rf"per patch, batch {b}: ([0-9.]+) ms", theirs).group(1))
    print(f"{arch:8} batch {b:2}: tract {t:.4f} ms, onnxruntime {o:.4f} ms, tract/onnxruntime {t / o:.2f}")
t = next(s["median_ms"] for s in ours["stages"] if s["stage"].startswith("attention network"))
o = float(re.search(r"attention network on [0-9x]+: ([0-9.]+) ms", theirs).group(1))
print(f"{arch:8} attention: tract {t:.3f} ms, onnxruntime {o:.3f} ms, tract/onnxruntime {t / o:.2f}")
PY
done
