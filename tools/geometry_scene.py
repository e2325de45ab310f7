#!/usr/bin/env python3
"""Write a copy of one independent-renderer camera (its clear day and its cloudy scene) as a
differently mounted or differently sized camera would have taken it (a robustness probe, not a
tuning target).

Every frame of both scenes of the camera goes through one affine map of the image plane: a
rotation by ``--rotate-deg`` about the image-circle centre (the camera turned about its optical
axis), a scale by ``--scale`` (a sensor with more or fewer pixels over the same lens), and a shift
of the circle's centre by ``--shift-px`` in the new image of ``--size`` pixels. The map is exact for
the lens (a rotation about the axis and a uniform scale keep it the same family), so the truth
camera is rewritten with it (``cx``, ``cy``, ``f_px``, ``r_max_px``, ``R_cam_to_enu``, size), and
the true masks and sun pixels are moved with the frames. The forecast truth (plant irradiance) does
not depend on the camera and is linked unchanged. Frames are resampled bilinearly (area averaging
when shrinking) and written as JPEG (quality ``--quality``); every other file is linked, so the
harness runs on the copy unchanged:

    python3 tools/geometry_scene.py --camera camera1 --rotate-deg 37 --scale 1.5 --size 768 --out /tmp/geo
    NEPHOCAST_DATASETS=/tmp/geo python3 tools/independent_scenes.py --bin target/release/nephocast \\
        --camera-from calibrate --work /tmp/W-geo --json /tmp/J-geo.json

Reads ``$NEPHOCAST_DATASETS/independent-scenes``. Needs numpy, pandas and opencv-python-headless.
"""
import argparse
import glob
import json
import math
import os
import sys

import cv2
import numpy as np
import pandas as pd

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from scene_copy import SceneCopy  # noqa: E402

CAMERA_SCENES = {
    "camera1": ("camera1-clear-day", "camera1-broken-cloud"),
    "camera2": ("camera2-clear-day", "camera2-breaking-overcast"),
}


def affine(cam, rotate_deg, scale, size, shift):
    """The 2×3 map from old pixel to new pixel: rotate by `rotate_deg` (the direction of increasing
    image angle atan2(y − cy, x − cx)) and scale about the old circle centre, which lands at the
    new image's centre plus `shift`."""
    a = math.radians(rotate_deg)
    c, s = math.cos(a) * scale, math.sin(a) * scale
    ncx = (size - 1) / 2.0 + shift[0]
    ncy = (size - 1) / 2.0 + shift[1]
    m = np.array([[c, -s, 0.0], [s, c, 0.0]])
    m[:, 2] = [ncx - (c * cam["cx"] - s * cam["cy"]), ncy - (s * cam["cx"] + c * cam["cy"])]
    return m, ncx, ncy


def new_camera(cam, rotate_deg, scale, size, ncx, ncy):
    """The truth camera after the map: the image angle grows by the rotation, so a camera-frame
    direction d' = Rz(α) d and R' = R Rz(−α); focal length and circle radius scale."""
    a = math.radians(rotate_deg)
    rz = np.array([[math.cos(-a), -math.sin(-a), 0.0], [math.sin(-a), math.cos(-a), 0.0], [0.0, 0.0, 1.0]])
    out = dict(cam)
    out["R_cam_to_enu"] = (np.array(cam["R_cam_to_enu"], float) @ rz).tolist()
    out.update(width=size, height=size, cx=ncx, cy=ncy, f_px=cam["f_px"] * scale, r_max_px=cam["r_max_px"] * scale)
    out["yaw_deg"] = cam["yaw_deg"]  # informational only: the rotation lives in R_cam_to_enu
    out["note_geometry"] = f"rotated {rotate_deg}° about the optical axis, scaled {scale}, by tools/geometry_scene.py"
    return out


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--camera", required=True, choices=sorted(CAMERA_SCENES))
    ap.add_argument("--out", required=True, help="folder to write (it gets an independent-scenes/ inside)")
    ap.add_argument("--rotate-deg", type=float, default=0.0)
    ap.add_argument("--scale", type=float, default=1.0)
    ap.add_argument("--size", type=int, default=None, help="new square image size (default: the old size × scale)")
    ap.add_argument("--shift-px", type=float, nargs=2, default=(0.0, 0.0), metavar=("DX", "DY"))
    ap.add_argument("--quality", type=int, default=90)
    a = ap.parse_args()
    if not 0.25 <= a.scale <= 4.0:
        sys.exit(f"--scale must lie in 0.25–4 (got {a.scale})")
    root = os.path.join(os.environ.get("NEPHOCAST_DATASETS") or sys.exit("NEPHOCAST_DATASETS is not set"), "independent-scenes")
    copy = SceneCopy(root, a.out)
    link, own_folder, dst = copy.link, copy.own_folder, copy.dst
    mine = CAMERA_SCENES[a.camera]
    copy.link_all_but(set(mine))
    for scene in mine:
        src = os.path.join(root, scene)
        out = os.path.join(dst, scene)
        own_folder(out)
        with open(os.path.join(src, "truth", "camera.json")) as f:
            cam = json.load(f)
        size = a.size or int(round(cam["width"] * a.scale))
        m, ncx, ncy = affine(cam, a.rotate_deg, a.scale, size, a.shift_px)
        for sub in ("input", "truth", os.path.join("input", "frames"), os.path.join("truth", "masks")):
            own_folder(os.path.join(out, sub))
        for name in os.listdir(src):
            if name not in ("input", "truth"):
                link(os.path.join(src, name), os.path.join(out, name))
        for name in os.listdir(os.path.join(src, "input")):
            if name not in ("frames", "site.json"):
                link(os.path.join(src, "input", name), os.path.join(out, "input", name))
        with open(os.path.join(src, "input", "site.json")) as f:
            site = json.load(f)
        site["image_width"] = site["image_height"] = size
        with open(os.path.join(out, "input", "site.json"), "w") as f:
            json.dump(site, f, indent=2)
        for name in os.listdir(os.path.join(src, "truth")):
            if name not in ("masks", "camera.json", "truth.csv"):
                link(os.path.join(src, "truth", name), os.path.join(out, "truth", name))
        with open(os.path.join(out, "truth", "camera.json"), "w") as f:
            json.dump(new_camera(cam, a.rotate_deg, a.scale, size, ncx, ncy), f, indent=2)
        t = pd.read_csv(os.path.join(src, "truth", "truth.csv"))
        for col_x, col_y in (("sun_px_x", "sun_px_y"),):
            if col_x in t:
                x, y = t[col_x].to_numpy(), t[col_y].to_numpy()
                t[col_x] = m[0, 0] * x + m[0, 1] * y + m[0, 2]
                t[col_y] = m[1, 0] * x + m[1, 1] * y + m[1, 2]
        t.to_csv(os.path.join(out, "truth", "truth.csv"), index=False, float_format="%.3f")
        interp = cv2.INTER_AREA if a.scale < 1 else cv2.INTER_LINEAR
        frames = sorted(glob.glob(os.path.join(src, "input", "frames", "*.jpg")))
        for f in frames:
            img = cv2.imread(f, cv2.IMREAD_COLOR)
            if img is None:
                sys.exit(f"{f}: not a readable JPEG")
            w = cv2.warpAffine(img, m, (size, size), flags=interp, borderMode=cv2.BORDER_CONSTANT, borderValue=(0, 0, 0))
            target = os.path.join(out, "input", "frames", os.path.basename(f))
            if not cv2.imwrite(target, w, [cv2.IMWRITE_JPEG_QUALITY, a.quality]):
                sys.exit(f"{target}: could not be written")
        masks = sorted(glob.glob(os.path.join(src, "truth", "masks", "*.png")))
        if masks:
            for f in masks:
                mk = cv2.imread(f, cv2.IMREAD_GRAYSCALE)
                w = cv2.warpAffine(mk, m, (size, size), flags=cv2.INTER_NEAREST, borderMode=cv2.BORDER_CONSTANT, borderValue=0)
                cv2.imwrite(os.path.join(out, "truth", "masks", os.path.basename(f)), w)
        print(f"{scene}: {len(frames)} frames, {len(masks)} masks → {out} ({size}² px)")


if __name__ == "__main__":
    main()
