#!/usr/bin/env python3
"""Write a copy of an independent-renderer scene as an auto-exposing camera would have taken it (a
robustness probe, not a tuning target).

Each cloudy frame is scaled by a gain that brings its mean level toward ``--target-mean`` (at least
1, at most ``--max-gain``): a camera that holds its exposure for the clear sky brightens darker,
cloudier frames. The scaled frames are written as JPEG (quality 92); every other file of the scene
folder (truth, inputs, the other scenes, the scorer) is linked, so the harness runs on the copy
unchanged:

    python3 tools/exposure_scene.py --scene camera2-breaking-overcast --out /tmp/bright
    NEPHOCAST_DATASETS=/tmp/bright python3 tools/independent_scenes.py --bin target/release/nephocast \\
        --camera-from calibrate --work /tmp/W-bright --json /tmp/J-bright.json --no-measurements

Reads ``$NEPHOCAST_DATASETS/independent-scenes``. Needs numpy and opencv-python-headless.
"""
import argparse
import glob
import os
import sys

import cv2
import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from scene_copy import SceneCopy  # noqa: E402


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--scene", required=True, help="the cloudy scene to re-expose, e.g. camera2-breaking-overcast")
    ap.add_argument("--out", required=True, help="folder to write (it gets an independent-scenes/ inside)")
    ap.add_argument("--target-mean", type=float, default=135.0, help="mean 8-bit level the gain aims at")
    ap.add_argument("--max-gain", type=float, default=1.6)
    a = ap.parse_args()
    if not a.target_mean > 0 or not a.max_gain >= 1:
        sys.exit(f"--target-mean must be above 0 (got {a.target_mean}) and --max-gain at least 1 (got {a.max_gain})")
    root = os.path.join(os.environ.get("NEPHOCAST_DATASETS") or sys.exit("NEPHOCAST_DATASETS is not set"), "independent-scenes")
    src_scene = os.path.join(root, a.scene)
    frames = sorted(glob.glob(os.path.join(src_scene, "input", "frames", "*.jpg")))
    if not os.path.isdir(src_scene) or not frames:
        sys.exit(f"{src_scene}: no scene with JPEG frames in input/frames/")
    copy = SceneCopy(root, a.out)
    link = copy.link
    dst_scene = os.path.join(copy.dst, a.scene)
    copy.link_all_but({a.scene})
    for sub in (dst_scene, os.path.join(dst_scene, "input"), os.path.join(dst_scene, "input", "frames")):
        copy.own_folder(sub)
    for name in os.listdir(src_scene):
        if name != "input":
            link(os.path.join(src_scene, name), os.path.join(dst_scene, name))
    for name in os.listdir(os.path.join(src_scene, "input")):
        if name != "frames":
            link(os.path.join(src_scene, "input", name), os.path.join(dst_scene, "input", name))
    gains = []
    for f in frames:
        img = cv2.imread(f, cv2.IMREAD_COLOR)
        if img is None:
            sys.exit(f"{f}: not a readable JPEG")
        g = float(np.clip(a.target_mean / max(img.mean(), 1.0), 1.0, a.max_gain))
        gains.append(g)
        out = np.clip(img.astype(np.float32) * g, 0, 255).astype(np.uint8)
        target = os.path.join(dst_scene, "input", "frames", os.path.basename(f))
        if not cv2.imwrite(target, out, [cv2.IMWRITE_JPEG_QUALITY, 92]):
            sys.exit(f"{target}: could not be written")
    q = np.percentile(gains, [0, 50, 100])
    print(f"{len(gains)} frames re-exposed into {dst_scene}: gain min {q[0]:.2f}, median {q[1]:.2f}, max {q[2]:.2f}")


if __name__ == "__main__":
    main()
