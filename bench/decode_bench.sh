#!/usr/bin/env bash
# Decode-stage benchmark (not a test): on the same 640x480 H.264 clips and the
# same thread count, times actuary's decode stage (`actuary run --until decode`)
# against `ffmpeg -threads N -i CLIP -vf scale=W:H -pix_fmt rgb24 -f rawvideo -`
# (one CLI run per clip, in turn), prints frames/s for both and their ratio,
# and the peak RSS (/usr/bin/time -v) of the decode stage on 1x and 10x clips.
#
# Usage: bench/decode_bench.sh            (env: THREADS=2 CLIPS=8 SECS=10 W=64 H=48)
# Needs: ffmpeg, /usr/bin/time, a release build (built here when missing).
set -euo pipefail

THREADS=${THREADS:-2}
CLIPS=${CLIPS:-8}
SECS=${SECS:-10}
FPS=30
W=${W:-64}
H=${H:-48}
ROOT=$(cd "$(dirname "$0")/.." && pwd)
OUT=${OUT:-$ROOT/bench/out/decode}
BIN=${ACTUARY:-$ROOT/target/release/actuary}

if [ ! -x "$BIN" ]; then
  (cd "$ROOT" && cargo build --release --bin actuary)
fi
mkdir -p "$OUT/clips1" "$OUT/clips10"

# The clips: FFmpeg's testsrc2 pattern with moving noise so each clip differs,
# 640x480, 30 fps, H.264 yuv420p.
for i in $(seq 1 "$CLIPS"); do
  clip="$OUT/clips1/c$i.mp4"
  if [ ! -f "$clip" ]; then
    ffmpeg -y -v error -f lavfi -i "testsrc2=size=640x480:rate=$FPS:duration=$SECS" \
      -vf "noise=alls=12:allf=t+u:all_seed=$i" -c:v libx264 -preset veryfast -pix_fmt yuv420p "$clip"
  fi
done
# The spec needs a labelled set: give every clip a one-dimension action log.
for i in $(seq 1 "$CLIPS"); do
  printf 't,dx\n0,0\n1,0\n' > "$OUT/clips1/c$i.actions.csv"
done
# 10x: every clip ten times under different ids.
for i in $(seq 1 "$CLIPS"); do
  for j in $(seq 1 10); do
    [ -f "$OUT/clips10/c$i-$j.mp4" ] || cp "$OUT/clips1/c$i.mp4" "$OUT/clips10/c$i-$j.mp4"
    cp "$OUT/clips1/c$i.actions.csv" "$OUT/clips10/c$i-$j.actions.csv"
  done
done
frames1=$((CLIPS * SECS * FPS))
frames10=$((frames1 * 10))

spec() { # spec NAME CLIPDIR
  cat > "$OUT/$1.toml" <<SPEC
out = "run-$1"
[sets.bench]
dir = "$2"
labelled = true
[decode]
fps = $FPS
size = [$W, $H]
SPEC
}
spec one clips1
spec ten clips10

# run_stage NAME -> prints "seconds peak_kib"
run_stage() {
  rm -rf "$OUT/run-$1"
  local t0 t1
  t0=$(date +%s.%N)
  if ! ACTUARY_QUIET=1 /usr/bin/time -v -o "$OUT/$1.time" "$BIN" run "$OUT/$1.toml" --until decode \
    -j "$THREADS" > "$OUT/$1.log" 2>&1; then
    echo "actuary run failed, see $OUT/$1.log:" >&2
    tail -5 "$OUT/$1.log" >&2
    exit 1
  fi
  t1=$(date +%s.%N)
  local rss
  rss=$(awk -F: '/Maximum resident set size/ {gsub(/ /, "", $2); print $2}' "$OUT/$1.time")
  echo "$(echo "$t1 - $t0" | bc -l) $rss"
}

# cli FLAGS -> seconds for every 1x clip through the CLI, in turn
cli() {
  local t0 t1
  t0=$(date +%s.%N)
  for c in "$OUT"/clips1/*.mp4; do
    ffmpeg -v error -threads "$THREADS" -i "$c" -vf "scale=$W:$H$1" -pix_fmt rgb24 -f rawvideo - > /dev/null
  done
  t1=$(date +%s.%N)
  echo "$t1 - $t0" | bc -l
}

r1=$(run_stage one)
r10=$(run_stage ten)
read -r s1 rss1 <<< "$r1"
read -r s10 rss10 <<< "$r10"
c_default=$(cli "")
c_same=$(cli ":flags=area+accurate_rnd+full_chroma_int")

fps() { echo "scale=0; $1 / $2" | bc -l; }
a1=$(fps "$frames1" "$s1")
a10=$(fps "$frames10" "$s10")
cd_=$(fps "$frames1" "$c_default")
cs_=$(fps "$frames1" "$c_same")
ratio=$(echo "scale=2; $a1 / $cd_" | bc -l)
ratio_same=$(echo "scale=2; $a1 / $cs_" | bc -l)
rss_ratio=$(echo "scale=3; $rss10 / $rss1" | bc -l)

cat <<REPORT
decode benchmark: $CLIPS clips x ${SECS}s, 640x480 H.264 30 fps -> ${W}x${H} RGB, $THREADS threads, $(nproc) cores
  actuary decode stage (1x, $frames1 frames):   ${a1} frames/s  ($(printf %.2f "$s1") s, peak RSS ${rss1} KiB)
  actuary decode stage (10x, $frames10 frames): ${a10} frames/s  ($(printf %.2f "$s10") s, peak RSS ${rss10} KiB)
  ffmpeg -threads $THREADS -vf scale=$W:$H (bicubic):   ${cd_} frames/s  ratio actuary/CLI ${ratio}
  ffmpeg same flags (area+accurate_rnd+full_chroma_int): ${cs_} frames/s  ratio ${ratio_same}
  peak RSS 10x / 1x: ${rss_ratio}
REPORT
