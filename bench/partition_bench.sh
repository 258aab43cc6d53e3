#!/usr/bin/env bash
# Decode speed-up from partitions through the local Slurm (benchmark, not a test).
#
#   bash .ci/slurm.sh start
#   bash bench/partition_bench.sh [ROBOT_CLIPS] [HUMAN_CLIPS] [SIZE]
#
# Generates the demo clips (SIZE x SIZE pixels, default 256, so that decoding,
# not Slurm's scheduling, is most of the work) and COPIES more copies of
# each under new names (env, default 9), then decodes the same clips twice through Slurm in
# one go: as 1 part (one task, 1 CPU) and as 2 parts (two tasks, 1 CPU each),
# each into a fresh run folder. Wall time is from `actuary submit` to the
# merged stage manifest's appearance (watched with a cheap file test); the per-part overhead is that wall time minus the
# slowest part's own time (submission, scheduling, start-up and merge).
# BIN overrides the program (default: target/release/actuary, built if missing).
set -euo pipefail
cd "$(dirname "$0")/.."
ROBOT="${1:-40}"
HUMAN="${2:-40}"
SIZE="${3:-256}"
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

read -r W1 S1 M1 F1 D1 < <(measure one 1)
read -r W2 S2 M2 F2 D2 < <(measure two 2)
python3 - "$W1" "$S1" "$M1" "$F1" "$D1" "$W2" "$S2" "$M2" "$F2" "$D2" "$ROBOT" "$HUMAN" "$(nproc)" "$SIZE" <<'EOF'
import sys
w1, s1, m1, f1, d1, w2, s2, m2, f2, d2 = map(float, sys.argv[1:11])
robot, human, cores, size = sys.argv[11], sys.argv[12], sys.argv[13], sys.argv[14]
print(f"decode through local Slurm, {robot}+{human} demo clips of {size}x{size} px, {int(f1)} frames decoded to 64x64, {cores} cores")
print("| parts | wall s | slowest part s | overhead s | merge s | frames/s per core |")
print("| --- | --- | --- | --- | --- | --- |")
for n, w, s, m, f, d in [(1, w1, s1, m1, f1, d1), (2, w2, s2, m2, f2, d2)]:
    print(f"| {n} | {w:.2f} | {s:.2f} | {w - s:.2f} | {m:.2f} | {f / d:.0f} |")
print(f"speed-up (wall, 1 part / 2 parts): {w1 / w2:.2f}x")
rate = f1 / d1
night = 8 * 3600
for nodes in (4, 16, 64):
    print(f"one night (8 h) on {nodes} nodes x 16 cores at {rate:.0f} frames/s per core: "
          f"{rate * 16 * nodes * night / 1e9:.2f} billion frames ({rate * 16 * nodes * night / 10 / 3600:.0f} h of 10 fps video)")
EOF
