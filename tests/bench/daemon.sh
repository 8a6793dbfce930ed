#!/usr/bin/env bash
# Daemon throughput on 2448x2048 JPEG frames from a folder source with the demo bundle.
# For each budget: a producer drops frames into the folder at RATE per second (rename into
# place) for SECONDS; the daemon analyses them (newest wins) and writes health records.
# Prints analysed frames/s, p99 frame age, the share of frames within budget, and peak RSS.
# Usage: tests/bench/daemon.sh [SECONDS] [RATE] [BUDGETS...]   (defaults: 30 10 50 100 200)
set -euo pipefail
cd "$(dirname "$0")/../.."
secs=${1:-30}; rate=${2:-10}; shift 2 2>/dev/null || true
budgets=("$@"); [ ${#budgets[@]} -gt 0 ] || budgets=(50 100 200)
bin=target/release/saccade
[ -x "$bin" ] || cargo build --release
work=$(mktemp -d); trap 'rm -rf "$work"' EXIT
"$bin" demo --out "$work/demo" --frames 8 >/dev/null 2>&1
printf "%8s %10s %12s %12s %14s %12s\n" budget_ms frames/s age_p99_ms analysis_p99 within_budget peak_rss_MB
for b in "${budgets[@]}"; do
  rm -rf "$work/inbox" "$work/log"; mkdir -p "$work/inbox"
  cat > "$work/bench.toml" <<TOML
bundle = "$work/demo/bundle"
[source]
kind = "folder"
path = "$work/inbox"
after = "delete"
stable_ms = 50
poll_ms = 20
[engine]
budget_ms = $b
max_patches = 100000
[log]
path = "$work/log/detections.jsonl"
health_interval_s = 5
TOML
  "$bin" run --config "$work/bench.toml" 2>/dev/null & pid=$!
  sleep 2
  end=$((SECONDS + secs)); n=0
  while [ $SECONDS -lt $end ]; do
    src=$(ls "$work"/demo/frames/*.jpg | sed -n "$((n % 8 + 1))p")
    cp "$src" "$work/inbox/.f$n.jpg" && mv "$work/inbox/.f$n.jpg" "$work/inbox/f$n.jpg"
    n=$((n + 1)); sleep "$(awk "BEGIN{print 1/$rate}")"
  done
  hwm=$(awk '/VmHWM/{print $2}' /proc/$pid/status)
  kill -TERM $pid; wait $pid
  python3 - "$work/log/detections.jsonl" "$b" "$hwm" <<'PY'
import json, sys
recs = [json.loads(l) for l in open(sys.argv[1]) if l.strip()]
frames = [r for r in recs if r["record"] == "frame"]
health = [r for r in recs if r["record"] == "health"]
# Skip the first health window (start-up) and the last (partial, at exit).
steady = health[1:-1] or health
fps = sum(h["frames_per_s"] for h in steady) / len(steady)
ages = sorted(r["age_ms"] for r in frames[5:])
p99 = ages[min(len(ages) - 1, int(0.99 * len(ages)))]
tot = sorted(r["times_ms"]["total"] for r in frames[5:])
ap99 = tot[min(len(tot) - 1, int(0.99 * len(tot)))]
met = sum(r["budget_met"] for r in frames) / len(frames)
print(f"{sys.argv[2]:>8} {fps:10.2f} {p99:12.1f} {ap99:12.1f} {100*met:13.1f}% {int(sys.argv[3])/1024:12.1f}")
PY
done
