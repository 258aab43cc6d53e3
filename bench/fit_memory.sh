#!/usr/bin/env bash
# Fit-stage memory benchmark (not a test): peak RSS (/usr/bin/time -v,
# "Maximum resident set size") of the fit stage alone on the synthetic demo
# clips at 1x (40 robot + 120 human, the committed demo) and 10x (400 + 1200).
# For each size it generates the clips (`actuary demo-clips`), runs
# `actuary run --until align` untimed, then times a second
# `actuary run --until fit`, in which decode and align are skipped (inputs
# unchanged), so the measured process only runs fit. The fit stage reads frame
# pairs from memory-mapped frame stores, so its peak RSS should not grow with
# the number of clips: target ratio 10x / 1x <= 1.10.
#
# The spec keeps the demo's sets (robot labelled; human unlabelled with its
# eval-truth folder, so fit's evaluation pass runs as in the demo) and its
# [decode] and [actions] settings (pipeline-specs/tabletop.toml), and
# shortens the rest: [fit] steps = 100 and compare = false (peak memory of
# training does not depend on step count), [align] photometric = "off" and
# speed = "off".
#
# Usage: bench/fit_memory.sh      (env: THREADS=2 STEPS=100 GAP_SAMPLE=2000
#                                  BENCH_DIR=DIR to keep the work files there;
#                                  otherwise a mktemp dir removed on exit)
# Needs: /usr/bin/time, jq, bc, a release build (built here when missing).
set -euo pipefail
cd "$(dirname "$0")/.."
ROOT=$(pwd)

THREADS=${THREADS:-2}
STEPS=${STEPS:-100}
GAP_SAMPLE=${GAP_SAMPLE:-2000}
ROBOT=40
HUMAN=120
BIN=${ACTUARY:-$ROOT/target/release/actuary}

if [ ! -x "$BIN" ]; then
  cargo build --release --bin actuary
fi
if [ -n "${BENCH_DIR:-}" ]; then
  WORK=$BENCH_DIR
  mkdir -p "$WORK"
else
  WORK=$(mktemp -d "${TMPDIR:-/tmp}/actuary-fit-memory.XXXXXX")
  trap 'rm -rf "$WORK"' EXIT
fi
WORK=$(cd "$WORK" && pwd)

# spec NAME -> $WORK/NAME/spec.toml over the clips in $WORK/NAME/clips
# (paths in a spec are relative to its folder).
spec() {
  cat > "$WORK/$1/spec.toml" <<SPEC
out = "run"
seed = 7

[sets.robot]
dir = "clips/robot"
labelled = true

[sets.human]
dir = "clips/human"
labelled = false
eval-truth = "clips/human-truth"

[decode]
fps = 10
size = [64, 64]
crop = "center"
on-error = "skip"

[actions]
map = { dx = "sum", dy = "sum", grip = "hold" }
offset = 0.0

[align]
photometric = "off"
speed = "off"
gap-sample = $GAP_SAMPLE

[fit]
action-weight = 1000.0
steps = $STEPS
compare = false
SPEC
}

# actuary LOG ARGS... -> runs the binary quietly, output to LOG; stops on failure.
actuary() {
  local log=$1
  shift
  if ! ACTUARY_QUIET=1 "$@" > "$log" 2>&1; then
    echo "failed: $*; see $log:" >&2
    tail -5 "$log" >&2
    exit 1
  fi
}

# measure NAME ROBOT HUMAN -> prints "clips frames fit_seconds peak_kib"
measure() {
  local name=$1 robot=$2 human=$3 dir="$WORK/$1"
  rm -rf "$dir"
  mkdir -p "$dir"
  actuary "$dir/demo-clips.log" "$BIN" demo-clips "$dir/clips" --robot-clips "$robot" --human-clips "$human" --check-clips 0
  spec "$name"
  actuary "$dir/prepare.log" "$BIN" run "$dir/spec.toml" --until align -j "$THREADS"
  # A kept BENCH_DIR may hold a finished fit: remove it so fit really runs.
  rm -rf "$dir/run/fit"
  local t0 t1
  t0=$(date +%s.%N)
  actuary "$dir/fit.log" /usr/bin/time -v -o "$dir/fit.time" \
    "$BIN" run "$dir/spec.toml" --until fit -j "$THREADS"
  t1=$(date +%s.%N)
  local clips frames skipped rss
  clips=$(jq -r '.counts.clips' "$dir/run/decode/manifest.json")
  frames=$(jq -r '.counts.frames' "$dir/run/decode/manifest.json")
  skipped=$(jq -r '.counts.skipped' "$dir/run/decode/manifest.json")
  if [ "$clips" != "$((robot + human))" ] || [ "$skipped" != "0" ]; then
    echo "$name: decode saw $clips clips, skipped $skipped (expected $((robot + human)), 0)" >&2
    exit 1
  fi
  if [ ! -f "$dir/run/fit/manifest.json" ]; then
    echo "$name: no fit manifest after the timed run; see $dir/fit.log" >&2
    exit 1
  fi
  rss=$(awk -F: '/Maximum resident set size/ {gsub(/ /, "", $2); print $2}' "$dir/fit.time")
  echo "$clips $frames $(echo "$t1 - $t0" | bc -l) $rss"
}

read -r c1 f1 s1 rss1 <<< "$(measure one "$ROBOT" "$HUMAN")"
read -r c10 f10 s10 rss10 <<< "$(measure ten $((ROBOT * 10)) $((HUMAN * 10)))"

mb() { echo "scale=1; $1 / 1024" | bc -l; }
ratio=$(echo "scale=3; $rss10 / $rss1" | bc -l)
verdict=$(echo "$ratio <= 1.10" | bc -l)
[ "$verdict" = 1 ] && verdict="meets" || verdict="MISSES"

cat <<REPORT
fit-stage peak RSS: demo clips, 64x64 at 10 fps, $STEPS steps, compare = false, -j $THREADS, $(nproc) cores
(fit-only run: decode and align were done by an earlier untimed run)

| size | clips | frames | fit peak RSS (MiB) | ratio to 1x | fit run (s) |
| --- | ---: | ---: | ---: | ---: | ---: |
| 1x | $c1 | $f1 | $(mb "$rss1") | 1.000 | $(printf %.1f "$s1") |
| 10x | $c10 | $f10 | $(mb "$rss10") | $ratio | $(printf %.1f "$s10") |

peak RSS 10x / 1x: $ratio (target <= 1.10: $verdict)
REPORT
