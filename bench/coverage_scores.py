#!/usr/bin/env python3
"""Holdout coverage under other conformal scores (an evaluation, not a test).

Usage: python3 bench/coverage_scores.py RUN

Reads RUN/shard/*.parquet and RUN/label/calibration.json of a finished run,
recovers each labelled transition's uncalibrated std (action_std * z / q, as
the label stage stored it), and re-runs split conformal calibration on the
`calib` clips with other nonconformity scores, measuring 90% coverage on the
`holdout` clips, overall and on the worst-covered clip:

  - normalised |a - est| / std (what the label stage uses);
  - absolute |a - est| (constant-width intervals);
  - regularised |a - est| / (std + b * median calib std), b in 0.1 .. 2
    (the normalised nonconformity measure with a sensitivity parameter;
    Papadopoulos, Vovk & Gammerman 2011, "Regression conformal prediction
    with nearest neighbours", JAIR 40; cited from memory);
  - |a - est| / sqrt(std);
  - |a - est| / (std + b * |est|), errors that grow with the action's size
    (a choice of b read off these holdout figures would be tuned on the
    evaluation clips, so it only shows the trade-off).

It then re-deals the run's calib and holdout clips: over every way of choosing
as many calib clips from the pooled calib + holdout clips as the run had (all
of them when there are at most 20 000 ways, else a seeded sample), it
calibrates on the chosen clips and measures coverage on the rest, with the
normalised score. Split conformal prediction promises coverage in
[1 - alpha, 1 - alpha + 1/(n+1)] on average over such draws (Angelopoulos &
Bates 2021, theorem 1, for exchangeable transitions); the spread across draws
shows how far one draw of a few clips can land from it.

It also prints per-clip coverage on calib and holdout under the normalised
score, which shows whether a shortfall is one of the score or of the clips.
"""
import itertools
import json
import math
import sys
from pathlib import Path

import numpy as np
import pyarrow.dataset as ds

run = Path(sys.argv[1] if len(sys.argv) > 1 else "runs/tabletop")
cal = json.loads((run / "label/calibration.json").read_text())
z, alpha = cal["z"], cal["alpha"]
qs = np.array([d["quantile"]["q"] for d in cal["dims"]])
names = [d["dim"] for d in cal["dims"]]
files = sorted(str(p) for p in (run / "shard").glob("*.parquet"))
t = ds.dataset(files, format="parquet").to_table(
    columns=["clip", "split", "labelled", "action", "action_est", "action_std"]).to_pydict()
keep = [i for i in range(len(t["clip"]))
        if t["labelled"][i] and t["split"][i] in ("calib", "holdout")
        and t["action"][i] is not None and t["action_est"][i] is not None]
A = np.array([t["action"][i] for i in keep])
E = np.array([t["action_est"][i] for i in keep])
S = np.array([t["action_std"][i] for i in keep])
split = np.array([t["split"][i] for i in keep])
clips = np.array([t["clip"][i] for i in keep])
raw = S * z / qs
err = np.abs(A - E)
calib, hold = split == "calib", split == "holdout"


def conformal_q(scores):
    """Split conformal quantile: the ceil((n+1)(1-alpha))-th smallest score."""
    n = len(scores)
    return np.sort(scores)[math.ceil((n + 1) * (1 - alpha) - 1e-9) - 1]


def coverage(mask, d, q, den):
    return float((err[mask, d] <= q * den[mask]).mean())


def variant(name, denom):
    cells = []
    for d, dim in enumerate(names):
        den = denom(d)
        q = conformal_q(err[calib, d] / den[calib])
        per = [coverage(hold & (clips == c), d, q, den) for c in sorted(set(clips[hold]))]
        cells.append(f"{dim} {coverage(hold, d, q, den):.3f} (worst clip {min(per):.2f})")
    print(f"| {name} | " + " | ".join(cells) + " |")


print(f"holdout coverage at nominal {1 - alpha:.2f} ({hold.sum()} holdout, {calib.sum()} calib transitions)")
print("| score | " + " | ".join(names) + " |")
print("| --- |" + " --- |" * len(names))
variant("normalised (used)", lambda d: raw[:, d])
variant("absolute", lambda d: np.ones(len(raw)))
for b in (0.1, 0.25, 0.5, 1.0, 2.0):
    variant(f"regularised, b = {b}", lambda d, b=b: raw[:, d] + b * np.median(raw[calib, d]))
variant("sqrt(std)", lambda d: np.sqrt(raw[:, d]))
for b in (0.1, 0.3, 0.5):
    variant(f"std + {b} * abs(est)", lambda d, b=b: raw[:, d] + b * np.abs(E[:, d]))
print("\nper clip: transitions, mean |action|, mean |error|, mean uncalibrated std, coverage (normalised score)")
for d, dim in enumerate(names):
    q = conformal_q(err[calib, d] / raw[calib, d])
    print(f"| {dim}: clip | split | n | mean abs action | mean abs error | mean std | coverage |")
    print("| --- | --- | --- | --- | --- | --- | --- |")
    for c in sorted(set(clips)):
        m = clips == c
        print(f"| {c} | {split[m][0]} | {m.sum()} | {np.abs(A[m, d]).mean():.3f} | {err[m, d].mean():.3f} "
              f"| {raw[m, d].mean():.3f} | {coverage(m, d, q, raw[:, d]):.2f} |")


print("\nre-dealt splits of the calib + holdout clips (normalised score)")
pool = sorted(set(clips))
n_calib = len(set(clips[calib]))
if math.comb(len(pool), n_calib) <= 20000:
    combos = list(itertools.combinations(range(len(pool)), n_calib))
else:
    rng = np.random.default_rng(7)  # one generator: a fresh one per draw would repeat one draw
    combos = [tuple(sorted(rng.choice(len(pool), n_calib, replace=False))) for _ in range(20000)]
print(f"{len(pool)} clips, {n_calib} for calibration, {len(combos)} splits")
print("| dim | mean coverage | 5th-95th percentile | min-max | share of splits in [0.86, 0.94] | this run |")
print("| --- | --- | --- | --- | --- | --- |")
for d, dim in enumerate(names):
    scores = err[:, d] / raw[:, d]
    per_clip = [scores[clips == c] for c in pool]
    covs = []
    for combo in combos:
        chosen = set(combo)
        q = conformal_q(np.concatenate([per_clip[i] for i in chosen]))
        rest = np.concatenate([per_clip[i] for i in range(len(pool)) if i not in chosen])
        covs.append(float((rest <= q).mean()))
    covs = np.array(covs)
    q = conformal_q(scores[calib])
    print(f"| {dim} | {covs.mean():.3f} | {np.percentile(covs, 5):.3f}-{np.percentile(covs, 95):.3f} "
          f"| {covs.min():.3f}-{covs.max():.3f} | {((covs >= 0.86) & (covs <= 0.94)).mean():.2f} "
          f"| {float((scores[hold] <= q).mean()):.3f} |")
