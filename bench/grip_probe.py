#!/usr/bin/env python3
"""Is the demo gripper's open/closed state visible in the decoded frames?
(An evaluation script, not a test.)

Usage: python3 bench/grip_probe.py [RUN] [CLIPS]   (defaults: runs/tabletop, demo-clips)

Reads RUN/decode/clips/robot/*.frames (the decode stage's frame stores: a
64-byte header with width, height and frame count as little-endian u32 at
bytes 12, 16 and 20, then RGB8 frames) and the robot logs in CLIPS/robot. For
each transition k it crops 24x24 grey pixels of frame k+1 centred on the
orange wrist marker (found by colour) and labels it with the grip command at
the transition's start (what frame k+1 shows, see src/demo/scene.rs). A
scikit-learn logistic regression is fitted on clips 0-15 and scored on clips
16-19, against the majority-class rate. A probe well above the base rate
means the state survives decoding and resizing, so a model that does not
learn it is limited by learning, not by the pixels.
"""
import glob
import os
import sys

import numpy as np
from sklearn.linear_model import LogisticRegression

run = sys.argv[1] if len(sys.argv) > 1 else "runs/tabletop"
clips = sys.argv[2] if len(sys.argv) > 2 else "demo-clips"
X, y, g = [], [], []
for ci, f in enumerate(sorted(glob.glob(os.path.join(run, "decode/clips/robot/*.frames")))):
    raw = open(f, "rb").read()
    w, h, n = (int.from_bytes(raw[o:o + 4], "little") for o in (12, 16, 20))
    frames = np.frombuffer(raw[64:], np.uint8).reshape(n, h, w, 3).astype(np.float32) / 255
    log = os.path.join(clips, "robot", os.path.basename(f).replace(".frames", ".actions.csv"))
    grip = np.loadtxt(log, delimiter=",", skiprows=1)[:, 3]
    ticks = len(grip) / max(n, 1)  # log rows per frame interval
    for k in range(n - 1):
        im = frames[k + 1]
        orange = (im[..., 0] > 0.7) & (im[..., 1] > 0.35) & (im[..., 1] < 0.65) & (im[..., 2] < 0.3)
        if not orange.any():
            continue
        cy, cx = np.argwhere(orange).mean(0).round().astype(int)
        padded = np.pad(im, ((12, 12), (12, 12), (0, 0)), mode="edge")
        X.append(padded[cy:cy + 24, cx:cx + 24].mean(-1).ravel())
        y.append(int(grip[min(int(round(k * ticks)), len(grip) - 1)]))
        g.append(ci)
X, y, g = np.array(X), np.array(y), np.array(g)
test = g >= 16
clf = LogisticRegression(max_iter=2000).fit(X[~test], y[~test])
base = max(y[test].mean(), 1 - y[test].mean())
print(f"transitions with the marker in view: {len(y)}; train accuracy {clf.score(X[~test], y[~test]):.3f}; "
      f"held-out clips 16-19: accuracy {clf.score(X[test], y[test]):.3f} against a base rate of {base:.3f}")
