#!/usr/bin/env bash
# Training throughput of the fit stage's network: candle (this crate) against
# the same network and step in PyTorch CPU, on the same thread count.
# PyTorch is installed from PyPI into target/bench-venv-torch only when this runs
# (never in CI). Usage: bench/train_bench.sh [THREADS] [STEPS]
set -euo pipefail
cd "$(dirname "$0")/.."
THREADS="${1:-2}"
STEPS="${2:-30}"
# Candle's elementwise kernels use their own spinning worker pool sized by
# CANDLE_NUM_THREADS; the rayon pool bounds the matrix products.
export CANDLE_NUM_THREADS="${CANDLE_NUM_THREADS:-$THREADS}"
cargo build --release --example train_bench >/dev/null
candle=$(target/release/examples/train_bench --threads "$THREADS" --steps "$STEPS")
echo "$candle"
VENV="${TORCH_VENV:-target/bench-venv-torch}"
if ! "$VENV/bin/python" -c "import torch" 2>/dev/null; then
  python3 -m venv "$VENV"
  "$VENV/bin/pip" install --quiet torch
fi
torch=$("$VENV/bin/python" bench/train_torch.py --threads "$THREADS" --steps "$STEPS")
echo "$torch"
python3 - "$candle" "$torch" <<'EOF'
import json, sys
c, t = json.loads(sys.argv[1]), json.loads(sys.argv[2])
print(f"candle {c['pairs_per_s']} pairs/s, torch {t['pairs_per_s']} pairs/s on {c['threads']} threads: "
      f"ratio candle/torch = {c['pairs_per_s'] / t['pairs_per_s']:.2f}")
EOF
