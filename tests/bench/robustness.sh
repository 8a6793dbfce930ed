#!/usr/bin/env bash
# Measures the robustness goals and prints the figures: panics (exit code 101 or
# "panicked" on stderr) and lost files, per category. Run by hand from the repository
# root after `cargo build --release --features train` and `bash tests/run` (for .venv):
#
#   tests/bench/robustness.sh [KILLS]      # KILLS per after-mode, default 30
#
# Categories: 50 odd image files, 100 malformed configs, 50 malformed bundles, KILLS
# `kill -9` with restarts under after = "delete" and under "move", a full log disk (a
# small tmpfs when this user may mount one, else a file size limit), 20 SIGHUP reloads
# with out-of-range values.
set -uo pipefail
cd "$(dirname "$0")/../.."
KILLS=${1:-30}
BIN=${CARGO_TARGET_DIR:-target}/release/saccade
PY=${SACCADE_PYTHON:-.venv/bin/python}
BUNDLE=$PWD/src/demo/bundle
W=$(mktemp -d)
trap 'rm -rf "$W"' EXIT
panics() { grep -c "panicked" "$@" 2>/dev/null | awk -F: '{s += $NF} END {print s + 0}'; }

# ---------------------------------------------------------------- odd image files
mkdir -p "$W/img"
"$PY" - "$W/img" <<'EOF'
import io, random, sys
from PIL import Image
out = sys.argv[1]
rng = random.Random(7)
def pic(w, h, mode="RGB"):
    im = Image.new("RGB", (w, h), (120, 110, 100))
    if w > 2 and h > 2:
        im.paste((250, 250, 250), (w // 3, h // 3, w // 2 + 1, h // 2 + 1))
    return im.convert(mode)
sizes = [(1, 1), (2, 2), (7, 9), (8, 8), (9, 8), (24, 24), (25, 25), (31, 600), (600, 31), (4000, 3000)]
n = 0
def save(im, fmt, suffix, **kw):
    global n
    b = io.BytesIO(); im.save(b, fmt, **kw); n += 1
    open(f"{out}/{n:02d}-{im.width}x{im.height}.{suffix}", "wb").write(b.getvalue())
    return b.getvalue()
for w, h in sizes:                                   # 10 sizes x 3 formats = 30
    save(pic(w, h), "JPEG", "jpg")
    save(pic(w, h, "L"), "PNG", "png")
    save(pic(w, h), "PPM", "ppm")
for mode, fmt, suf in [("1", "PPM", "pbm"), ("L", "PPM", "pgm"), ("RGBA", "PNG", "png"), ("I;16", "PNG", "png")]:
    save(pic(64, 48, mode), fmt, suf)                # 4 more formats
for o in (3, 6, 8):                                  # EXIF-rotated
    ex = Image.Exif(); ex[0x0112] = o
    save(pic(96, 64), "JPEG", "jpg", exif=ex.tobytes())
good = save(pic(640, 480), "JPEG", "jpg")
extra = [good[: len(good) // 2], good[:-2], good + bytes(5000), b"", b"\xff\xd8\xff" + bytes(100),
         b"P6\n100000 100000\n255\n", b"\x89PNG\r\n\x1a\n" + bytes(30), bytes(rng.randrange(256) for _ in range(2000)),
         good[:200] + bytes(rng.randrange(256) for _ in range(len(good) - 200)), b"P5\n0 0\n255\n",
         b"P6\n4 4\n65535\n" + bytes(20), b"not an image at all"]
for b in extra:                                      # 12 truncated, corrupt, empty, padded
    n += 1
    open(f"{out}/{n:02d}-odd.bin", "wb").write(b)
EOF
nimg=$(ls "$W/img" | wc -l)
"$BIN" analyze --bundle "$BUNDLE" --budget-ms 50 "$W"/img/* > "$W/img.out" 2> "$W/img.err"
rc=$?
lines=$(wc -l < "$W/img.out")
echo "images: $nimg files, $lines results, exit $rc, panics $(( $(panics "$W/img.err") + (rc == 101) )), errors $(grep -c '"error"' "$W/img.out")"

# ---------------------------------------------------------------- configs and bundles
mkdir -p "$W/inbox" "$W/cfg" "$W/bundles"
"$BIN" scene --out "$W/frames" --count 40 --size 640x480 > /dev/null 2>&1
base_cfg() {
  cat <<EOF
bundle = "$1"
max_pixels = 40000000
[source]
kind = "folder"
path = "$W/inbox"
stable_ms = 500
poll_ms = 100
[engine]
budget_ms = 100.0
min_patches = 4
max_patches = 256
batch = 8
samples = 64
interval = 0.9
[log]
path = "$W/cfg/log.jsonl"
rotate_mb = 64.0
keep = 5
sync_interval_s = 5.0
health_interval_s = 60.0
backlog_mb = 16.0
[evidence]
enabled = true
dir = "$W/cfg/ev"
quota_mb = 200.0
max_age_hours = 72.0
crops = 4
EOF
}
# Mutates a TOML file N times into OUT_PREFIX-i: numbers replaced by extremes, lines
# dropped, doubled or cut.
mutate() {
  "$PY" - "$@" <<'EOF'
import random, re, sys
src, n, prefix = sys.argv[1], int(sys.argv[2]), sys.argv[3]
text = open(src).read().splitlines()
vals = ["0", "-1", "1e300", "-1e300", "1e-300", "inf", "-inf", "nan", "18446744073709551615", "100000", "\"x\"", "[]"]
rng = random.Random(11)
for i in range(n):
    lines = list(text)
    for _ in range(rng.randint(1, 3)):
        k = rng.randrange(len(lines))
        op = rng.random()
        if op < 0.6 and ("=" in lines[k] or re.match(r"\s*[-\d.]", lines[k])):
            lines[k] = (lines[k].split("=")[0] + "= " if "=" in lines[k] else "    ") + rng.choice(vals) + ("" if "=" in lines[k] else ",")
        elif op < 0.75:
            del lines[k]
        elif op < 0.9:
            lines.insert(k, lines[k])
        else:
            lines[k] = lines[k][: rng.randrange(len(lines[k]) + 1)]
    open(f"{prefix}-{i:03d}", "w").write("\n".join(lines) + "\n")
EOF
}
base_cfg "$BUNDLE" > "$W/cfg/base.toml"
mutate "$W/cfg/base.toml" 100 "$W/cfg/m"
cp=0; crefused=0
for f in "$W"/cfg/m-*; do
  "$BIN" check --config "$f" > /dev/null 2> "$f.err"; rc=$?
  cp=$(( cp + (rc == 101) )); crefused=$(( crefused + (rc != 0) ))
done
echo "configs: 100 mutated, refused $crefused, panics $(( cp + $(panics "$W"/cfg/*.err) ))"

mutate "$BUNDLE/bundle.toml" 50 "$W/bundles/m"
bp=0; brefused=0
for i in $(seq -w 0 49); do
  b="$W/bundles/b$i"; cp -r "$BUNDLE" "$b"; cp "$W/bundles/m-0$i" "$b/bundle.toml"
  "$BIN" analyze --bundle "$b" --budget-ms 50 "$W/frames/sheet-000.jpg" > /dev/null 2> "$b.err"; rc=$?
  bp=$(( bp + (rc == 101) )); brefused=$(( brefused + (rc != 0) ))
done
echo "bundles: 50 mutated manifests, refused $brefused, panics $(( bp + $(panics "$W"/bundles/*.err) ))"

# ---------------------------------------------------------------- kill -9 with restarts
kill_rounds() {  # after-mode
  local after=$1 d="$W/kill-$1"
  mkdir -p "$d/inbox" "$d/done"
  cp "$W"/frames/*.jpg "$d/inbox/"
  local files; files=$(ls "$d/inbox" | wc -l)
  cat > "$d/c.toml" <<EOF
bundle = "$BUNDLE"
[source]
kind = "folder"
path = "$d/inbox"
after = "$after"
move_to = "$d/done"
stable_ms = 1
poll_ms = 20
[engine]
budget_ms = 50
[log]
path = "$d/log.jsonl"
sync = "never"
EOF
  local p=0
  for k in $(seq 1 "$KILLS"); do
    "$BIN" run --config "$d/c.toml" > /dev/null 2>> "$d/err" & pid=$!
    sleep "$(awk -v r=$RANDOM 'BEGIN {printf "%.2f", 0.3 + r / 32768 * 1.2}')"
    kill -9 $pid 2>/dev/null; wait $pid 2>/dev/null; [ $? = 101 ] && p=$((p + 1))
  done
  "$BIN" run --config "$d/c.toml" > /dev/null 2>> "$d/err" & pid=$!
  for _ in $(seq 1 600); do
    [ -z "$(ls "$d/inbox")" ] && [ -z "$(ls "$d/inbox/.saccade-claimed" | grep -v kept.jsonl)" ] && break
    sleep 0.2
  done
  kill -TERM $pid; wait $pid; [ $? = 101 ] && p=$((p + 1))
  "$PY" - "$d/log.jsonl" "$files" "$after" "$p" "$(panics "$d/err")" "$KILLS" "$(ls "$d/inbox" | wc -l)" <<'EOF'
import json, os, sys
log, files, after, p101, pstderr, kills, left = sys.argv[1:]
n = {}
bad = 0
for line in open(log):
    try:
        r = json.loads(line)
    except ValueError:
        bad += 1
        continue
    if r["record"] in ("frame", "error"):
        k = os.path.basename(r["origin"]); n[k] = n.get(k, 0) + 1
lost = int(files) - int(left) - len(n)
dup = sum(1 for v in n.values() if v > 1)
print(f"kill -9 ({after}): {kills} kills + restarts, {files} files, {len(n)} recorded, lost {lost}, "
      f"with more than one record {dup}, left in inbox {left}, unparseable lines {bad}, panics {int(p101) + int(pstderr)}")
EOF
}
kill_rounds delete
kill_rounds move

# ---------------------------------------------------------------- full log disk
d="$W/full"; mkdir -p "$d/log"
how="tmpfs of 64 KB"
if ! mount -t tmpfs -o size=64k tmpfs "$d/log" 2>/dev/null; then how="file size limit of 64 KB (ulimit -f 64; no tmpfs mount allowed)"; fi
cat > "$d/c.toml" <<EOF
bundle = "$BUNDLE"
[source]
kind = "files"
paths = ["$W/frames/*.jpg"]
rate_fps = 20
repeat = true
[engine]
budget_ms = 30
[log]
path = "$d/log/log.jsonl"
health_interval_s = 0.5
backlog_mb = 0.05
EOF
(
  trap '' XFSZ
  [[ $how == file* ]] && ulimit -f 64
  exec "$BIN" run --config "$d/c.toml" > /dev/null 2> >(cat > "$d/err")
) & pid=$!
sleep 20
kill -TERM $pid; wait $pid; rc=$?
"$PY" - "$d/log/log.jsonl" "$how" "$rc" "$(panics "$d/err")" "$(grep -c 'records shed so far' "$d/err")" <<'EOF'
import json, sys
log, how, rc, pstderr, shedlines = sys.argv[1:]
text = open(log, "rb").read()
lines = text.split(b"\n")
parsed = 0
for l in lines[:-1]:
    try:
        json.loads(l); parsed += 1
    except ValueError:
        pass
print(f"full log disk ({how}): {len(text)} bytes, {parsed} whole records, spliced or partial lines "
      f"{len(lines) - 1 - parsed}, last line partial {lines[-1] != b''}, exit {rc}, "
      f"'shed' messages {shedlines}, panics {int(pstderr) + (rc == '101')}")
EOF
mountpoint -q "$d/log" && umount "$d/log"

# ---------------------------------------------------------------- reloads
d="$W/reload"; mkdir -p "$d"
cat > "$d/base" <<EOF
bundle = "$BUNDLE"
[source]
kind = "files"
paths = ["$W/frames/*.jpg"]
rate_fps = 10
repeat = true
[engine]
budget_ms = 40
samples = 64
[log]
path = "$d/log.jsonl"
sync_interval_s = 5
health_interval_s = 60
backlog_mb = 16
[evidence]
enabled = false
max_age_hours = 72
EOF
cp "$d/base" "$d/c.toml"
"$BIN" run --config "$d/c.toml" > /dev/null 2> "$d/err" & pid=$!
sleep 3
bad=("budget_ms = 1e300" "budget_ms = inf" "budget_ms = -1" "samples = 100000000" "sync_interval_s = inf"
     "sync_interval_s = 1e-300" "health_interval_s = 1e300" "health_interval_s = 0" "backlog_mb = nan" "max_age_hours = inf")
for i in $(seq 0 19); do
  v=${bad[$((i % 10))]}; key=${v%% =*}
  sed "s|^$key = .*|$v|" "$d/base" > "$d/c.toml"
  kill -HUP $pid; sleep 0.5
done
alive=$(kill -0 $pid 2>/dev/null && echo yes || echo no)
kill -TERM $pid; wait $pid; rc=$?
echo "reloads: 20 out-of-range values by SIGHUP, rejected $(grep -c 'reload rejected' "$d/err"), still running $alive, exit $rc, panics $(( $(panics "$d/err") + (rc == 101) ))"
