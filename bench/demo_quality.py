#!/usr/bin/env python3
"""Quality figures of one demo run, for the README (an evaluation, not a test).

Usage: cargo build --release && python3 bench/demo_quality.py [RUN] [--run]

With --run it first runs `target/release/actuary run pipeline-specs/tabletop.toml -j 2`
(RUN defaults to runs/tabletop) and reports the wall time. It then prints, from the
run's own outputs:
  - RUN/fit/metrics.json: per-dimension R^2 on labelled holdout clips and on the
    human clips against demo-clips/human-truth (evaluation only), for the
    semi-supervised model, the labelled-only model and the train-mean baseline;
  - RUN/label/calibration.json: 90% interval coverage per dimension and the
    expected calibration error of `confidence` on holdout clips;
  - RUN/align/manifest.json: the domain-gap figure before and after align.
Targets (issues 3-5): holdout mean R^2 >= 0.8; semi minus labelled-only on
human truth >= 0.1; coverage in [0.86, 0.94]; ECE <= 0.07; gap after <= half.
"""
import json
import subprocess
import sys
import time
from pathlib import Path

args = [a for a in sys.argv[1:] if not a.startswith("--")]
run = Path(args[0] if args else "runs/tabletop")
if "--run" in sys.argv:
    t0 = time.time()
    subprocess.run(["target/release/actuary", "run", "pipeline-specs/tabletop.toml", "-j", "2"], check=True)
    print(f"whole demo run: {time.time() - t0:.0f} s on 2 threads")

metrics = json.loads((run / "fit/metrics.json").read_text())
print("\n| model | evaluated on | " + " | ".join(f"R2 {d}" for d in metrics["action_dims"]) + " | mean R2 |")
print("| --- | --- |" + " --- |" * (len(metrics["action_dims"]) + 1))
for row in metrics["comparison"]:
    dims = " | ".join(f"{row['dims'][d]['r2']:.3f}" for d in metrics["action_dims"])
    print(f"| {row['model']} | {row['eval']} | {dims} | {row['mean_r2']:.3f} |")

cal = json.loads((run / "label/calibration.json").read_text())
print(f"\nholdout coverage at nominal {1 - cal['alpha']:.2f}: "
      + ", ".join(f"{d['dim']} {d['holdout_coverage']:.3f}" for d in cal["dims"]))
if cal.get("calib_motion_range"):
    print("holdout coverage on clips inside the calib motion range: "
          + ", ".join(f"{d['dim']} {d['holdout_coverage_in_range']:.3f}" for d in cal["dims"]
                      if d.get("holdout_coverage_in_range") is not None)
          + f" (beyond it: {', '.join(cal['holdout_beyond_range']) or 'none'})")
rel = cal["holdout_reliability"]
print(f"confidence on holdout: ECE {rel['ece']:.3f}, mean confidence {rel['mean_confidence']:.3f}, "
      f"accuracy {rel['accuracy']:.3f} (n {rel['n']})")

align = json.loads((run / "align/manifest.json").read_text())["summary"]
gb, ga = align.get("gap_before"), align.get("gap_after")
if gb is not None:
    print(f"domain gap (squared Frechet distance of frame features): before {gb:.1f}, after {ga:.1f}")
