#!/usr/bin/env python3
"""Run nephocast on the independent-renderer scenes the way a user would, and score it.

This is a CHECK, not a tuning target. The scenes (see their README.md) come from a renderer that
nephocast was not built around; other cameras and seeds of that renderer are held back and are
what the work is judged on. Use the numbers this prints to find out whether the engine holds up,
never to fit settings to these particular scenes.

For each camera (every `CAMERA` with a `CAMERA-…clear-day` folder: camera1 and camera2 here) and each
of its cloudy scenes (a camera with several is run once per scene, in `WORK/CAMERA/SCENE`), the script:

1. writes site files into the work folder from ``input/site.json`` and ``input/ceilometer.json``:
   one fixed horizontal block (so POA = GHI) over the plant footprint, a 15-minute forecast at
   60 s steps, and three pyranometers taken from ``input/points.csv`` (nearest to the centres of
   the footprint's western third, middle and eastern third);
2. writes a measurements CSV for the cloudy scene from ``truth/truth_points.csv`` at those three
   points (1-minute means by default, ``--measurement-minutes``; ``time_utc`` = start of the period,
   or its end with ``--causal-measurements``): synthetic pyranometer readings, the
   only thing taken from ``truth/`` that the engine sees;
3. obtains the camera: ``nephocast calibrate`` on the clear day (``--camera-from calibrate``, the
   user's way) or, as a diagnostic only, ``truth/camera.json`` converted to nephocast's convention
   (``--camera-from truth``; the conversion is verified with ``nephocast camera project``);
4. measures the calibration against the true camera on a grid of sky directions (pixel and
   angular error per zenith band), with ``nephocast camera project`` / ``unproject``, sets the
   stated bound beside the true error, and (camera from ``calibrate``) sets the sun detections
   ``calibrate`` used against the true sun pixel of ``truth/truth.csv``: their image-radial and
   tangential lean, for bare discs and bloomed ones (``--calibration-only`` stops here);
5. replays the cloudy scene with the measurements and scores forecasts, motion and ramp warnings
   with the scene's ``score.py``;
6. replays the clear day with the same camera and scores its forecasts too;
7. prints a compact markdown summary and writes everything to ``--json``.

The engine only ever sees ``input/`` plus the synthetic pyranometer readings.
"""
import argparse
import json
import math
import os
import re
import shutil
import subprocess
import sys
import tomllib

import numpy as np
import pandas as pd

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from scene_probes import FrameGeometry, StaticPaint, reencoded  # noqa: E402

BANDS = [(0, 40), (40, 50), (50, 60), (60, 70), (70, 80), (80, 88.0001)]
BAND_NAMES = ["<40", "40-50", "50-60", "60-70", "70-80", "80-88"]
HORIZONS = list(range(1, 16))


# ------------------------------------------------------------------ small helpers
def run(cmd, stdin=None, log=None):
    """Run a command; return (exit code, stdout, stderr). Logs the command line."""
    if log is not None:
        log.append(" ".join(str(c) for c in cmd))
    p = subprocess.run([str(c) for c in cmd], input=stdin, capture_output=True, text=True)
    return p.returncode, p.stdout, p.stderr


def toml_value(v):
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    return repr(float(v)) if isinstance(v, float) else str(v)


def toml_table(name, d, array=False):
    head = f"[[{name}]]" if array else f"[{name}]"
    return head + "\n" + "".join(f"{k} = {toml_value(v)}\n" for k, v in d.items()) + "\n"


def read_json(p):
    with open(p) as f:
        return json.load(f)


def fnum(x, fmt="{:.2f}"):
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "—"
    return fmt.format(x)


# ------------------------------------------------------------------ camera models
def euler_from_matrix(R):
    """(roll, pitch, yaw) [deg] with R = Rz(yaw) Ry(pitch) Rx(roll) (nalgebra's from_euler_angles)."""
    R = np.asarray(R, float)
    pitch = -math.asin(max(-1.0, min(1.0, R[2, 0])))
    roll = math.atan2(R[2, 1], R[2, 2])
    yaw = math.atan2(R[1, 0], R[0, 0])
    return math.degrees(roll), math.degrees(pitch), math.degrees(yaw)


def matrix_from_euler(roll, pitch, yaw):
    r, p, y = (math.radians(a) for a in (roll, pitch, yaw))
    Rx = np.array([[1, 0, 0], [0, math.cos(r), -math.sin(r)], [0, math.sin(r), math.cos(r)]])
    Ry = np.array([[math.cos(p), 0, math.sin(p)], [0, 1, 0], [-math.sin(p), 0, math.cos(p)]])
    Rz = np.array([[math.cos(y), -math.sin(y), 0], [math.sin(y), math.cos(y), 0], [0, 0, 1]])
    return Rz @ Ry @ Rx


# Set per camera from --mirror, --flip-vertical, --rotate, --scale, --pad and --crop: how the frames
# the engine reads were changed (tools/scene_probes.py), so that every true pixel can be moved to
# match (the truth files themselves are never changed). None: the frames as shipped.
GEOM = None


def true_pixels(sc, true_cam, d):
    """The true camera's pixels of directions `d`, moved as the probes moved the frames (NaN where
    the changed frame no longer holds them)."""
    tx, ty = sc.project_enu(true_cam, d)
    return GEOM.points(tx, ty) if GEOM is not None else (tx, ty)


def calibration_from_truth(cam):
    """truth/camera.json -> the [camera] table of a nephocast calibration file (of the frames as the
    probes changed them: a mirror or flip sets `mirrored`, a turn of the frame turns the camera
    about its optical axis, a resize scales the focal length)."""
    roll, pitch, yaw = euler_from_matrix(cam["R_cam_to_enu"])
    c = calibration_from_truth_upright(cam, roll, pitch, yaw)
    if GEOM is None:
        return c
    k, mirrored, alpha = GEOM.camera_change()
    R = np.asarray(cam["R_cam_to_enu"], float) @ matrix_from_euler(0.0, 0.0, -alpha)
    roll, pitch, yaw = euler_from_matrix(R)
    cx, cy = GEOM.points([cam["cx"]], [cam["cy"]], inside=False)
    c.update(cx_px=float(cx[0]), cy_px=float(cy[0]), f_px_per_rad=c["f_px_per_rad"] * k, width_px=GEOM.size[0],
             height_px=GEOM.size[1], yaw_deg=yaw, pitch_deg=pitch, roll_deg=roll)
    if mirrored:
        c["mirrored"] = True
    return c


def calibration_from_truth_upright(cam, roll, pitch, yaw):
    return {
        "name": f"{cam.get('camera_id', 'camera')}-from-truth",
        "width_px": int(cam["width"]),
        "height_px": int(cam["height"]),
        "model": cam["model"],
        "f_px_per_rad": float(cam["f_px"]),
        "cx_px": float(cam["cx"]),
        "cy_px": float(cam["cy"]),
        "max_field_angle_deg": float(cam["theta_max_deg"]),
        "yaw_deg": yaw,
        "pitch_deg": pitch,
        "roll_deg": roll,
    }


def placeholder_calibration(width, height):
    """A level, centred equidistant camera: only so that `calibrate` can load its site file."""
    c = (width - 1) / 2.0
    return {"name": "placeholder", "width_px": int(width), "height_px": int(height), "model": "equidistant",
            "f_px_per_rad": (min(width, height) / 2.0 - 1.0) / (math.pi / 2), "cx_px": c, "cy_px": (height - 1) / 2.0,
            "max_field_angle_deg": 90.0, "yaw_deg": 0.0, "pitch_deg": 0.0, "roll_deg": 0.0}


class PyCamera:
    """The engine's camera model (src/camera.rs) re-implemented, used only to measure a calibration
    file the binary refuses to load (e.g. a negative focal length written by `calibrate`)."""

    def __init__(self, c):
        self.c = c
        self.R = matrix_from_euler(c.get("roll_deg", 0.0), c.get("pitch_deg", 0.0), c.get("yaw_deg", 0.0))
        self.k = (list(c.get("k") or []) + [0.0] * 4)[:4]
        self.fmax = math.radians(c.get("max_field_angle_deg", 90.0))

    def g(self, t):
        m = self.c["model"]
        if m == "equidistant":
            return t
        if m == "equisolid":
            return 2 * np.sin(t / 2)
        if m == "stereographic":
            return 2 * np.tan(t / 2)
        t2 = t * t
        k = self.k
        return t * (1 + t2 * (k[0] + t2 * (k[1] + t2 * (k[2] + t2 * k[3]))))

    def g_inv(self, rho):
        m = self.c["model"]
        if m == "equidistant":
            return rho
        if m == "equisolid":
            return np.where(rho <= 2, 2 * np.arcsin(np.clip(rho / 2, -1, 1)), np.nan)
        if m == "stereographic":
            return 2 * np.arctan(rho / 2)
        t = np.array(rho, float)
        for _ in range(60):  # Newton, as the engine does
            h = 1e-7
            d = (self.g(t + h) - self.g(t - h)) / (2 * h)
            t = t - (self.g(t) - rho) / d
        return np.where(np.abs(self.g(t) - rho) < 1e-8, t, np.nan)

    def project(self, zen, az):
        v = enu(zen, az) @ self.R  # R^T d
        if self.c.get("mirrored"):
            v[:, 0] = -v[:, 0]
        th = np.arccos(np.clip(v[:, 2], -1, 1))
        rxy = np.hypot(v[:, 0], v[:, 1])
        r = self.c["f_px_per_rad"] * self.g(th)
        with np.errstate(invalid="ignore", divide="ignore"):
            x = self.c["cx_px"] + np.where(rxy > 0, r * v[:, 0] / rxy, 0.0)
            y = self.c["cy_px"] + np.where(rxy > 0, r * v[:, 1] / rxy, 0.0)
        ok = (th <= self.fmax) & (x >= -0.5) & (y >= -0.5) & (x < self.c["width_px"] - 0.5) & (y < self.c["height_px"] - 0.5)
        return np.where(ok, x, np.nan), np.where(ok, y, np.nan)

    def unproject(self, x, y):
        f = self.c["f_px_per_rad"]
        dx, dy = (np.asarray(x) - self.c["cx_px"]) / f, (np.asarray(y) - self.c["cy_px"]) / f
        rho = np.hypot(dx, dy)
        th = self.g_inv(rho)
        with np.errstate(invalid="ignore", divide="ignore"):
            v = np.stack([np.sin(th) * np.where(rho > 0, dx / rho, 0), np.sin(th) * np.where(rho > 0, dy / rho, 0), np.cos(th)], -1)
        if self.c.get("mirrored"):
            v[:, 0] = -v[:, 0]
        w = v @ self.R.T
        w[~(th <= self.fmax)] = np.nan
        zen = np.degrees(np.arccos(np.clip(w[:, 2], -1, 1)))
        az = np.degrees(np.arctan2(w[:, 0], w[:, 1])) % 360
        return np.where(np.isfinite(w[:, 2]), zen, np.nan), np.where(np.isfinite(w[:, 2]), az, np.nan)


def grid_directions():
    """Sky directions: zenith 0..88 step 2, azimuth 0..358 step 4 (degrees)."""
    z, a = np.meshgrid(np.arange(0, 89, 2.0), np.arange(0, 360, 4.0), indexing="ij")
    return z.ravel(), a.ravel()


def enu(zen, az):
    z, a = np.radians(zen), np.radians(az)
    return np.stack([np.sin(z) * np.sin(a), np.sin(z) * np.cos(a), np.cos(z)], axis=-1)


def bin_project(binary, cal, zen, az, log):
    """`camera project`: zenith/azimuth rows -> (x, y) arrays, NaN where the camera says outside."""
    text = "zenith_deg,azimuth_deg\n" + "".join(f"{z:.6f},{a:.6f}\n" for z, a in zip(zen, az))
    return _bin_pairs(binary, ["camera", "project", "--calibration", cal], text, len(zen), log)


def bin_unproject(binary, cal, x, y, log):
    text = "x_px,y_px\n" + "".join(f"{a:.6f},{b:.6f}\n" for a, b in zip(x, y))
    return _bin_pairs(binary, ["camera", "unproject", "--calibration", cal], text, len(x), log)


def _bin_pairs(binary, args, text, n, log):
    rc, out, err = run([binary, *args], stdin=text, log=log)
    if rc != 0:
        raise RuntimeError(f"{' '.join(args[:2])} exited {rc}: {err.strip()}")
    lines = [ln for ln in out.splitlines() if ln.strip()][1:]  # first line is the header
    if len(lines) != n:
        raise RuntimeError(f"{' '.join(args[:2])}: expected {n} rows, got {len(lines)}")
    a = np.full(n, np.nan)
    b = np.full(n, np.nan)
    for i, ln in enumerate(lines):
        p, q = ln.split(",")
        if p.strip():
            a[i], b[i] = float(p), float(q)
    return a, b


def calibration_error(binary, cal, true_cam, sc, log, pycam=None):
    """Pixel and angular error of calibration `cal` against the true camera, per zenith band
    (with `nephocast camera project/unproject`, or with `pycam` when the binary refuses the file)."""
    zen, az = grid_directions()
    d = enu(zen, az)
    tx, ty = true_pixels(sc, true_cam, d)
    seen = np.isfinite(tx) & (zen <= 88.0)
    zen, az, d, tx, ty = zen[seen], az[seen], d[seen], tx[seen], ty[seen]
    if pycam is None:
        ox, oy = bin_project(binary, cal, zen, az, log)
        uz, ua = bin_unproject(binary, cal, tx, ty, log)
    else:
        ox, oy = pycam.project(zen, az)
        uz, ua = pycam.unproject(tx, ty)
    px_err = np.hypot(ox - tx, oy - ty)
    ud = enu(uz, ua)
    ang = np.degrees(np.arccos(np.clip(np.sum(ud * d, axis=1), -1, 1)))
    rows = []
    for (lo, hi), name in zip(BANDS, BAND_NAMES):
        s = (zen >= lo) & (zen < hi)
        pe, ae = px_err[s], ang[s]
        rows.append(dict(band=name, n=int(s.sum()),
                         outside_ours_project=int(np.sum(~np.isfinite(pe))),
                         outside_ours_unproject=int(np.sum(~np.isfinite(ae))),
                         px_median=_q(pe, 50), px_p95=_q(pe, 95), deg_median=_q(ae, 50), deg_p95=_q(ae, 95)))
    s80 = zen < 80
    return dict(bands=rows, deg_p95_z_lt_80=_q(ang[s80], 95), px_p95_z_lt_80=_q(px_err[s80], 95),
                n_directions=int(len(zen)), n_outside_ours=int(np.sum(~np.isfinite(ang)) + np.sum(~np.isfinite(px_err))))


def _q(v, p):
    v = v[np.isfinite(v)]
    return float(np.percentile(v, p)) if v.size else float("nan")


def verify_truth_conversion(binary, cal, true_cam, sc, log):
    """Largest |bin camera project - skycommon.project_enu| [px] over the grid the true camera sees."""
    zen, az = grid_directions()
    tx, ty = true_pixels(sc, true_cam, enu(zen, az))
    ok = np.isfinite(tx)
    ox, oy = bin_project(binary, cal, zen[ok], az[ok], log)
    e = np.hypot(ox - tx[ok], oy - ty[ok])
    return dict(max_px=float(np.nanmax(e)), n=int(ok.sum()), n_missing=int(np.sum(~np.isfinite(e))))


def detection_lean(detections_csv, truth_csvs, true_cam):
    """How the sun detections `calibrate` used sit against the true sun (a diagnostic: truth.csv's
    sun pixel, read by this script only). Offsets are split into image-radial (positive: away from
    the true principal point) and tangential parts, and summarised for the bare discs (bloom weight
    >= 0.95), the partly bloomed (0.3-0.95) and the bloomed (< 0.3), with the radial lean as a share
    of the image radius (a lean common to all detections is a focal-length error to the fit)."""
    d = pd.read_csv(detections_csv)
    t = pd.concat([pd.read_csv(p)[["time", "sun_px_x", "sun_px_y", "tau_sun_camera"]] for p in truth_csvs])
    cx, cy = true_cam["cx"], true_cam["cy"]
    if GEOM is not None:
        t["sun_px_x"], t["sun_px_y"] = GEOM.points(t["sun_px_x"].to_numpy(), t["sun_px_y"].to_numpy(), inside=False)
        (cx,), (cy,) = GEOM.points([cx], [cy], inside=False)
    m = d.merge(t, left_on="time_utc", right_on="time")
    ux, uy = m.sun_px_x - cx, m.sun_px_y - cy
    r = np.hypot(ux, uy)
    ex, ey = m.x_px - m.sun_px_x, m.y_px - m.sun_px_y
    rad, tan = (ex * ux + ey * uy) / r, (-ex * uy + ey * ux) / r
    out = {}
    for name, sel in (("bare", m.weight >= 0.95), ("partly_bloomed", (m.weight >= 0.3) & (m.weight < 0.95)), ("bloomed", m.weight < 0.3)):
        if not sel.any():
            continue
        out[name] = dict(n=int(sel.sum()), zenith_deg=[float(m.sun_zenith_deg[sel].min()), float(m.sun_zenith_deg[sel].max())],
                         radial_mean_px=float(rad[sel].mean()), radial_median_px=float(rad[sel].median()),
                         tangential_mean_px=float(tan[sel].mean()), tangential_sd_px=float(tan[sel].std()),
                         radial_share_of_radius_pct=float(100 * (rad[sel] / r[sel]).mean()))
    # Detections off the true sun by more than 2 px (a cloud edge, a pole's half-hidden glare, a
    # reflection taken for the sun), and how many were made with cloud over the sun.
    off = np.hypot(ex, ey)
    far = off > 2.0
    out["off_sun"] = dict(n=int(len(m)), n_over_2px=int(far.sum()), largest_px=float(off.max()) if len(m) else float("nan"),
                          n_cloud_over_sun=int((m.tau_sun_camera > 0).sum()),
                          over_2px_at=[f"{t} {o:.1f} px" for t, o in zip(m.time_utc[far], off[far])][:20])
    return out


# ------------------------------------------------------------------ site and measurements
def pick_pyranometers(points, fp):
    """Points nearest the centres of the footprint's western third, middle and eastern third."""
    ce, cn, se = fp["center_e_m"], fp["center_n_m"], fp["size_e_m"]
    out = []
    for name, e in (("west", ce - se / 3.0), ("centre", ce), ("east", ce + se / 3.0)):
        d = np.hypot(points["east_m"] - e, points["north_m"] - cn)
        r = points.iloc[int(np.argmin(d.to_numpy()))]
        out.append(dict(name=name, point_id=int(r["point_id"]), position_m=[float(r["east_m"]), float(r["north_m"])]))
    return out


def write_site(path, site_json, ceil_json, calibration, pyranometers, settings=()):
    s = site_json["site"]
    fp = site_json["plant_footprint"]
    ce, cn, se, sn = fp["center_e_m"], fp["center_n_m"], fp["size_e_m"], fp["size_n_m"]
    poly = [[ce - se / 2, cn - sn / 2], [ce + se / 2, cn - sn / 2], [ce + se / 2, cn + sn / 2], [ce - se / 2, cn + sn / 2]]
    cbh = (ceil_json or {}).get("cloud_base_heights_m") or []
    base = float(cbh[0]) if cbh else 1500.0
    # Settings given with --set SECTION.KEY=VALUE (TOML values); a key the harness writes itself
    # (e.g. clouds.base_height_m) is replaced, not written twice.
    extra = {}
    for kv in settings:
        k, v = kv.split("=", 1)
        sec, key = k.strip().rsplit(".", 1)
        extra.setdefault(sec, {})[key.strip()] = v.strip()

    def table(name, d):
        lines = {k: toml_value(v) for k, v in d.items()}
        lines.update(extra.pop(name, {}))
        return f"[{name}]\n" + "".join(f"{k} = {v}\n" for k, v in lines.items()) + "\n"

    text = "# Written by tools/independent_scenes.py from input/site.json (a check, not a tuned site).\n"
    text += table("site", {"name": s["name"], "latitude_deg": s["latitude"], "longitude_deg": s["longitude"],
                           "elevation_m": s["altitude_m"]})
    cam = {"calibration": os.path.abspath(calibration), "position_m": [0.0, 0.0, 0.0]}
    # How the frames' names carry their time: the scene's own strftime pattern when it gives one
    # (the engine's default, `…YYYYMMDDTHHMMSSZ…`, reads the shared scenes' names the same way).
    if site_json.get("frame_name_format"):
        cam["frame_time_format"] = site_json["frame_name_format"]
    text += table("camera", cam)
    # The base the site file configures (None: none, the engine estimates it from its prior).
    given = extra.get("clouds", {}).get("base_height_m")
    used_base = float(given) if given is not None else (base if cbh else None)
    # No ceilometer: no base configured (a user who does not know it); the engine estimates it by
    # shadow timing at the pyranometers, from its unconfigured prior of 1500 m.
    text += table("clouds", {"base_height_m": base} if cbh else {})
    text += table("plant", {"point_spacing_m": 25.0})
    # A horizontal fixed block: its POA is GHI. Capacity ~200 W/m2 of footprint.
    text += toml_table("plant.blocks", {"name": "footprint", "polygon_m": poly, "capacity_kw": round(se * sn * 0.2),
                                        "mount": "fixed", "tilt_deg": 0.0, "azimuth_deg": 180.0}, array=True)
    text += table("forecast", {"horizon_min": 15, "step_s": 60})
    for sec, lines in extra.items():
        text += f"[{sec}]\n" + "".join(f"{k} = {v}\n" for k, v in lines.items()) + "\n"
    for p in pyranometers:
        text += toml_table("pyranometers", {"name": p["name"], "position_m": p["position_m"]}, array=True)
    with open(path, "w") as f:
        f.write(text)
    return used_base


def write_measurements(path, truth_points_csv, pyranometers, end_stamped=False, period_min=1, shift_min=0):
    """`period_min`-minute means (time_utc = start of the period) at the pyranometer points, frame
    period only. `end_stamped` stamps each mean at the end of its period instead (the site file then
    says so: `[measurements] time_label = "end"`). `shift_min` adds that many minutes to every stamp
    (a logger whose clock is off, e.g. 60: on local time an hour ahead of UTC)."""
    tp = pd.read_csv(truth_points_csv)
    if "in_tail" in tp:
        tp = tp[tp["in_tail"] == 0]
    t = pd.to_datetime(tp["time"], utc=True)
    tp = tp.assign(minute=t.dt.floor(f"{period_min}min"))
    cols = {}
    for p in pyranometers:
        s = tp[tp["point_id"] == p["point_id"]].groupby("minute")["ghi_wm2"].mean()
        cols[f"ghi_{p['name']}_wm2"] = s
    df = pd.DataFrame(cols).sort_index()
    df.index = (df.index + pd.Timedelta(minutes=(period_min if end_stamped else 0) + shift_min)).strftime("%Y-%m-%dT%H:%M:%SZ")
    df.index.name = "time_utc"
    with open(path, "w") as f:
        f.write(f"# Synthetic pyranometers: {period_min}-minute means of truth_points.csv at frame times; time = "
                + ("end" if end_stamped else "start") + " of the period"
                + (f", every stamp moved by {shift_min:+d} min (a clock that is off)" if shift_min else "") + "\n")
        df.to_csv(f, float_format="%.1f")
    return len(df)


# ------------------------------------------------------------------ replay outputs -> score.py inputs
def convert_replay(out_dir, conv_dir, ramp_min_prob):
    os.makedirs(conv_dir, exist_ok=True)
    res = {}
    fc = pd.read_csv(os.path.join(out_dir, "forecasts.csv"))
    fc = fc[(fc["block"] == "plant") & (fc["horizon_s"] > 0)].copy()
    fc["horizon_min"] = fc["horizon_s"] / 60.0
    fc = fc[fc["horizon_min"].isin(HORIZONS)]
    f_csv = os.path.join(conv_dir, "forecast.csv")
    fc.rename(columns={"issue_time_utc": "issue_time", "ghi_wm2": "ghi_plant_mean_wm2"})[
        ["issue_time", "horizon_min", "ghi_plant_mean_wm2"]].assign(horizon_min=lambda d: d.horizon_min.astype(int)) \
        .to_csv(f_csv, index=False)
    res["forecast"] = f_csv
    res["n_forecast_issues"] = int(fc["issue_time_utc"].nunique())
    mo = pd.read_csv(os.path.join(out_dir, "motion.csv"))
    m_csv = os.path.join(conv_dir, "motion.csv")
    mm = mo[["time_utc", "east_mps", "north_mps"]].dropna()
    mm.rename(columns={"time_utc": "time", "east_mps": "u_ms", "north_mps": "v_ms"}).to_csv(m_csv, index=False)
    res["motion"] = m_csv if len(mm) else None
    res["motion_rows"] = int(len(mm))
    res["motion_frames"] = int(len(mo))
    res["frames_with_second_layer"] = int(mo["second_east_mps"].notna().sum())
    res["frames_measuring_two_layers"] = int((mo["layers"] >= 2).sum())
    rp = pd.read_csv(os.path.join(out_dir, "ramps.csv"))
    rp = rp[rp["probability"] >= ramp_min_prob]
    rows = [dict(issue_time=r.issue_time_utc, ramp_start=r.expected_start_utc, direction=r.direction)
            for r in rp.itertuples()]
    warned = set(rp["issue_time_utc"])
    rows += [dict(issue_time=t, ramp_start="", direction="none") for t in fc["issue_time_utc"].unique() if t not in warned]
    r_csv = os.path.join(conv_dir, "ramps.csv")
    pd.DataFrame(rows, columns=["issue_time", "ramp_start", "direction"]).to_csv(r_csv, index=False)
    res["ramps"] = r_csv
    res["ramp_events_used"] = int(len(rp))
    fr = pd.read_csv(os.path.join(out_dir, "frames.csv"))
    res["frame_status"] = {str(k): int(v) for k, v in fr["status"].value_counts().items()}
    return res


def score(scenes, scene_dir, files, json_out, log):
    cmd = [sys.executable, os.path.join(scenes, "score.py"), scene_dir, "--json", json_out]
    for k in ("forecast", "motion", "ramps"):
        if files.get(k):
            cmd += [f"--{k}", files[k]]
    rc, out, err = run(cmd, log=log)
    if rc != 0:
        return dict(error=f"score.py exited {rc}: {err.strip()[-2000:]}")
    return read_json(json_out)


def forecast_summary(sj, yard):
    """Skill at 5/10/15, pooled 5-15, 1-min RMSE vs smart persistence, largest |MBE|."""
    if "forecast" not in sj:
        return None
    ph = pd.DataFrame(sj["forecast"]["per_horizon"])
    if ph.empty:
        return None
    ph = ph.set_index("horizon_min")
    g = lambda h, k: float(ph.loc[float(h), k]) if float(h) in ph.index else float("nan")  # noqa: E731
    p = ph[(ph.index >= 5) & (ph.index <= 15)]
    pooled_rmse = math.sqrt(float((p["rmse"] ** 2 * p["n"]).sum() / p["n"].sum()))
    pooled_sp = math.sqrt(float((p["rmse_sp"] ** 2 * p["n"]).sum() / p["n"].sum()))
    mbe_h = ph["mbe"].abs().idxmax()
    out = dict(skill_5=g(5, "skill"), skill_10=g(10, "skill"), skill_15=g(15, "skill"),
               skill_pooled_5_15=(1 - pooled_rmse / pooled_sp) if pooled_sp > 0 else float("nan"), rmse_pooled_5_15=pooled_rmse, rmse_sp_pooled_5_15=pooled_sp,
               rmse_1=g(1, "rmse"), rmse_sp_1=g(1, "rmse_sp"),
               rmse_5=g(5, "rmse"), rmse_10=g(10, "rmse"), rmse_15=g(15, "rmse"),
               max_abs_mbe=float(abs(ph.loc[mbe_h, "mbe"])), max_abs_mbe_horizon=float(mbe_h),
               mbe_at_max=float(ph.loc[mbe_h, "mbe"]), overall=sj["forecast"].get("overall"))
    if yard:
        out["yardstick"] = yard
        out["yardstick_pooled_0_8"] = 0.8 * yard["pooled"] if yard.get("pooled") is not None else None
    return out


def motion_summary(motion_csv, scene_dir):
    """Mean vector error and speeds against the true layer-1 wind at the nearest frame."""
    if not motion_csv:
        return None
    m = pd.read_csv(motion_csv)
    tr = pd.read_csv(os.path.join(scene_dir, "truth", "truth.csv"))
    tt = pd.to_datetime(tr["time"], utc=True)
    mt = pd.to_datetime(m["time"], utc=True)
    idx = np.clip(np.searchsorted(tt.to_numpy(), mt.to_numpy()), 0, len(tr) - 1)
    tu, tv = tr["layer1_u_ms"].to_numpy()[idx], tr["layer1_v_ms"].to_numpy()[idx]
    e = np.hypot(m["u_ms"] - tu, m["v_ms"] - tv)
    return dict(n=int(len(m)), mean_vector_error_ms=float(np.mean(e)), median_vector_error_ms=float(np.median(e)),
                mean_speed_ms=float(np.mean(np.hypot(m["u_ms"], m["v_ms"]))), true_speed_ms=float(np.mean(np.hypot(tu, tv))),
                mean_u_ms=float(m["u_ms"].mean()), mean_v_ms=float(m["v_ms"].mean()),
                true_u_ms=float(np.mean(tu)), true_v_ms=float(np.mean(tv)))


def yardsticks(scenes):
    """The 'perfect perception, frozen advection' row per scene from the dataset README (score.py
    does not compute it)."""
    out = {}
    try:
        with open(os.path.join(scenes, "README.md")) as f:
            lines = f.read().splitlines()
    except OSError:
        return out
    scene = None
    for ln in lines:
        cells = [c.strip() for c in ln.strip().strip("|").split("|")]
        if len(cells) < 6:
            continue
        m = re.search(r"`([^`]+)`", cells[0])
        if m:
            scene = m.group(1)
        if scene and "perfect perception" in cells[1]:
            def num(c):
                try:
                    return float(c.replace("−", "-"))
                except ValueError:
                    return None
            out[scene] = dict(h5=num(cells[2]), h10=num(cells[3]), h15=num(cells[4]), pooled=num(cells[5]))
    return out


# ------------------------------------------------------------------ one camera
def camera_folders(scenes, camera):
    """The camera's clear day and its cloudy scenes (one or more): folders named `CAMERA-…`, the
    clear day's name ending in `clear-day`."""
    # Another camera's folders share the prefix when its name extends this one's ("sky-a" and
    # "sky-a-b"): they are left out.
    others = [c for c in discover_cameras(scenes) if c != camera and c.startswith(camera + "-")]
    ds = sorted(d for d in os.listdir(scenes) if d.startswith(camera + "-") and os.path.isdir(os.path.join(scenes, d))
                and not any(d.startswith(o + "-") for o in others))
    clear = [d for d in ds if d == camera + "-clear-day"]
    cloudy = [d for d in ds if not d.endswith("clear-day")]
    if len(clear) != 1 or not cloudy:
        raise RuntimeError(f"{camera}: expected one clear-day folder and at least one cloudy folder, found {ds}")
    return os.path.join(scenes, clear[0]), [os.path.join(scenes, d) for d in cloudy]


def discover_cameras(scenes):
    """Every camera of the scenes folder: the prefix `CAMERA` of each `CAMERA-…clear-day` folder."""
    return sorted({d[: -len("-clear-day")] for d in os.listdir(scenes)
                   if d.endswith("-clear-day") and len(d) > len("-clear-day") and os.path.isdir(os.path.join(scenes, d))})


def run_camera(a, camera, sc, yard, log, res):
    """Fill `res` step by step (so a failure part-way keeps what was done). A camera with several
    cloudy scenes runs once per scene: `res["cloudy_scene"]` names the one, and its work folder is
    `WORK/CAMERA/SCENE` (else `WORK/CAMERA`)."""
    clear, cloudies = camera_folders(a.scenes, camera)
    cloudy = os.path.join(a.scenes, res["cloudy_scene"]) if res.get("cloudy_scene") else cloudies[0]
    res["clear_scene"], res["cloudy_scene"] = os.path.basename(clear), os.path.basename(cloudy)
    work = os.path.join(a.work, camera, res["cloudy_scene"]) if len(cloudies) > 1 else os.path.join(a.work, camera)
    if os.path.isdir(work):
        shutil.rmtree(work)
    os.makedirs(work)
    site_json = read_json(os.path.join(cloudy, "input", "site.json"))
    points = pd.read_csv(os.path.join(cloudy, "input", "points.csv"))
    pyr = pick_pyranometers(points, site_json["plant_footprint"])
    res["pyranometers"] = pyr
    true_cam = read_json(os.path.join(cloudy, "truth", "camera.json"))  # scoring only

    def ceil(d):
        p = os.path.join(d, "input", "ceilometer.json")
        return read_json(p) if os.path.exists(p) and not a.no_ceilometer else None

    # The frames the engine reads: as shipped, or re-encoded at another JPEG quality.
    frames_of = {d: os.path.join(d, "input", "frames") for d in (clear, cloudy)}
    gains = tuple(float(v) for v in a.cloudy_gain.split(",")) if a.cloudy_gain else None
    global GEOM
    GEOM = FrameGeometry(site_json["image_width"], site_json["image_height"], a.mirror, a.flip_vertical, a.rotate, a.scale,
                         a.pad_total, circle=(true_cam["cx"], true_cam["cy"], true_cam["r_max_px"]))
    if not GEOM.changed:
        GEOM = None
    else:
        res["frame_geometry"] = dict(size_px=list(GEOM.size), affine=GEOM.A[:2].tolist(), rotate_deg=a.rotate,
                                     flip_vertical=a.flip_vertical, mirror=a.mirror, scale=a.scale, pad_total=list(a.pad_total))
    paint = static_paint(a, clear, true_cam, frames_of)
    if paint is not None:
        res["static_paint"] = dict(poles=[dict(a=s[0].tolist(), b=s[1].tolist(), width_px=s[2]) for s in paint.segments],
                                   reflection_px=None if paint.reflection is None else paint.reflection.tolist(),
                                   reflection_share=a.reflection)
    if a.jpeg_quality or GEOM is not None or a.stamp or gains or paint is not None:
        q = a.jpeg_quality or 95
        for d, tag in ((clear, "clear"), (cloudy, "cloudy")):
            g = gains if d == cloudy else None
            frames_of[d] = reencoded(frames_of[d], q, os.path.join(work, f"{tag}-q{q}" + (GEOM.tag() if GEOM else "")
                                                                  + (f"-stamp-{a.stamp}" if a.stamp else "") + ("-gain" if g else "")
                                                                  + (paint.tag() if paint else "")),
                                    GEOM, a.stamp, g, paint)

    cal = os.path.join(work, "cal.toml")
    site_clear = os.path.join(work, "site-clear.toml")
    site_cloudy = os.path.join(work, "site.toml")
    # 3. camera
    cal_info = dict()
    if a.camera_from == "calibrate":
        ph = os.path.join(work, "placeholder.toml")
        with open(ph, "w") as f:
            f.write("# Placeholder: `calibrate` loads the site file, which must name a calibration.\n")
            f.write(toml_table("camera", placeholder_calibration(*(GEOM.size if GEOM else (site_json["image_width"], site_json["image_height"])))))
        cal_site = os.path.join(work, "site-calibrate.toml")
        write_site(cal_site, read_json(os.path.join(clear, "input", "site.json")), ceil(clear), ph, pyr, a.calibrate_set)
        frames = clear_frames_subset(frames_of[clear], a.clear_subset, os.path.join(work, "clear-frames"),
                                     read_json(os.path.join(clear, "input", "site.json"))["site"], a.low_sun_zenith_deg)
        cal_info["clear_subset"] = a.clear_subset + (f" (sun zenith > {a.low_sun_zenith_deg:g}°)" if a.clear_subset == "low-sun" else "")
        cal_info["clear_frames"] = len([n for n in os.listdir(frames) if n.lower().endswith((".jpg", ".jpeg", ".png"))])
        if a.calibrate_with_cloudy:
            frames, cal_info["cloudy_frames_added"] = with_cloudy_frames(frames, frames_of[cloudy], a.calibrate_with_cloudy,
                                                                         os.path.join(work, "calibrate-frames"))
        rc, out, err = run([a.bin, "calibrate", "--site", cal_site, "--frames", frames, "--out", cal]
                           + (["--obstruction-mask"] if a.obstruction_mask else []), log=log)
        cal_info.update(exit_code=rc, stdout=out, stderr=err,
                        warnings=[ln.strip() for ln in (out + "\n" + err).splitlines() if "warning" in ln.lower()])
    else:
        with open(cal, "w") as f:
            f.write("# Converted from truth/camera.json by tools/independent_scenes.py (diagnostic only).\n")
            f.write(toml_table("camera", calibration_from_truth(true_cam)))
        cal_info.update(exit_code=0, stdout="", stderr="", warnings=[])
    if os.path.exists(cal):
        with open(cal, "rb") as f:
            c = tomllib.load(f)
        cal_info["fields"] = {k: c["camera"].get(k) for k in ("model", "width_px", "height_px", "f_px_per_rad", "cx_px", "cy_px", "max_field_angle_deg",
                                                                "yaw_deg", "pitch_deg", "roll_deg", "k", "mirrored")}
        cal_info["fit"] = c.get("fit")
    cal_info["true"] = {k: true_cam[k] for k in ("model", "f_px", "cx", "cy", "theta_max_deg", "yaw_deg", "tilt_deg")}
    cal_info["true_euler_ours"] = dict(zip(("roll_deg", "pitch_deg", "yaw_deg"), euler_from_matrix(true_cam["R_cam_to_enu"])))
    res["calibration"] = cal_info
    if not os.path.exists(cal):
        res["error"] = "no calibration file; nothing replayed"
        return
    # 4. calibration error (and the conversion check for the truth camera)
    try:
        if a.camera_from == "truth":
            res["truth_conversion_check"] = verify_truth_conversion(a.bin, cal, true_cam, sc, log)
        cal_info["error"] = calibration_error(a.bin, cal, true_cam, sc, log)
        cal_info["error"]["via"] = "nephocast camera project/unproject"
        # the Python model must agree with the binary wherever the binary loads the file
        pc = PyCamera(cal_info["fields"])
        zen, az = grid_directions()
        bx, by = bin_project(a.bin, cal, zen, az, log)
        qx, qy = pc.project(zen, az)
        cal_info["python_model_max_diff_px"] = float(np.nanmax(np.hypot(bx - qx, by - qy)))
        cal_info["python_model_nan_mismatch"] = int(np.sum(np.isfinite(bx) != np.isfinite(qx)))
    except RuntimeError as e:
        cal_info["binary_refused"] = str(e)
        cal_info["error"] = calibration_error(a.bin, cal, true_cam, sc, log, pycam=PyCamera(cal_info["fields"]))
        cal_info["error"]["via"] = "Python re-implementation of src/camera.rs (the binary refuses this file)"
        f = dict(cal_info["fields"])
        if f.get("f_px_per_rad", 1) < 0:
            # -f is a half turn about the optical axis: R Rz(180°) = Rz(yaw + 180°) Ry(-pitch) Rx(-roll)
            f["f_px_per_rad"] = -f["f_px_per_rad"]
            f["yaw_deg"] = (f["yaw_deg"] + 360.0) % 360.0 - 180.0
            f["pitch_deg"], f["roll_deg"] = -f["pitch_deg"], -f["roll_deg"]
            e2 = calibration_error(a.bin, cal, true_cam, sc, log, pycam=PyCamera(f))
            cal_info["equivalent_positive_f"] = dict(f_px_per_rad=f["f_px_per_rad"], yaw_deg=f["yaw_deg"],
                                                     pitch_deg=f["pitch_deg"], roll_deg=f["roll_deg"],
                                                     deg_p95_z_lt_80=e2["deg_p95_z_lt_80"],
                                                     max_diff_vs_written_px=float(np.nanmax(np.hypot(
                                                         *(np.subtract(PyCamera(f).project(*grid_directions()),
                                                                       PyCamera(cal_info["fields"]).project(*grid_directions())))))))
    if a.camera_from == "calibrate":
        dets = os.path.join(work, "cal-detections.csv")
        if os.path.exists(dets):
            cal_info["detection_lean"] = detection_lean(dets, [os.path.join(d, "truth", "truth.csv") for d in (clear, cloudy)], true_cam)
    if a.calibration_only:
        return
    # 1./2. site files and measurements
    res["cbh_m"] = write_site(site_cloudy, site_json, ceil(cloudy), cal, pyr, a.set)
    write_site(site_clear, read_json(os.path.join(clear, "input", "site.json")), ceil(clear), cal, pyr)
    meas = os.path.join(work, "measurements.csv")
    tpc = os.path.join(cloudy, "truth", "truth_points.csv")
    res["measurement_rows"] = 0 if a.no_measurements else (
        write_measurements(meas, tpc, pyr, a.causal_measurements, a.measurement_minutes, a.measurement_shift_min) if os.path.exists(tpc) else 0)
    # 5./6. replays
    for key, scene_dir, site, m in (("cloudy", cloudy, site_cloudy, meas if res["measurement_rows"] else None),
                                    ("clear", clear, site_clear, None)):
        out = os.path.join(work, f"out-{key}")
        frames = frames_of[scene_dir]
        if key == "cloudy" and a.frame_every > 1:
            frames = every_nth_frame(frames, a.frame_every, os.path.join(work, "cloudy-frames"))
        cmd = [a.bin, "replay", "--site", site, "--frames", frames, "--out", out, "--quiet"]
        if m:
            cmd += ["--measurements", m]
        rc, so, se = run(cmd, log=log)
        r = dict(exit_code=rc, stdout=so[-3000:], stderr=se[-3000:])
        res[f"replay_{key}"] = r
        if rc != 0:
            continue
        files = convert_replay(out, os.path.join(work, f"scored-{key}"), a.ramp_min_probability)
        r["converted"] = files
        sj = score(a.scenes, scene_dir, files if key == "cloudy" else {"forecast": files["forecast"]},
                   os.path.join(work, f"score-{key}.json"), log)
        r["score"] = sj
        r["forecast_summary"] = forecast_summary(sj, yard.get(os.path.basename(scene_dir)))
        if key == "cloudy":
            r["motion_summary"] = motion_summary(files.get("motion"), scene_dir)


# ------------------------------------------------------------------ report
def summary_table(results):
    """One row per camera and cloudy scene, with the issue's targets in the header: calibration p95
    at zenith < 80° (0.2°), motion (0.5 m/s), pooled 5–15 min skill (0.8 × the yardstick), 1-min
    RMSE (below smart persistence's), largest |MBE| (50 W/m²), clear-day RMSE (20 W/m²)."""
    L = ["## Summary\n",
         "| camera | cloudy scene | calibration p95 (≤ 0.2°) | motion error (≤ 0.5 m/s) | pooled 5–15 skill (≥ 0.8 × yardstick) "
         "| 1-min RMSE (< persistence) | largest \\|MBE\\| (≤ 50) | clear-day RMSE (≤ 20) |",
         "|---|---|---|---|---|---|---|---|"]
    for r in results:
        ci = r.get("calibration", {})
        err = ci.get("error") or {}
        cal = fnum(err.get("deg_p95_z_lt_80"), "{:.3f}") + "°" if err else ("refused" if ci.get("exit_code") not in (None, 0) else "—")
        rc = r.get("replay_cloudy", {})
        ms, fs = rc.get("motion_summary") or {}, rc.get("forecast_summary") or {}
        cs = (r.get("replay_clear", {}).get("forecast_summary") or {})
        motion = f"{ms['mean_vector_error_ms']:.2f} m/s" if ms.get("mean_vector_error_ms") is not None else "—"
        skill = (f"{fnum(fs.get('skill_pooled_5_15'))} (target {fnum(fs.get('yardstick_pooled_0_8'))})" if fs else "—")
        rmse1 = f"{fnum(fs.get('rmse_1'), '{:.1f}')} ({fnum(fs.get('rmse_sp_1'), '{:.1f}')})" if fs else "—"
        mbe = fnum(fs.get("max_abs_mbe"), "{:.1f}") if fs else "—"
        clear = fnum(cs.get("rmse_pooled_5_15"), "{:.1f}") if cs else "—"
        note = f" ({r['error']})" if r.get("error") else ""
        L.append(f"| {r['camera']} | {r.get('cloudy_scene', '—')}{note} | {cal} | {motion} | {skill} | {rmse1} | {mbe} | {clear} |")
    return "\n".join(L) + "\n"


def markdown(res):
    L = []
    cam = res["camera"]
    L.append(f"## {cam} — camera from `{res['camera_from']}` ({res.get('clear_scene')} → {res.get('cloudy_scene')})\n")
    ci = res.get("calibration", {})
    f = ci.get("fields") or {}
    t = ci.get("true", {})
    if ci.get("clear_subset", "all") != "all":
        L.append(f"Calibrated from part of the clear day only: `{ci['clear_subset']}`, {ci.get('clear_frames')} frames.\n")
    if ci.get("cloudy_frames_added"):
        L.append(f"Calibrated from the clear day's {ci.get('clear_frames')} frames and {ci['cloudy_frames_added']} of the cloudy scene's.\n")
    if res.get("static_paint"):
        sp = res["static_paint"]
        L.append(f"Painted into every frame: {len(sp['poles'])} pole(s) "
                 + ", ".join(f"{p['width_px']:g} px wide" for p in sp["poles"])
                 + (f"; a reflection at ({sp['reflection_px'][0]:.0f}, {sp['reflection_px'][1]:.0f}) in {sp['reflection_share']:g} of the frames"
                    if sp.get("reflection_px") else "") + ".\n")
    L.append(f"**Calibration**: exit {ci.get('exit_code')}; model {f.get('model')} (true {t.get('model')}), "
             f"f {fnum(f.get('f_px_per_rad'))} px/rad (true {fnum(t.get('f_px'))}), "
             f"max field angle {fnum(f.get('max_field_angle_deg'), '{:.1f}')}° (true {fnum(t.get('theta_max_deg'), '{:.1f}')}), "
             f"c = ({fnum(f.get('cx_px'), '{:.1f}')}, {fnum(f.get('cy_px'), '{:.1f}')}) "
             f"(true {fnum(t.get('cx'), '{:.1f}')}, {fnum(t.get('cy'), '{:.1f}')}), "
             f"yaw/pitch/roll {fnum(f.get('yaw_deg'))}/{fnum(f.get('pitch_deg'))}/{fnum(f.get('roll_deg'))}° "
             f"(true {fnum(ci.get('true_euler_ours', {}).get('yaw_deg'))}/{fnum(ci.get('true_euler_ours', {}).get('pitch_deg'))}/"
             f"{fnum(ci.get('true_euler_ours', {}).get('roll_deg'))})")
    if ci.get("fit"):
        fit = ci["fit"]
        L.append(f"fit: {fit.get('detections')} detections, residual RMS {fnum(fit.get('rms_px'))} px ({fnum(fit.get('rms_deg'), '{:.3f}')}°)")
    for w in ci.get("warnings", []):
        L.append(f"- calibrate: `{w}`")
    if ci.get("exit_code") not in (0, None):
        L.append(f"- calibrate stderr: `{ci.get('stderr', '').strip()[-500:]}`")
    if "truth_conversion_check" in res:
        v = res["truth_conversion_check"]
        L.append(f"- truth conversion check: max |bin − skycommon| = {v['max_px']:.4f} px over {v['n']} directions ({v['n_missing']} missing)")
    if ci.get("binary_refused"):
        L.append(f"- the binary refuses the calibration file: `{ci['binary_refused']}`")
    if "python_model_max_diff_px" in ci:
        L.append(f"- Python camera model vs binary: max {ci['python_model_max_diff_px']:.4f} px, "
                 f"{ci['python_model_nan_mismatch']} inside/outside disagreements")
    eq = ci.get("equivalent_positive_f")
    if eq:
        L.append(f"- f < 0 is a half turn about the optical axis, not a mirror: the same camera is f = {eq['f_px_per_rad']:.2f}, "
                 f"yaw/pitch/roll = {eq['yaw_deg']:.2f}/{eq['pitch_deg']:.2f}/{eq['roll_deg']:.2f}° (max projection difference {eq['max_diff_vs_written_px']:.4f} px; "
                 f"p95 error zenith < 80° {eq['deg_p95_z_lt_80']:.3f}°). Not used for the replay: a user gets the refusal.")
    err = ci.get("error")
    if err and "bands" in err:
        L.append(f"\nerror against the true camera, via {err.get('via')}:")
        L.append("\n| zenith | n | px median | px p95 | deg median | deg p95 | outside ours (proj/unproj) |")
        L.append("|---|---:|---:|---:|---:|---:|---:|")
        for b in err["bands"]:
            L.append(f"| {b['band']} | {b['n']} | {fnum(b['px_median'])} | {fnum(b['px_p95'])} | {fnum(b['deg_median'], '{:.3f}')} | "
                     f"{fnum(b['deg_p95'], '{:.3f}')} | {b['outside_ours_project']}/{b['outside_ours_unproject']} |")
        L.append(f"\np95 angular error over zenith < 80°: **{fnum(err['deg_p95_z_lt_80'], '{:.3f}')}°** "
                 f"(p95 pixel {fnum(err['px_p95_z_lt_80'])} px)")
        bounds = (ci.get("fit") or {}).get("direction_bound_deg") or []
        cover = []
        for b in err["bands"]:
            lo, hi = BANDS[BAND_NAMES.index(b["band"])]
            stated = max((x[2] for x in bounds if x[0] < hi and x[1] > lo), default=float("nan"))
            cover.append(f"{b['band']}: {fnum(b['deg_p95'], '{:.3f}')} ≤ {fnum(stated, '{:.3f}')} {'yes' if b['deg_p95'] <= stated else 'NO'}")
        if bounds:
            L.append("stated bound vs true p95 by band: " + "; ".join(cover))
    elif err:
        L.append(f"- calibration error not measured: {err.get('failed')}")
    lean = ci.get("detection_lean")
    if lean:
        L.append("\ndetections against the true sun (diagnostic; radial: away from the principal point):")
        L.append("\n| detections | n | zenith | radial mean px | radial median px | radial, % of radius | tangential mean px | tangential sd px |")
        L.append("|---|---:|---|---:|---:|---:|---:|---:|")
        for k, v in lean.items():
            if k == "off_sun":
                continue
            L.append(f"| {k} | {v['n']} | {v['zenith_deg'][0]:.0f}–{v['zenith_deg'][1]:.0f}° | {v['radial_mean_px']:+.2f} | {v['radial_median_px']:+.2f} | "
                     f"{v['radial_share_of_radius_pct']:+.2f} | {v['tangential_mean_px']:+.2f} | {v['tangential_sd_px']:.2f} |")
        o = lean.get("off_sun")
        if o:
            L.append(f"\n{o['n_over_2px']} of {o['n']} detections off the true sun by more than 2 px (largest {o['largest_px']:.1f} px); "
                     f"{o['n_cloud_over_sun']} made with cloud over the sun" + (": " + "; ".join(o["over_2px_at"]) if o["over_2px_at"] else ""))
    if res.get("error"):
        L.append(f"\n**{res['error']}**")
    for key in ("cloudy", "clear"):
        r = res.get(f"replay_{key}")
        if r is None:
            continue
        name = res.get(f"{key}_scene")
        if r["exit_code"] != 0:
            L.append(f"\n**Replay {name}**: exit {r['exit_code']}: `{r['stderr'].strip()[-500:]}`")
            continue
        conv = r.get("converted", {})
        L.append(f"\n**Replay {name}**: exit 0; frames {conv.get('frame_status')}; forecast issues {conv.get('n_forecast_issues')}")
        if "error" in r.get("score", {}):
            L.append(f"- score.py failed: {r['score']['error']}")
            continue
        fs = r.get("forecast_summary")
        if key == "cloudy":
            ms = r.get("motion_summary")
            smo = r.get("score", {}).get("motion", {}).get("layer1", {})
            if ms:
                L.append(f"- motion: mean vector error **{ms['mean_vector_error_ms']:.2f} m/s** (median {ms['median_vector_error_ms']:.2f}); "
                         f"mean speed {ms['mean_speed_ms']:.2f} m/s vs true {ms['true_speed_ms']:.2f}; mean vector "
                         f"({ms['mean_u_ms']:.2f}, {ms['mean_v_ms']:.2f}) vs true ({ms['true_u_ms']:.2f}, {ms['true_v_ms']:.2f}); "
                         f"score.py vector RMSE {fnum(smo.get('vector_rmse_ms'))}, direction error median "
                         f"{fnum(smo.get('direction_err_median_deg'), '{:.1f}')}°; {ms['n']} rows; "
                         f"second layer tracked in {conv.get('frames_with_second_layer')} frames "
                         f"(two layers measured in {conv.get('frames_measuring_two_layers')})")
            else:
                L.append("- motion: no motion rows")
            if fs:
                y = fs.get("yardstick") or {}
                L.append(f"- skill vs smart persistence: 5 min **{fnum(fs['skill_5'])}**, 10 min **{fnum(fs['skill_10'])}**, "
                         f"15 min **{fnum(fs['skill_15'])}**, pooled 5–15 **{fnum(fs['skill_pooled_5_15'])}** "
                         f"(yardstick {fnum(y.get('h5'))}/{fnum(y.get('h10'))}/{fnum(y.get('h15'))}/pooled {fnum(y.get('pooled'))}; "
                         f"0.8×yardstick pooled {fnum(fs.get('yardstick_pooled_0_8'))})")
                L.append(f"- 1-min RMSE {fnum(fs['rmse_1'], '{:.1f}')} W/m² vs smart persistence {fnum(fs['rmse_sp_1'], '{:.1f}')}; "
                         f"RMSE 5/10/15 min {fnum(fs['rmse_5'], '{:.1f}')}/{fnum(fs['rmse_10'], '{:.1f}')}/{fnum(fs['rmse_15'], '{:.1f}')} "
                         f"(pooled 5–15 {fnum(fs['rmse_pooled_5_15'], '{:.1f}')} vs SP {fnum(fs['rmse_sp_pooled_5_15'], '{:.1f}')}); "
                         f"largest |MBE| {fnum(fs['max_abs_mbe'], '{:.1f}')} W/m² at {fs['max_abs_mbe_horizon']:.0f} min "
                         f"(signed {fnum(fs['mbe_at_max'], '{:+.1f}')})")
            rp = r.get("score", {}).get("ramps")
            if rp:
                L.append(f"- ramps ({conv.get('ramp_events_used')} warnings): POD {fnum(rp['pod'])}, FAR {fnum(rp['far'])}, "
                         f"CSI {fnum(rp['csi'])}; truth events in scope {rp['n_truth_events_in_scope']}, "
                         f"warned ≥5 min ahead {fnum(rp['events_warned_lead_ge_5min'])}")
        elif fs:
            L.append(f"- clear-day RMSE 1/5/10/15 min: {fnum(fs['rmse_1'], '{:.1f}')}/{fnum(fs['rmse_5'], '{:.1f}')}/"
                     f"{fnum(fs['rmse_10'], '{:.1f}')}/{fnum(fs['rmse_15'], '{:.1f}')} W/m², pooled 5–15 "
                     f"{fnum(fs['rmse_pooled_5_15'], '{:.1f}')} (smart persistence {fnum(fs['rmse_sp_pooled_5_15'], '{:.1f}')}); "
                     f"largest |MBE| {fnum(fs['max_abs_mbe'], '{:.1f}')} W/m² at {fs['max_abs_mbe_horizon']:.0f} min "
                     f"(signed {fnum(fs['mbe_at_max'], '{:+.1f}')})")
    return "\n".join(L) + "\n"


CLEAR_SUBSETS = ("all", "morning", "afternoon", "midday", "every3", "low-sun")
LOW_SUN_MIN_ZENITH_DEG = 50.0


def sun_zenith_deg(names, site):
    """The sun's zenith angle [deg] at each frame's time (its name, UTC) at the site of
    ``input/site.json`` (pvlib's SPA; refraction left out)."""
    import pvlib
    t = pd.to_datetime([n[:15] for n in names], format="%Y%m%dT%H%M%S", utc=True)
    sp = pvlib.solarposition.get_solarposition(t, site["latitude"], site["longitude"], site.get("altitude_m", 0.0))
    return sp["zenith"].to_numpy()


def clear_frames_subset(frames, subset, out, site=None, low_sun_zenith_deg=LOW_SUN_MIN_ZENITH_DEG):
    """The clear day's frames that ``calibrate`` sees: all of them, or a part of the day, linked into
    ``out``. A user may have only a morning, or frames every 15 min: the calibration must hold up on
    those too (frame names carry the UTC time, ``YYYYMMDDTHHMMSSZ.jpg``; morning/afternoon split at
    12:00 UTC, midday is 09:00-15:00 UTC, every3 keeps every third frame). ``low-sun`` keeps the
    frames whose sun is lower than zenith ``low_sun_zenith_deg`` (50° by default; ``site``: the
    ``site`` table of ``input/site.json``):
    a low arc, as a winter day gives, where the sun never climbs out of its bloom."""
    if subset == "all":
        return frames
    names = sorted(n for n in os.listdir(frames) if n.endswith(".jpg"))
    hour = lambda n: n[9:11]  # noqa: E731
    if subset == "low-sun":
        if site is None:
            raise ValueError("the low-sun subset needs the site's latitude and longitude")
        zen = sun_zenith_deg(names, site)
        keep = [n for n, z in zip(names, zen) if z > low_sun_zenith_deg]
    else:
        keep = {"morning": [n for n in names if hour(n) < "12"],
                "afternoon": [n for n in names if hour(n) >= "12"],
                "midday": [n for n in names if "09" <= hour(n) < "15"],
                "every3": names[::3]}[subset]
    os.makedirs(out, exist_ok=True)
    for n in keep:
        os.symlink(os.path.join(frames, n), os.path.join(out, n))
    return out


def with_cloudy_frames(frames, cloudy_frames, every, out):
    """The calibration day's frames plus every `every`-th frame of the cloudy scene, linked into
    `out`: a "clear day" that is not wholly clear (the same camera; the cloudy scene's frames carry
    their own times). Returns the folder and how many cloudy frames were added."""
    if os.path.isdir(out):
        shutil.rmtree(out)
    os.makedirs(out)
    for n in sorted(x for x in os.listdir(frames) if x.endswith(".jpg")):
        os.symlink(os.path.realpath(os.path.join(frames, n)), os.path.join(out, n))
    added = sorted(x for x in os.listdir(cloudy_frames) if x.endswith(".jpg"))[::every]
    for n in added:
        if os.path.exists(os.path.join(out, n)):
            raise RuntimeError(f"{n} is in both the clear day and the cloudy scene")
        os.symlink(os.path.realpath(os.path.join(cloudy_frames, n)), os.path.join(out, n))
    return out, len(added)


def static_paint(a, clear, true_cam, frames_of):
    """The `--pole` / `--reflection` probe (a StaticPaint) for this camera, or None."""
    if not a.pole and not a.reflection:
        return None
    t = pd.read_csv(os.path.join(clear, "truth", "truth.csv"))
    t = t[(t.sun_zenith_deg < 80) & t.sun_px_x.notna()].sort_values("time")
    poles = []
    for spec in a.pole:
        v = [float(x) for x in spec.split(":")]
        if len(v) not in (2, 3) or not 0 <= v[0] <= 1 or v[1] <= 0:
            raise ValueError(f"--pole {spec}: FRAC:WIDTH_PX[:ANGLE_DEG], FRAC in 0..1")
        poles.append((v[0], v[1], v[2] if len(v) == 3 else 0.0))
    names = set()
    for d in frames_of.values():
        names |= {x for x in os.listdir(d) if x.endswith(".jpg")}
    return StaticPaint((true_cam["cx"], true_cam["cy"]), true_cam["r_max_px"], t[["sun_px_x", "sun_px_y"]].to_numpy(),
                       poles, a.reflection or None, names)


def every_nth_frame(frames, n, out):
    """Every `n`-th frame of the cloudy scene linked into `out` (a camera that takes frames less
    often; the forecasts are then issued, and scored, at those frames only)."""
    if os.path.isdir(out):
        shutil.rmtree(out)
    os.makedirs(out)
    for name in sorted(x for x in os.listdir(frames) if x.endswith(".jpg"))[::n]:
        os.symlink(os.path.join(frames, name), os.path.join(out, name))
    return out


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    here = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    ap.add_argument("--bin", default=os.path.join(here, "target", "release", "nephocast"), help="the nephocast binary")
    ds = os.environ.get("NEPHOCAST_DATASETS")
    ap.add_argument("--scenes", default=os.path.join(ds, "independent-scenes") if ds else None,
                    help="the independent-scenes folder (default $NEPHOCAST_DATASETS/independent-scenes)")
    ap.add_argument("--work", default="/tmp/indep-work", help="work folder (one subfolder per camera, overwritten)")
    ap.add_argument("--camera-from", choices=["calibrate", "truth"], default="calibrate",
                    help="calibrate on the clear day (the user's way) or convert truth/camera.json (diagnostic only)")
    ap.add_argument("--cameras", default="",
                    help="comma-separated cameras (default: every CAMERA with a CAMERA-…clear-day folder; "
                         "a camera with several cloudy scenes is run once per scene)")
    ap.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                    help="a site setting for the cloudy replay (TOML value), e.g. motion.cancelled_layer_pass=true; repeatable")
    ap.add_argument("--calibrate-set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                    help="a site setting for `calibrate` on the clear day (TOML value), e.g. segment.library_keeps_clipped=true; repeatable")
    ap.add_argument("--ramp-min-probability", type=float, default=0.3,
                    help="engine ramp events at least this probable count as warnings (default: the engine's caution level)")
    ap.add_argument("--causal-measurements", action="store_true",
                    help="stamp each 1-minute mean at the END of its minute, as many loggers do, and say so in the site "
                         "file (measurements.time_label=\"end\", unless --set gives another): the figures must then be "
                         "the start-stamped run's (the engine reads only completed minutes either way). "
                         "--set 'measurements.time_label=\"start\"' shows what a mislabelled logger costs")
    ap.add_argument("--jpeg-quality", type=int, default=0,
                    help="re-encode every frame (clear day and cloudy scene) as JPEG at this quality first (OpenCV; 0: as shipped)")
    ap.add_argument("--mirror", action="store_true",
                    help="flip every frame left-right (east on the right with north up, as a camera imaging the sky through a "
                         "mirror gives them), re-encoded at --jpeg-quality or 95; the true pixels are flipped to match. "
                         "Compare with an upright run at the same --jpeg-quality")
    ap.add_argument("--pad", default="0,0,0,0",
                    help="LEFT,TOP,RIGHT,BOTTOM pixels of black border added to every frame (negative: cut off), e.g. a "
                         "wider sensor (64,0,64,0) or a full-frame fisheye whose image circle is clipped (0,-40,0,-40); "
                         "re-encoded at --jpeg-quality or 95, the true pixels moved to match")
    ap.add_argument("--flip-vertical", action="store_true",
                    help="flip every frame upside down (--mirror is left-right only; both together are a half turn), "
                         "re-encoded at --jpeg-quality or 95, the true pixels flipped to match")
    ap.add_argument("--rotate", type=float, default=0.0, metavar="DEG",
                    help="turn every frame counter-clockwise by DEG about its centre (a camera mounted with another "
                         "azimuth about its optical axis): multiples of 90 exactly (pixels moved, not resampled), other "
                         "angles bicubic on a canvas of the same size when the true image circle still fits in it, else "
                         "on the turned frame's bounding box; re-encoded at --jpeg-quality or 95, the true pixels moved to match")
    ap.add_argument("--crop", default="0,0,0,0",
                    help="LEFT,TOP,RIGHT,BOTTOM pixels cut from every frame's edges after --pad's border (the same as a "
                         "negative --pad): a sensor that clips the image circle, e.g. a 4:3 frame from the 512² scenes "
                         "(0,48,0,48); re-encoded at --jpeg-quality or 95, the true pixels moved to match")
    ap.add_argument("--scale", type=float, default=1.0,
                    help="resize every frame by this factor (a camera of higher or lower resolution; 2: 1024²), "
                         "re-encoded at --jpeg-quality or 95, the true pixels moved to match")
    ap.add_argument("--stamp", choices=["corner", "inside", "inside-top"],
                    help="burn each frame's time into it as white text (top-left corner outside the image circle, or inside "
                         "the circle near its bottom rim), re-encoded at --jpeg-quality or 95")
    ap.add_argument("--obstruction-mask", action="store_true",
                    help="run `calibrate` with --obstruction-mask (the README's workflow), so the replays use its mask")
    ap.add_argument("--cloudy-gain", default="",
                    help="R,G,B gains applied to the cloudy scene's frames only (the clear day as shipped): a camera whose "
                         "exposure or white balance differs between the calibration day and the day forecast, e.g. 0.8,0.8,0.8 "
                         "or 1.08,1,0.93 (warmer); re-encoded at --jpeg-quality or 95")
    ap.add_argument("--frame-every", type=int, default=1,
                    help="replay only every N-th frame of the cloudy scene (a camera taking frames N times less often)")
    ap.add_argument("--measurement-minutes", type=int, default=1,
                    help="the synthetic pyranometers' averaging period [min] (default 1; plants often log 5- or 15-minute means)")
    ap.add_argument("--measurement-shift-min", type=int, default=0,
                    help="add this many minutes to every measurement time stamp (a logger clock that is off: 60 is "
                         "a logger on local time an hour ahead of UTC, the readings an hour late)")
    ap.add_argument("--no-ceilometer", action="store_true",
                    help="ignore input/ceilometer.json, as a site without one: no base is configured, and the engine "
                         "estimates it by shadow timing at the pyranometers (without measurements it keeps its 1500 m prior)")
    ap.add_argument("--no-measurements", action="store_true",
                    help="replay the cloudy scene without pyranometer readings (a plant without them: the "
                         "engine's documented default transmittances)")
    ap.add_argument("--calibration-only", action="store_true",
                    help="stop after measuring the calibration (steps 3-4 and the detections' lean); no replays")
    ap.add_argument("--clear-subset", choices=CLEAR_SUBSETS, default="all",
                    help="calibrate from part of the clear day only (robustness check; the clear-day replay keeps every frame); "
                         "low-sun keeps the frames whose sun is lower than --low-sun-zenith-deg (a winter day's low arc)")
    ap.add_argument("--low-sun-zenith-deg", type=float, default=LOW_SUN_MIN_ZENITH_DEG,
                    help="with --clear-subset low-sun, the sun's zenith angle [deg] beyond which a frame is kept (default 50)")
    ap.add_argument("--calibrate-with-cloudy", type=int, default=0, metavar="EVERY_N",
                    help="give `calibrate` every N-th frame of the cloudy scene besides the clear day's (a calibration day "
                         "that is not wholly clear: cloud over and near the sun in some frames); the truth camera is the same")
    ap.add_argument("--pole", action="append", default=[], metavar="FRAC:WIDTH_PX[:ANGLE_DEG]",
                    help="paint a dark opaque band (mast, pole, branch) into every frame, crossing the clear day's sun track "
                         "at share FRAC of its length, WIDTH_PX wide, ANGLE_DEG from the image-radial direction (0: a mast); "
                         "repeatable; re-encoded at --jpeg-quality or 95 (compare with a run at that quality)")
    ap.add_argument("--reflection", type=float, default=0.0, metavar="SHARE",
                    help="paint a small saturated blob that is not the sun (a reflection) into the first SHARE of the frames "
                         "(1: every frame, a static one), opposite the noon sun at 0.55 radii; re-encoded as --pole")
    ap.add_argument("--json", help="write every number here")
    a = ap.parse_args()
    pad = tuple(int(v) for v in a.pad.split(","))
    crop = tuple(int(v) for v in a.crop.split(","))
    if len(pad) != 4 or len(crop) != 4:
        ap.error("--pad and --crop take four integers: LEFT,TOP,RIGHT,BOTTOM")
    if min(crop) < 0:
        ap.error("--crop takes pixels to cut (not negative; --pad adds a border)")
    a.pad_total = tuple(p - c for p, c in zip(pad, crop))
    if a.causal_measurements and not any(kv.split("=", 1)[0].strip() == "measurements.time_label" for kv in a.set):
        a.set.append('measurements.time_label="end"')
    if not a.scenes or not os.path.isdir(a.scenes):
        print(f"independent scenes not found ({a.scenes or '$NEPHOCAST_DATASETS is not set'}); nothing to check. "
              "Pass --scenes DIR or set NEPHOCAST_DATASETS.")
        return 0
    if not os.path.isfile(a.bin):
        print(f"no nephocast binary at {a.bin}; build it (cargo build --release) or pass --bin", file=sys.stderr)
        return 2
    a.scenes, a.work, a.bin = os.path.abspath(a.scenes), os.path.abspath(a.work), os.path.abspath(a.bin)
    sys.path.insert(0, a.scenes)
    import skycommon as sc  # noqa: E402  (the dataset's own camera model, for scoring only)

    yard = yardsticks(a.scenes)
    log = []
    results = []
    text = (f"# nephocast on the independent scenes (camera from `{a.camera_from}`, binary {a.bin}; measurements "
            f"{a.measurement_minutes}-minute means stamped at the {'end' if a.causal_measurements else 'start'} of each period"
            f"{f', every stamp moved by {a.measurement_shift_min:+d} min' if a.measurement_shift_min else ''}"
            f"{'; NO measurements given to the cloudy replay' if a.no_measurements else ''})\n\n")
    cameras = [c.strip() for c in a.cameras.split(",") if c.strip()] if a.cameras else discover_cameras(a.scenes)
    for camera in cameras:
        try:
            cloudy = [os.path.basename(d) for d in camera_folders(a.scenes, camera)[1]]
        except Exception as e:  # say what is missing and go on with the other cameras
            cloudy = [None]
        for scene in cloudy:
            print(f"[{camera}{' ' + scene if scene and len(cloudy) > 1 else ''}] running ...", file=sys.stderr, flush=True)
            r = dict(camera=camera, camera_from=a.camera_from)
            if scene and len(cloudy) > 1:
                r["cloudy_scene"] = scene
            try:
                run_camera(a, camera, sc, yard, log, r)
            except Exception as e:  # keep going with the other cameras and scenes, say what broke
                r["error"] = f"{type(e).__name__}: {e}"
            results.append(r)
            text += markdown(r) + "\n"
    text += summary_table(results)
    print(text)
    if a.json:
        with open(a.json, "w") as f:
            json.dump(dict(camera_from=a.camera_from, causal_measurements=a.causal_measurements, mirror=a.mirror, pad=a.pad, scale=a.scale,
                           flip_vertical=a.flip_vertical, rotate_deg=a.rotate, crop=a.crop,
                           stamp=a.stamp, measurement_shift_min=a.measurement_shift_min, bin=a.bin, scenes=a.scenes, yardsticks=yard,
                           commands=log, cameras=results, summary_markdown=text), f, indent=1, default=str)
    return 0


if __name__ == "__main__":
    sys.exit(main())
