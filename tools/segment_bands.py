#!/usr/bin/env python3
"""Score `nephocast segment` against an independent scene's true masks by zenith band, split by
angle from the sun (within 40 degrees, or not). A diagnostic for the far field and the sun's
glow; every 15th frame.

    NEPHOCAST_DATASETS=../shared/datasets python3 tools/segment_bands.py \\
        camera2-breaking-overcast WORK/camera2/site.toml [--bin target/release/nephocast]

The site file is one written by `tools/independent_scenes.py` (camera and library from
`calibrate`). Zenith and sun angle come from the scene's true camera, for scoring only.
Needs numpy, pandas and opencv-python-headless.
"""
import argparse, glob, json, os, subprocess, sys, tempfile

import cv2
import numpy as np
import pandas as pd

ap = argparse.ArgumentParser()
ap.add_argument("scene")
ap.add_argument("site")
ap.add_argument("--bin", default="target/release/nephocast")
a = ap.parse_args()
root = os.path.join(os.environ.get("NEPHOCAST_DATASETS") or sys.exit("NEPHOCAST_DATASETS is not set"), "independent-scenes")
sys.path.insert(0, root)
import skycommon as sc  # noqa: E402

D = os.path.join(root, a.scene)
frames = sorted(glob.glob(D + "/input/frames/*.jpg"))[::15]
out = tempfile.mkdtemp(prefix="segbands-")
subprocess.run([a.bin, "segment", "--out", out, "--site", a.site] + frames, check=True, capture_output=True)
cam = json.load(open(D + "/truth/camera.json"))
truth = pd.read_csv(D + "/truth/truth.csv").set_index("frame")
dw, _, _ = sc.pixel_rays(cam)
z = np.degrees(np.arccos(np.clip(dw[..., 2], -1, 1)))
bands = [0, 40, 60, 70, 75, 80, 85, 90]
tot = {}
for f in frames:
    stem = os.path.basename(f)[:-4]
    r = truth.loc[os.path.basename(f)]
    sun = np.array(sc.enu_from_zen_az(r.sun_zenith_deg, r.sun_azimuth_deg))
    gamma = np.degrees(np.arccos(np.clip((dw * sun).sum(-1), -1, 1)))
    c = cv2.imread(f"{out}/{stem}_classes.png", 0)
    t = cv2.imread(f"{D}/truth/masks/{stem}.png", 0) > 0
    for lo, hi in zip(bands[:-1], bands[1:]):
        for near in (False, True):
            m = (z >= lo) & (z < hi) & (c > 0) & ((gamma < 40) == near)
            s = tot.setdefault((lo, hi, near), np.zeros(5))
            s += [m.sum(), ((c >= 2) == t)[m].sum(), t[m].sum(), (c >= 2)[m].sum(), ((c == 3) & t)[m].sum()]
print("zenith  sun-angle  samples  right  true-cloud  called-cloud  true-cloud-called-thick")
for (lo, hi, near), s in sorted(tot.items()):
    if s[0] == 0:
        continue
    print(f"{lo:2d}-{hi:2d}  {'<40' if near else '>=40':>9}  {int(s[0]):7d}  {s[1]/s[0]:.3f}  {s[2]/s[0]:10.2f}  {s[3]/s[0]:12.2f}  {s[4]/max(s[2],1):.2f}")
