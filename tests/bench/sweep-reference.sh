#!/usr/bin/env bash
# Regenerates the README's reference results for the shipped demo bundle: 300 generated
# frames from seeds 2 000 000 on (never used in training or threshold choice), swept at
# 25, 50, 100 and 200 ms, plus exhaustive and thumbnail-only rows.
# Writes tests/bench/sweep-reference.{csv,png}; prints the table.
# Usage: tests/bench/sweep-reference.sh   (after cargo build --release)
set -euo pipefail
cd "$(dirname "$0")/../.."
bin=target/release/saccade
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
"$bin" scene --out "$work/eval" --count 300 --seed 2000000
"$bin" sweep --bundle src/demo/bundle --labels "$work/eval/labels.jsonl" --budgets 25,50,100,200 \
  --csv tests/bench/sweep-reference.csv --plot tests/bench/sweep-reference.png
