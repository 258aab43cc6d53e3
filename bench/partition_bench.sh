#!/usr/bin/env bash
# Decode speed-up from partitions through the local Slurm (benchmark, not a test).
#
#   bash .ci/slurm.sh start
#   bash bench/partition_bench.sh [ROBOT_CLIPS] [HUMAN_CLIPS] [SIZE]
#   (env: COPIES, REPEATS, BIN)
#
# Generates the demo clips (SIZE x SIZE pixels, default 480, near the 640x480
# of common robot cameras (common practice, no source), so that decoding,
# not Slurm's scheduling, is most of the work) and COPIES more copies of
# each under new names (env, default 9), then decodes the same clips through
# Slurm as 1 part (one task, 1 CPU) and as 2 parts (two tasks, 1 CPU each),
# REPEATS rounds of both (env, default 3), each run into a fresh run folder,
# and prints every run and the median speed-up. Wall time is from `actuary submit` to the
# merged stage manifest's appearance (watched with a cheap file test); the per-part overhead is that wall time minus the
# slowest part's own time (submission, scheduling, start-up and merge).
# BIN overrides the program (default: target/release/actuary, built if missing).
set -euo pipefail
cd "$(dirname "$0")/.."
ROBOT="${1:-40}"
HUMAN="${2:-40}"
SIZE="${3:-480}"
BIN="${BIN:-target/release/actuary}"
[ -x "$BIN" ] || cargo build --release --bin actuary >/dev/null
BIN="$(realpath "$BIN")"
WORK="$(mktemp -d)"
trap 'rm -rf "$WORK"' EXIT
"$BIN" demo-clips "$WORK/d" --robot-clips "$ROBOT" --human-clips "$HUMAN" --check-clips 0 --size "$SIZE" >/dev/null
# COPIES extra copies of every clip (and sidecar) under new names: more decode
# work per run without rendering more clips (default 9, so 10x the clips).
COPIES="${COPIES:-9}"
for dir in "$WORK/d/robot" "$WORK/d/human"; do
  for f in "$dir"/*.mp4; do
    base="${f%.mp4}"
    for c in $(seq 1 "$COPIES"); do
      cp "$f" "$base-copy$c.mp4"
      [ -f "$base.actions.csv" ] && cp "$base.actions.csv" "$base-copy$c.actions.csv"
    done
  done
done

spec() { # name parts
  cat >"$WORK/$1.toml" <<EOF
out = "run-$1"
[sets.robot]
dir = "d/robot"
labelled = true
[sets.human]
dir = "d/human"
labelled = false
[decode]
fps = 10
size = [64, 64]
[actions]
map = { dx = "sum", dy = "sum", grip = "hold" }
[cluster]
parts = $2
[cluster.jobs.default]
cpus-per-task = 1
mem = "1G"
time = "60"
EOF
}

wait_jobs() { # ids...
  local ids
  ids="$(echo "$@" | tr ' ' ',')"
  while [ -n "$(squeue -h -o %i -j "$ids" 2>/dev/null)" ]; do sleep 0.2; done
}

# Waits for FILE, checking every 0.05 s from one Python process: polling
# squeue as often would take CPU from the decoding tasks on a 2-core machine
# (each call is a process and a request to slurmctld), and so would a shell
# loop that starts a `sleep` process 20 times a second; either hurts the
# 2-part run more than the 1-part run, whose second core is free.
wait_file() { # file
  python3 -c 'import os, sys, time
while not os.path.isfile(sys.argv[1]):
    time.sleep(0.05)' "$1"
}

measure() { # name parts -> "wall slowest merge frames"
  spec "$1" "$2"
  local t0 t1 out ids
  t0="$(date +%s.%N)"
  out="$(ACTUARY_QUIET=1 "$BIN" submit "$WORK/$1.toml" --until decode)"
  ids="$(echo "$out" | awk '$2 == "job" {print $3}')"
  wait_file "$WORK/run-$1/decode/manifest.json"
  t1="$(date +%s.%N)"
  wait_jobs $ids
  python3 - "$WORK/run-$1/decode/manifest.json" "$t0" "$t1" <<'EOF'
import json, sys
m = json.load(open(sys.argv[1]))
wall = float(sys.argv[3]) - float(sys.argv[2])
t = m['timings']
print(f"{wall:.2f} {t['slowest_part_s']:.2f} {t['merge_s']:.2f} {m['counts']['frames']} {t['decode_s']:.2f}")
EOF
}

# REPEATS (env, default 3) rounds, each a 1-part run then a 2-part run, so
# that both see the same drift of a shared machine; every run starts from a
# fresh run folder.
REPEATS="${REPEATS:-3}"
ROWS="$WORK/rows.txt"
: >"$ROWS"
for r in $(seq 1 "$REPEATS"); do
  echo "1 $(measure "one$r" 1)" >>"$ROWS"
  rm -rf "$WORK/run-one$r"
  echo "2 $(measure "two$r" 2)" >>"$ROWS"
  rm -rf "$WORK/run-two$r"
done
python3 - "$ROWS" "$ROBOT" "$HUMAN" "$(nproc)" "$SIZE" <<'EOF'
import statistics, sys
rows = [line.split() for line in open(sys.argv[1])]
robot, human, cores, size = sys.argv[2:6]
runs = {1: [], 2: []}
for parts, wall, slowest, merge, frames, decode in rows:
    runs[int(parts)].append(tuple(map(float, (wall, slowest, merge, frames, decode))))
frames = int(runs[1][0][3])
print(f"decode through local Slurm, {robot}+{human} demo clips of {size}x{size} px, {frames} frames decoded to 64x64, {cores} cores, {len(runs[1])} rounds")
print("| round | parts | wall s | slowest part s | overhead s | merge s | frames/s per core |")
print("| --- | --- | --- | --- | --- | --- | --- |")
for i, (one, two) in enumerate(zip(runs[1], runs[2]), 1):
    for n, (w, s, m, f, d) in ((1, one), (2, two)):
        print(f"| {i} | {n} | {w:.2f} | {s:.2f} | {w - s:.2f} | {m:.2f} | {f / d:.0f} |")
ratios = [one[0] / two[0] for one, two in zip(runs[1], runs[2])]
print("speed-up per round (wall, 1 part / 2 parts): " + ", ".join(f"{r:.2f}x" for r in ratios))
print(f"median speed-up: {statistics.median(ratios):.2f}x")
rate = statistics.median(f / d for (_, _, _, f, d) in runs[1])
night = 8 * 3600
for nodes in (4, 16, 64):
    print(f"one night (8 h) on {nodes} nodes x 16 cores at {rate:.0f} frames/s per core: "
          f"{rate * 16 * nodes * night / 1e9:.2f} billion frames ({rate * 16 * nodes * night / 10 / 3600:.0f} h of 10 fps video)")
EOF
