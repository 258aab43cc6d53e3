#!/usr/bin/env bash
# Shard stage MB/s against pyarrow writing the same table (same zstd level,
# row-group size, no dictionary/statistics on `image`, PNG bytes precomputed
# for pyarrow), and label throughput (transitions/s on 2 threads with the fit
# stage's default network). One run, release build. Needs python3 + pyarrow.
# Each writer's figure is the best of 3 fresh writes (ACTUARY_BENCH_REPEAT and
# REPEAT change that); pyarrow is timed without and with an fsync per file
# (the shard stage syncs each shard before renaming it into place).
set -euo pipefail
cd "$(dirname "$0")/.."
work="${BENCH_DIR:-$(mktemp -d)}"
# A folder of our own (no BENCH_DIR) holds about 1.2 GB of runs: removed at exit.
[ -n "${BENCH_DIR:-}" ] || trap 'rm -rf "$work"' EXIT
export ACTUARY_BENCH_RUN="$work/run"
cargo test --release --test it -- --ignored --nocapture --test-threads 1 shard::bench::bench_shard_stage 2>&1 | grep -o 'BENCH {.*}'
for image in png raw; do
  rm -rf "$work/pyarrow-$image"
  python3 bench/pyarrow_write.py "$work/run/shard-$image" "$work/pyarrow-$image" | grep '^BENCH'
done
export ACTUARY_BENCH_RUN="$work/run-label"
cargo test --release --test it -- --ignored --nocapture --test-threads 1 shard::bench::bench_label_throughput 2>&1 | grep -o 'BENCH {.*}'
