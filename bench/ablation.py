#!/usr/bin/env python3
"""Align-stage ablation on the bundled demo (an evaluation script, not a CI test).

Runs the whole pipeline once per variant and reports, per variant:
  - the domain gap before / after align and the motion-rate ratio (RUN/align/manifest.json),
  - human-truth R^2 of `action_est` on the human clips (shards vs demo-clips/human-truth),
  - holdout R^2 of `action_est` against recorded `action` on labelled holdout clips (shards),
  - every R^2-like figure the fit stage reports (RUN/fit/manifest.json summary, flattened),
    which includes its labelled-only baseline.

Variants: all align parts on; align off (photometric off, speed off); photometric only;
speed only; model alignment term off (`[fit] align-weight = 0`, override with
ABLATION_NO_MODEL_ALIGN="key = value").

R^2 is 1 - SS_res / SS_tot per action dimension, averaged over dimensions (the same
definition as scikit-learn's r2_score with multioutput="uniform_average").

Usage: bench/ablation.py [--bin target/release/actuary] [--out bench/out/ablation] [-j 2]
                         [--only NAME ...]
The clips are the committed demo-clips/ (pass --regen to generate them afresh
into OUT/demo-clips with `actuary demo-clips`); --only runs just the named
variants (e.g. --only "align off").
Needs: python3 with numpy and pyarrow; a built actuary binary (built here when missing).
Writes OUT/ablation.json and prints a Markdown table for the README.
"""

import argparse
import glob
import json
import os
import re
import shutil
import subprocess
import sys

import numpy as np
import pyarrow.parquet as pq

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

VARIANTS = [
    ("align on", {"align": {}, "fit": {}}),
    ("align off", {"align": {"photometric": '"off"', "speed": '"off"'}, "fit": {}}),
    ("photometric only", {"align": {"speed": '"off"'}, "fit": {}}),
    ("speed only", {"align": {"photometric": '"off"'}, "fit": {}}),
    ("no model alignment term", {"align": {}, "fit": None}),
]


def spec_text(base_text, demo_dir, out_dir, extra):
    """The demo spec with absolute paths, its own run folder and extra keys per table."""
    text = base_text
    text = re.sub(r'(?m)^out\s*=.*$', f'out = "{out_dir}"', text)
    text = text.replace('"../demo-clips', f'"{demo_dir}')
    for table, keys in extra.items():
        if not keys:
            continue
        for k in keys:  # the base spec may set the key already (the demo sets align-weight)
            text = re.sub(rf'(?m)^{re.escape(k)}\s*=.*\n?', "", text)
        lines = "\n".join(f"{k} = {v}" for k, v in keys.items())
        header = f"[{table}]"
        if re.search(rf'(?m)^\[{table}\]\s*$', text):
            text = re.sub(rf'(?m)^\[{table}\]\s*$', header + "\n" + lines, text, count=1)
        else:
            text += f"\n{header}\n{lines}\n"
    return text


def r2(pred, true):
    pred, true = np.asarray(pred, float), np.asarray(true, float)
    scores = []
    for d in range(true.shape[1]):
        ss_tot = ((true[:, d] - true[:, d].mean()) ** 2).sum()
        if ss_tot > 0:
            scores.append(1.0 - ((true[:, d] - pred[:, d]) ** 2).sum() / ss_tot)
    return float(np.mean(scores)) if scores else float("nan")


def shard_rows(run):
    files = sorted(glob.glob(os.path.join(run, "shard", "*.parquet")))
    if not files:
        return None
    cols = ["clip", "set", "labelled", "frame", "action", "action_est", "split"]
    return [r for f in files for r in pq.read_table(f, columns=cols).to_pylist()]


def human_truth_r2(rows, truth_dir):
    pred, true = [], []
    cache = {}
    for r in rows:
        if r["labelled"] or r["action_est"] is None:
            continue
        path = os.path.join(truth_dir, r["clip"] + ".actions.csv")
        if path not in cache:
            cache[path] = np.loadtxt(path, delimiter=",", skiprows=1, ndmin=2)[:, 1:] if os.path.exists(path) else None
        t = cache[path]
        if t is None or r["frame"] >= len(t):
            continue
        pred.append(r["action_est"])
        true.append(t[r["frame"]])
    return r2(pred, true) if pred else None


def holdout_r2(rows):
    pairs = [(r["action_est"], r["action"]) for r in rows
             if r["labelled"] and r["split"] == "holdout" and r["action"] is not None and r["action_est"] is not None]
    return r2([p for p, _ in pairs], [t for _, t in pairs]) if pairs else None


def flatten(value, prefix=""):
    if isinstance(value, dict):
        for k, v in value.items():
            yield from flatten(v, f"{prefix}.{k}" if prefix else k)
    elif isinstance(value, list):
        for i, v in enumerate(value):
            yield from flatten(v, f"{prefix}[{i}]")
    else:
        yield prefix, value


def read_manifest(run, stage):
    p = os.path.join(run, stage, "manifest.json")
    return json.load(open(p)) if os.path.exists(p) else None


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--bin", default=os.path.join(ROOT, "target", "release", "actuary"))
    ap.add_argument("--out", default=os.path.join(ROOT, "bench", "out", "ablation"))
    ap.add_argument("--spec", default=os.path.join(ROOT, "pipeline-specs", "tabletop.toml"))
    ap.add_argument("-j", "--threads", default="2")
    ap.add_argument("--only", nargs="*", help="variant names to run (default: all)")
    ap.add_argument("--regen", action="store_true", help="regenerate the demo clips instead of using demo-clips/")
    args = ap.parse_args()
    # The spec's `out` is resolved against the spec file's folder, which is
    # inside OUT: a relative OUT would nest there.
    args.out = os.path.abspath(args.out)
    if not os.path.exists(args.bin):
        subprocess.run(["cargo", "build", "--release", "--bin", "actuary"], cwd=ROOT, check=True)
    os.makedirs(args.out, exist_ok=True)
    demo = os.path.join(ROOT, "demo-clips")
    if args.regen:
        demo = os.path.join(args.out, "demo-clips")
        if not os.path.isdir(demo):
            subprocess.run([args.bin, "demo-clips", demo], check=True)
    base_text = open(args.spec).read()
    no_align = os.environ.get("ABLATION_NO_MODEL_ALIGN", "align-weight = 0")
    results = []
    first_run = None
    for name, extra in VARIANTS:
        if args.only and name not in args.only:
            continue
        extra = dict(extra)
        if extra["fit"] is None:
            k, v = [x.strip() for x in no_align.split("=", 1)]
            extra["fit"] = {k: v}
        slug = re.sub(r"[^a-z0-9]+", "-", name)
        run = os.path.join(args.out, "runs", slug)
        spec_path = os.path.join(args.out, f"{slug}.toml")
        with open(spec_path, "w") as f:
            f.write(spec_text(base_text, demo, run, extra))
        if first_run and not os.path.isdir(os.path.join(run, "decode")):
            # Same decode settings: reuse the first run's decode output (its stage key matches).
            os.makedirs(run, exist_ok=True)
            shutil.copytree(os.path.join(first_run, "decode"), os.path.join(run, "decode"))
        print(f"== {name}: actuary run {spec_path}", file=sys.stderr)
        proc = subprocess.run([args.bin, "run", spec_path, "-j", args.threads],
                              env={**os.environ, "ACTUARY_QUIET": "1"})
        first_run = first_run or run
        entry = {"variant": name, "spec": spec_path, "exit": proc.returncode}
        align = read_manifest(run, "align")
        if align:
            s = align["summary"]
            entry.update(gap_before=s.get("gap_before"), gap_after=s.get("gap_after"),
                         motion_ratio=s.get("motion_ratio"), resampled=s.get("resampled"))
        rows = shard_rows(run)
        if rows:
            entry["human_truth_r2"] = human_truth_r2(rows, os.path.join(demo, "human-truth"))
            entry["holdout_r2"] = holdout_r2(rows)
        fit = read_manifest(run, "fit")
        if fit:
            entry["fit_figures"] = {k: v for k, v in flatten(fit.get("summary", {}))
                                    if isinstance(v, (int, float)) and re.search(r"r2|r_2|rsq", k, re.I)}
        results.append(entry)
    with open(os.path.join(args.out, "ablation.json"), "w") as f:
        json.dump(results, f, indent=2)

    def fmt(v):
        return "-" if v is None else (f"{v:.3f}" if isinstance(v, float) else str(v))

    print("| variant | gap before | gap after | motion ratio | holdout R^2 | human-truth R^2 |")
    print("| --- | --- | --- | --- | --- | --- |")
    for e in results:
        print(f"| {e['variant']} | {fmt(e.get('gap_before'))} | {fmt(e.get('gap_after'))} | "
              f"{fmt(e.get('motion_ratio'))} | {fmt(e.get('holdout_r2'))} | {fmt(e.get('human_truth_r2'))} |")


if __name__ == "__main__":
    main()
